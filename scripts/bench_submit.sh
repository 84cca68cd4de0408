#!/usr/bin/env bash
# End-to-end submit speed, in one run on one machine:
#   1. `holdout submit` of a 1,000,000-row predictions file (metric `error`, two classes), from
#      process start to the printed answer (rows in the declared order, which is sorted by id,
#      as a file made from `holdout ids`; and rows shuffled), against a pandas script that reads the same labels
#      and predictions files, merges them on id and scores the error rate;
#   2. `holdout submit` of a 1,000-row file against `holdout --version` (process start).
# Every submit is a fresh, charged, durable answer (a distinct file each time). Commands are run
# interleaved, BENCH_RUNS times each (default 7), and the medians compared.
#
# Usage: scripts/bench_submit.sh            (builds the release binary first)
# Environment: BENCH_ROWS (default 1000000), BENCH_RUNS (7), BENCH_DIR (scratch directory on a
# real disk: fsync on tmpfs costs nothing; default target/), BENCH_PYTHON (a python with pandas;
# default: python3 if it has pandas, else a venv in target/bench-venv with pandas from PyPI).
# The data are invented: ids `big-0000001`..., labels `ok`/`defect`.
set -euo pipefail
cd "$(dirname "$0")/.."
rows="${BENCH_ROWS:-1000000}"
runs="${BENCH_RUNS:-7}"
root="$PWD"

cargo build --release --quiet --bin holdout
bin="$root/target/release/holdout"

py="${BENCH_PYTHON:-}"
if [[ -z "$py" ]]; then
  if python3 -c 'import pandas' 2>/dev/null; then
    py=python3
  else
    if [[ ! -x target/bench-venv/bin/python ]]; then
      echo "installing pandas into target/bench-venv (once)" >&2
      python3 -m venv target/bench-venv
      target/bench-venv/bin/pip install --quiet pandas
    fi
    py="$root/target/bench-venv/bin/python"
  fi
fi

mkdir -p "${BENCH_DIR:-target}"
work="$(mktemp -d "${BENCH_DIR:-target}/bench-submit.XXXXXX")"
work="$(cd "$work" && pwd)"
daemon=""
cleanup() {
  local status=$?
  if [[ $status -ne 0 && -f "$work/serve.log" ]]; then
    echo "--- daemon log (last lines)" >&2
    tail -n 20 "$work/serve.log" >&2
  fi
  if [[ -n "$daemon" ]]; then kill "$daemon" 2>/dev/null || true; wait "$daemon" 2>/dev/null || true; fi
  rm -rf "$work"
}
trap cleanup EXIT

echo "generating $rows labels and $runs prediction files in $work" >&2
"$py" - "$work" "$rows" "$runs" <<'EOF'
import random, sys
work, rows, runs = sys.argv[1], int(sys.argv[2]), int(sys.argv[3])
rng = random.Random(13)
def write(path, header, lines):
    with open(path, "w") as f:
        f.write(header + "\n")
        f.write("\n".join(lines))
        f.write("\n")
for name, n in (("big", rows), ("small", 1000)):
    ids = [f"{name}-{i:07d}" for i in range(n)]
    truth = ["defect" if rng.random() < 0.2 else "ok" for _ in range(n)]
    write(f"{work}/{name}-labels.csv", "id,label", (f"{i},{t}" for i, t in zip(ids, truth)))
    for r in range(2 * runs if name == "big" else runs):
        # About 10 % wrong, a different set each run, so every file is a new, charged query.
        pred = [t if rng.random() >= 0.1 else ("ok" if t == "defect" else "defect") for t in truth]
        lines = [f"{i},{p}" for i, p in zip(ids, pred)]
        if r >= runs:
            # The second set in shuffled row order: no longer sorted by id, nor in the
            # declared order, so both sides take their hash paths.
            rng.shuffle(lines)
        write(f"{work}/{name}-pred-{r}.csv", "id,prediction", lines)
EOF

"$bin" init --db "$work/h.db" --token-out "$work/admin.token" >/dev/null
"$bin" serve --listen 127.0.0.1:0 --db "$work/h.db" >"$work/serve.out" 2>"$work/serve.log" &
daemon=$!
for _ in $(seq 100); do
  grep -q '^listening on ' "$work/serve.out" 2>/dev/null && break
  sleep 0.1
