#!/usr/bin/env bash
# Recovery time of a one-million-row holdout, one run on one machine:
#   1. a holdout of BENCH_ROWS rows (default 1,000,000; metric `error`, two classes) is created
#      through the daemon and answers BENCH_ANSWERS submissions (default 20);
#   2. `holdout backup --out FILE` against the running daemon (online copy, checked);
#   3. the daemon is stopped; `holdout restore FILE --db NEW` (checks the copy, copies it,
#      checks the result);
#   4. a daemon is started on NEW and `holdout status` answers (the holdout loaded again).
# Recovery time = 3 + 4. It prints each figure, the database size, the time of day and the
# load average.
#
# Usage: scripts/bench_restore.sh          (builds the release binary first)
# Environment: BENCH_ROWS, BENCH_ANSWERS, BENCH_BIN (a holdout binary to use instead of building
# the release one), BENCH_DIR (scratch directory on a real disk; default target/).
# The data are invented: ids `r000000001`..., labels `0`/`1`.
set -euo pipefail
cd "$(dirname "$0")/.."
rows="${BENCH_ROWS:-1000000}"
answers="${BENCH_ANSWERS:-20}"
root="$PWD"
if [[ -n "${BENCH_BIN:-}" ]]; then
  bin="$BENCH_BIN"
else
  cargo build --release --quiet --bin holdout
  bin="$root/target/release/holdout"
fi

mkdir -p "${BENCH_DIR:-target}"
work="$(mktemp -d "${BENCH_DIR:-target}/bench-restore.XXXXXX")"
work="$(cd "$work" && pwd)"
daemon=""
stop_daemon() {
  if [[ -n "$daemon" ]]; then kill "$daemon" 2>/dev/null || true; wait "$daemon" 2>/dev/null || true; fi
  daemon=""
}
cleanup() { stop_daemon; rm -rf "$work"; }
trap cleanup EXIT
now() { date +%s.%N; }
secs() { python3 -c "import sys; print(f'{float(sys.argv[2]) - float(sys.argv[1]):.2f}')" "$1" "$2"; }

python3 - "$work" "$rows" "$answers" <<'PY'
import random, sys
work, rows, answers = sys.argv[1], int(sys.argv[2]), int(sys.argv[3])
rng = random.Random(13)
labels = [1 if rng.random() < 0.2 else 0 for _ in range(rows)]
with open(f"{work}/labels.csv", "w") as f:
    f.write("id,label\n")
    f.writelines(f"r{i:09d},{y}\n" for i, y in enumerate(labels))
for k in range(answers):
    with open(f"{work}/pred{k}.csv", "w") as f:
        f.write("id,prediction\n")
        f.writelines(f"r{i:09d},{(1 - y) if rng.random() < 0.1 else y}\n" for i, y in enumerate(labels))
PY

start_daemon() {
  : >"$work/serve.out"
  "$bin" serve --listen 127.0.0.1:0 --log warn --db "$1" >"$work/serve.out" 2>>"$work/serve.log" &
  daemon=$!
  for _ in $(seq 600); do
    grep -q '^listening on ' "$work/serve.out" 2>/dev/null && break
    sleep 0.05
  done
  addr="$(sed -n 's/^listening on //p' "$work/serve.out")"
  [[ -n "$addr" ]] || { echo "the daemon did not start" >&2; exit 1; }
  export HOLDOUT_SERVER="http://$addr"
}

"$bin" init --db "$work/h.db" --token-out "$work/admin.token" >/dev/null 2>&1
export HOLDOUT_TOKEN="$(cat "$work/admin.token")"
start_daemon "$work/h.db"
"$bin" create big --labels "$work/labels.csv" --metric error --classes 0,1 \
  --answers rounded:0.01 --tolerance 0.5 >/dev/null
analyst="$("$bin" user add bench-analyst --role analyst --team bench --json \
  | python3 -c 'import json, sys; print(json.load(sys.stdin)["token"])')"
answered=0
for k in $(seq 0 $((answers - 1))); do
  if HOLDOUT_TOKEN="$analyst" "$bin" submit big --predictions "$work/pred$k.csv" >/dev/null; then
    answered=$((answered + 1))
  fi
done
t0="$(now)"
"$bin" backup --out "$work/copy.backup" >/dev/null
t1="$(now)"
stop_daemon
t2="$(now)"
"$bin" restore "$work/copy.backup" --db "$work/restored.db" >/dev/null
t3="$(now)"
start_daemon "$work/restored.db"
"$bin" status big >/dev/null
t4="$(now)"
stop_daemon
size="$(stat -c %s "$work/copy.backup")"
echo "$(date -u +%Y-%m-%dT%H:%MZ), load average $(cut -d' ' -f1-3 /proc/loadavg), cores $(nproc), binary $bin"
echo "rows $rows, submissions $answers ($answered answered), database copy $((size / 1048576)) MiB"
echo "  online backup (checked)              $(secs "$t0" "$t1") s"
echo "  restore (check copy, copy, check)    $(secs "$t2" "$t3") s"
echo "  daemon start + first status          $(secs "$t3" "$t4") s"
echo "  recovery time (restore + start)      $(secs "$t2" "$t4") s"
