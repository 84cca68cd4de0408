#!/usr/bin/env bash
# Creating a ten-million-row holdout, in one run on one machine:
#   1. `holdout create` of a BENCH_ROWS-row labels file (default 10,000,000; metric `error`,
#      two classes), process start to printed answer, against pandas `read_csv` of the same
#      file (timed inside Python, import excluded), interleaved, BENCH_RUNS times each
#      (default 1: a run takes about a minute);
#   2. the daemon's peak resident memory (VmHWM in /proc/PID/status) over its start and one
#      create (a fresh daemon and database each run), and over a restart on that database
#      followed by `holdout status`, which loads the holdout;
#   3. the CLI's peak resident memory during create (getrusage of the child).
# It prints each figure and the ratios against the targets: create at most 4x pandas; daemon
# peaks at most 2x the labels file + 64 MiB.
#
# Usage: scripts/bench_create.sh            (builds the release binary first)
# Environment: BENCH_ROWS, BENCH_RUNS, BENCH_ORDER (`sorted`, the default: ids in increasing
# order, as an export sorted by id is; or `shuffled`), BENCH_DIR (scratch directory on a real
# disk; default target/), BENCH_PYTHON (a python with pandas and numpy; default: python3 if it
# has them, else a venv in target/bench-venv with both from PyPI).
# The data are invented: ids `r000000001`..., labels `0`/`1`.
set -euo pipefail
cd "$(dirname "$0")/.."
rows="${BENCH_ROWS:-10000000}"
runs="${BENCH_RUNS:-1}"
order="${BENCH_ORDER:-sorted}"
root="$PWD"

cargo build --release --quiet --bin holdout
bin="$root/target/release/holdout"

py="${BENCH_PYTHON:-}"
if [[ -z "$py" ]]; then
  if python3 -c 'import pandas, numpy' 2>/dev/null; then
    py=python3
  else
    if [[ ! -x target/bench-venv/bin/python ]] || ! target/bench-venv/bin/python -c 'import pandas, numpy' 2>/dev/null; then
      echo "installing pandas and numpy into target/bench-venv (once)" >&2
      python3 -m venv target/bench-venv
      target/bench-venv/bin/pip install --quiet pandas numpy
    fi
    py="$root/target/bench-venv/bin/python"
  fi
fi

mkdir -p "${BENCH_DIR:-target}"
work="$(mktemp -d "${BENCH_DIR:-target}/bench-create.XXXXXX")"
work="$(cd "$work" && pwd)"
daemon=""
stop_daemon() {
  if [[ -n "$daemon" ]]; then kill "$daemon" 2>/dev/null || true; wait "$daemon" 2>/dev/null || true; fi
  daemon=""
}
cleanup() {
  local status=$?
  if [[ $status -ne 0 && -f "$work/serve.log" ]]; then
    echo "--- daemon log (last lines)" >&2
    tail -n 20 "$work/serve.log" >&2
  fi
  stop_daemon
  rm -rf "$work"
}
trap cleanup EXIT

echo "generating $rows label rows ($order) in $work" >&2
"$py" - "$work/labels.csv" "$rows" "$order" <<'EOF'
import sys
import numpy as np
path, rows, order = sys.argv[1], int(sys.argv[2]), sys.argv[3]
rng = np.random.default_rng(13)
idx = np.arange(rows)
if order == "shuffled":
    rng.shuffle(idx)
labels = (rng.random(rows) < 0.2).astype(np.int8)
with open(path, "w") as f:
    f.write("id,label\n")
    step = 1_000_000
    for s in range(0, rows, step):
        f.write("".join(f"r{i:09d},{y}\n" for i, y in zip(idx[s:s + step], labels[s:s + step])))
EOF