done
addr="$(sed -n 's/^listening on //p' "$work/serve.out")"
[[ -n "$addr" ]] || { cat "$work/serve.log" >&2; echo "the daemon did not start" >&2; exit 1; }
export HOLDOUT_SERVER="http://$addr"
export HOLDOUT_TOKEN="$(cat "$work/admin.token")"
for name in big small; do
  "$bin" create "$name" --labels "$work/$name-labels.csv" --metric error --classes ok,defect \
    --answers threshold:0.5 --tolerance 0.5 --expect-answers "$((2 * runs))" >/dev/null
done
analyst="$("$bin" user add ana --role analyst --json | "$py" -c 'import json,sys; print(json.load(sys.stdin)["token"])')"

"$py" - "$work" "$runs" "$bin" "$analyst" "$rows" <<'EOF'
import json, os, statistics, subprocess, sys, time
work, runs, binary, analyst, rows = sys.argv[1], int(sys.argv[2]), sys.argv[3], sys.argv[4], int(sys.argv[5])
env = dict(os.environ, HOLDOUT_TOKEN=analyst)
pandas_script = r'''
import sys, time, json
import pandas as pd
t0 = time.perf_counter()
labels = pd.read_csv(sys.argv[1], dtype=str)
pred = pd.read_csv(sys.argv[2], dtype=str)
m = labels.merge(pred, on="id", how="inner", validate="one_to_one")
if len(m) != len(labels):
    sys.exit("predictions do not cover the labels")
error = float((m["prediction"] != m["label"]).mean())
print(json.dumps({"seconds": time.perf_counter() - t0, "error": error}))
'''
def timed(cmd, check_stdout=None, **kw):
    t0 = time.perf_counter()
    p = subprocess.run(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, env=env, **kw)
    dt = time.perf_counter() - t0
    if p.returncode != 0:
        sys.exit(f"{' '.join(cmd)} failed ({p.returncode}):\n{p.stderr.decode()}")
    return dt, p.stdout.decode()
times = {k: [] for k in ("version", "submit_small", "submit_big", "submit_shuffled", "pandas_process", "pandas_inside")}
for r in range(runs):
    for _ in range(5):
        times["version"].append(timed([binary, "--version"])[0])
    dt, out = timed([binary, "submit", "small", "--predictions", f"{work}/small-pred-{r}.csv", "--json"])
    assert json.loads(out)["symbol"], out
    times["submit_small"].append(dt)
    dt, out = timed([binary, "submit", "big", "--predictions", f"{work}/big-pred-{r}.csv", "--json"])
    assert json.loads(out)["symbol"], out
    times["submit_big"].append(dt)
    dt, out = timed([binary, "submit", "big", "--predictions", f"{work}/big-pred-{runs + r}.csv", "--json"])
    assert json.loads(out)["symbol"], out
    times["submit_shuffled"].append(dt)
    dt, out = timed([sys.executable, "-c", pandas_script, f"{work}/big-labels.csv", f"{work}/big-pred-{r}.csv"])
    times["pandas_process"].append(dt)
    times["pandas_inside"].append(json.loads(out)["seconds"])
med = {k: statistics.median(v) for k, v in times.items()}
print(f"rows {rows}, {runs} runs each (version {5 * runs}), medians; cores {os.cpu_count()}, "
      f"load average {os.getloadavg()[0]:.2f}")
for k, v in times.items():
    print(f"  {k:15} median {med[k] * 1000:9.1f} ms   min {min(v) * 1000:9.1f}   max {max(v) * 1000:9.1f}")
print(f"submit {rows} rows / pandas read+merge+score (inside python, import excluded): "
      f"{med['submit_big'] / med['pandas_inside']:.2f}x  (target <= 1)")
print(f"submit {rows} rows in shuffled order / pandas read+merge+score: "
      f"{med['submit_shuffled'] / med['pandas_inside']:.2f}x")
print(f"submit {rows} rows / pandas script as a process (python start and import included): "
      f"{med['submit_big'] / med['pandas_process']:.2f}x")
print(f"submit 1000 rows / holdout --version: {med['submit_small'] / med['version']:.2f}x  (target <= 4)")
EOF
