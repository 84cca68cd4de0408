#!/usr/bin/env bash
# Long fuzzing runs of the readers that take outside input (tests/fuzz_readers.rs): each target
# for SECONDS (default 600), optimised build. Not run in CI. Usage: scripts/fuzz.sh [SECONDS]
set -euo pipefail
cd "$(dirname "$0")/.."
secs="${1:-600}"
for target in table column parsers export; do
  FUZZ_SECONDS="$secs" FUZZ_TARGET="$target" \
    cargo test --release --test fuzz_readers -- --ignored --nocapture fuzz_for_a_while
done