start_daemon() {
  : >"$work/serve.out"
  "$bin" serve --listen 127.0.0.1:0 --db "$work/h.db" \
    >"$work/serve.out" 2>>"$work/serve.log" &
  daemon=$!
  for _ in $(seq 300); do
    grep -q '^listening on ' "$work/serve.out" 2>/dev/null && break
    sleep 0.1
  done
  addr="$(sed -n 's/^listening on //p' "$work/serve.out")"
  [[ -n "$addr" ]] || { echo "the daemon did not start" >&2; exit 1; }
  export HOLDOUT_SERVER="http://$addr"
}
hwm() { awk '/^VmHWM/ {print $2}' "/proc/$1/status"; }

results="$work/results"
: >"$results"
for r in $(seq "$runs"); do
  rm -f "$work"/h.db*
  "$bin" init --db "$work/h.db" --token-out "$work/admin.token" >/dev/null 2>&1
  export HOLDOUT_TOKEN="$(cat "$work/admin.token")"
  start_daemon
  "$py" - "$bin" "$work/labels.csv" "$results" <<'EOF'
import json, resource, subprocess, sys, time
binary, labels, results = sys.argv[1:4]
t0 = time.perf_counter()
p = subprocess.run([binary, "create", "big", "--labels", labels, "--metric", "error",
                    "--classes", "0,1", "--answers", "threshold:0.5", "--tolerance", "0.5",
                    "--json"], stdout=subprocess.PIPE, stderr=subprocess.PIPE)
dt = time.perf_counter() - t0
if p.returncode != 0:
    sys.exit(f"create failed ({p.returncode}):\n{p.stderr.decode()}")
cli_kib = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss
with open(results, "a") as f:
    f.write(json.dumps({"create_s": dt, "cli_kib": cli_kib}) + "\n")
EOF
  created_kib="$(hwm "$daemon")"
  stop_daemon
  start_daemon
  "$bin" status big >/dev/null
  restart_kib="$(hwm "$daemon")"
  stop_daemon
  "$py" - "$work/labels.csv" "$results" "$created_kib" "$restart_kib" <<'EOF'
import json, sys, time
import pandas as pd
labels, results, created, restarted = sys.argv[1], sys.argv[2], int(sys.argv[3]), int(sys.argv[4])
t0 = time.perf_counter()
df = pd.read_csv(labels)
dt = time.perf_counter() - t0
assert len(df) > 0
with open(results, "a") as f:
    f.write(json.dumps({"pandas_s": dt, "daemon_create_kib": created, "daemon_restart_kib": restarted}) + "\n")
EOF
done

"$py" - "$results" "$work/labels.csv" "$rows" "$order" <<'EOF'
import json, os, statistics, sys
import pandas as pd
results, labels, rows, order = sys.argv[1], sys.argv[2], int(sys.argv[3]), sys.argv[4]
recs = [json.loads(l) for l in open(results)]
def med(k):
    return statistics.median(r[k] for r in recs if k in r)
size = os.path.getsize(labels)
mib = 1 << 20
budget = 2 * size + 64 * mib
create, pandas = med("create_s"), med("pandas_s")
d_create, d_restart, cli = (med(k) * 1024 for k in ("daemon_create_kib", "daemon_restart_kib", "cli_kib"))
print(f"rows {rows} ({order} ids), labels file {size / mib:.1f} MiB, {len(recs) // 2} run(s), medians; "
      f"cores {os.cpu_count()}, load average {os.getloadavg()[0]:.2f}, pandas {pd.__version__}")
print(f"  holdout create (process)      {create:8.2f} s")
print(f"  pandas read_csv (inside)      {pandas:8.2f} s")
print(f"  create / pandas               {create / pandas:8.2f}x   (target <= 4)")
print(f"  daemon peak RSS, create       {d_create / mib:8.1f} MiB")
print(f"  daemon peak RSS, restart      {d_restart / mib:8.1f} MiB")
print(f"  budget 2 x file + 64 MiB      {budget / mib:8.1f} MiB")
print(f"  daemon create / budget        {d_create / budget:8.2f}    (target <= 1)")
print(f"  daemon restart / budget       {d_restart / budget:8.2f}    (target <= 1)")
print(f"  CLI peak RSS                  {cli / mib:8.1f} MiB   ({cli / size:.2f} of the file)")
EOF
