"""The README's CI recipes ("Using it from CI and Python"), run as written against the daemon:
a threshold gate whose exit code fails the pipeline, --dry-run, and --max-cost."""

import json
import subprocess
import sys
import textwrap

import holdout_ledger as hl

from test_interop import CLASSES, predictions, tiles

# The gate of the README, verbatim: exit 0 on pass, 1 on fail, 3 when refused.
GATE = textwrap.dedent('''
    import sys
    import pandas as pd
    import holdout_ledger as hl

    preds = pd.read_csv(sys.argv[1])
    client = hl.connect()                      # $HOLDOUT_SERVER, $HOLDOUT_TOKEN
    try:
        quote = client.dry_run("release-gate", preds)
        if quote.would_refuse:
            sys.exit(f"the gate would refuse: {quote.would_refuse}")
        answer = client.submit("release-gate", preds, max_cost=2.0, note="ci")
    except hl.BudgetRefused as refused:
        print(f"refused ({refused.reason}): {refused.message}", file=sys.stderr)
        sys.exit(refused.exit_code)            # 3, as the CLI
    except hl.HoldoutError as err:
        print(err, file=sys.stderr)
        sys.exit(err.exit_code)
    print(answer.symbol, answer.statement)
    sys.exit(0 if answer.symbol == "pass" else 1)
''')

# The shell gate of the README: the CLI's exit code, then the symbol.
SHELL_GATE = textwrap.dedent('''
    set -eu
    holdout validate release-gate --predictions "$1"
    holdout submit release-gate --predictions "$1" --dry-run
    holdout submit release-gate --predictions "$1" --max-cost 2 --require-pass --json > answer.json
''')


def make_gate(daemon, schedule="series"):
    with hl.connect(daemon.url, daemon.admin) as admin:
        admin.create_holdout("release-gate", tiles(), metric="error", classes=CLASSES, delta=0.05,
                             schedule=schedule, answers="threshold:0.2", tolerance=0.2)
    return daemon.add_user("ci-bot", "analyst")


def run_gate(daemon, token, frame, shell=False):
    path = daemon.dir / "preds.csv"
    frame.to_csv(path, index=False)
    env = {"HOLDOUT_SERVER": daemon.url, "HOLDOUT_TOKEN": token, "PY": sys.executable,
           "PATH": f"{daemon.bin_dir}:/usr/bin:/bin"}
    if shell:
        cmd = ["bash", "-c", SHELL_GATE, "gate", str(path)]
    else:
        cmd = [sys.executable, "-c", GATE, str(path)]
    return subprocess.run(cmd, capture_output=True, text=True, env=env, cwd=daemon.dir)


def test_python_gate_passes_fails_and_refuses(daemon):
    token = make_gate(daemon, schedule="even:2")
    labels = tiles()
    good = run_gate(daemon, token, predictions(labels, 10))  # 10 % error: pass below 0.2
    assert good.returncode == 0, good.stderr
    assert good.stdout.startswith("pass")
    bad = run_gate(daemon, token, predictions(labels, 4))  # 25 % error: fail
    assert bad.returncode == 1, bad.stderr
    assert bad.stdout.startswith("fail")
    spent = run_gate(daemon, token, predictions(labels, 5))  # even:2 is used up
    assert spent.returncode != 0 and "would refuse: budget-spent" in spent.stderr


def test_shell_gate_uses_exit_codes(daemon):
    token = make_gate(daemon)
    labels = tiles()
    good = run_gate(daemon, token, predictions(labels, 10), shell=True)
    assert good.returncode == 0, good.stdout + good.stderr
    assert json.loads((daemon.dir / "answer.json").read_text())["symbol"] == "pass"
    bad = run_gate(daemon, token, predictions(labels, 4), shell=True)
    assert bad.returncode == 9, bad.stdout + bad.stderr  # --require-pass: exit 9 on fail
    assert json.loads((daemon.dir / "answer.json").read_text())["symbol"] == "fail"
    assert "threshold gate" in bad.stderr
    # --max-cost below the worst-case code: refused with exit 3, nothing charged.
    path = daemon.dir / "p.csv"
    predictions(labels, 5).to_csv(path, index=False)
    r = daemon.cli(token, "submit", "release-gate", "--predictions", str(path), "--max-cost",
                   "0.01", check=3)
    assert "max-cost" in r.stdout + r.stderr
    with hl.connect(daemon.url, token) as c:
        assert c.status("release-gate").budget.answered == 2  # the two gate answers only
