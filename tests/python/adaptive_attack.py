"""The classic overfitting attack through the real daemon, by an analyst who reads every byte.

Every label is a fair coin, so every prediction vector has true error exactly 0.5 on fresh
labels. The attacker submits random prediction vectors, keeps the ones the released answers say
beat chance, and submits their majority vote: on the holdout's own rows that vote scores well
below 0.5, and a naive per-query interval around its score misses 0.5. The ledger's intervals,
valid simultaneously with everything released before, must still contain 0.5 every time.

The attacker uses every byte an analyst can read: answers (symbols, intervals, receipts),
refusals, history, status and forecasts. Before it votes, it looks in all of them for anything
that would let it test a guess of an exact score (a salt or nonce next to a hash); after the run,
an auditor's export supplies every entry's salt, and the script checks none of them was in what
the attacker saw.

Run (release build recommended):

    python tests/python/adaptive_attack.py --bin target/release/holdout --runs 20 --json out.json

`tests/python/test_attack.py` runs a small version of it in CI.
"""

import argparse
import json
import math
import random
import sys
import tempfile
from dataclasses import asdict, dataclass, field, is_dataclass
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

TRUE_ERROR = 0.5
RULES = {
    "rounded": "rounded:0.01",
    "ladder": "ladder:0.01",
    "threshold": "threshold:0.45",
    "best-of": "best-of:0.01",
}


@dataclass
class RunResult:
    rule: str
    seed: int
    answers: int = 0
    refusals: int = 0
    intervals_checked: int = 0
    intervals_missing_truth: int = 0
    false_passes: int = 0
    vote_symbol: str = ""
    vote_interval: tuple = ()
    vote_naive_interval: tuple = ()
    naive_missed: bool = False
    salt_fields_seen: int = 0
    export_salts_seen: int = 0
    notes: list = field(default_factory=list)


def _plain(obj):
    """Everything the analyst received, as plain data (for scanning every byte)."""
    if is_dataclass(obj):
        return {k: _plain(v) for k, v in asdict(obj).items()}
    if isinstance(obj, (list, tuple)):
        return [_plain(v) for v in obj]
    if isinstance(obj, dict):
        return {str(k): _plain(v) for k, v in obj.items()}
    return obj


def _keys(obj, out):
    if isinstance(obj, dict):
        for k, v in obj.items():
            out.append(k.lower())
            _keys(v, out)
    elif isinstance(obj, list):
        for v in obj:
            _keys(v, out)
    return out


def naive_interval(score, n, z=1.96):
    """What a careless analyst reports: a 95 % normal interval for one fixed query."""
    h = z * math.sqrt(max(score * (1 - score), 1e-12) / n)
    return (score - h, score + h)


def run_attack(daemon, rule_name, seed, n=4000, queries=120, batch=5, leak_exact=False):
    """One seeded run. With ``leak_exact`` the attacker also gets every exact score (as an
    auditor's history shows them, and as the 0.1.0 receipts let anyone recover them): a
    control that shows the coverage check can fail when a side door is open."""
    import holdout_ledger as hl

    rule = RULES[rule_name]
    rng = random.Random(f"{rule_name}-{seed}")
    name = f"coin-{rule_name}-{seed}".replace("best-of", "bestof")
    ids = [f"{name}-{i:05d}" for i in range(n)]
    labels = {i: rng.choice("01") for i in ids}
    admin = hl.connect(daemon.url, token=daemon.admin)
    admin.create_holdout(name, labels, metric="error", classes=["0", "1"], answers=rule,
                         schedule="series", tolerance=1.0, delta=0.05,
                         description="fair-coin labels for the attack script")
    team = f"red-{rule_name}-{seed}"
    token = daemon.add_user(f"mallory-{rule_name}-{seed}", "analyst", team=team)
    client = hl.connect(daemon.url, token=token)
    result = RunResult(rule=rule_name, seed=seed)
    leak = None
    if leak_exact:
        leak = hl.connect(daemon.url, token=daemon.add_user(f"leak-{rule_name}-{seed}", "auditor"))
    seen = []

    def random_vector():
        return [rng.choice("01") for _ in range(n)]

    def check(answer):
        seen.append(_plain(answer))
        result.answers += 1
        lo, hi = answer.interval.lower, answer.interval.upper
        result.intervals_checked += 1
        if not (lo <= TRUE_ERROR <= hi):
            result.intervals_missing_truth += 1
            result.notes.append(f"query {answer.query}: {answer.symbol} [{lo}, {hi}] misses 0.5")
        if answer.symbol == "pass":
            result.false_passes += 1

    def released_score(answer):
        if leak is not None:
            exact = [e for e in leak.history(name, exact=True) if e.kind == "answer"][-1]
            pick = answer.best_model or 0
            return exact.exact_scores[pick]
        if answer.score is not None:
            return answer.score
        return None

    kept = []
    submitted = 0
    while submitted < queries:
        if rule_name == "best-of":
            vectors = [random_vector() for _ in range(batch)]
            out = client.submit_batch(name, vectors, ids=ids, raise_on_refusal=False)
            submitted += batch
        else:
            vectors = [random_vector()]
            out = client.submit(name, vectors[0], ids=ids, raise_on_refusal=False)
            submitted += 1
        if isinstance(out, hl.Refusal):
            seen.append(_plain(out))
            result.refusals += 1
            break
        check(out)
        score = released_score(out)
        if rule_name == "best-of":
            if score is not None and score < TRUE_ERROR and out.best_model is not None:
                kept.append(vectors[out.best_model])
        elif leak is not None:
            if score < TRUE_ERROR:
                kept.append(vectors[0])
        elif rule_name == "ladder":
            if out.symbol.startswith("new-best") and score is not None and score < TRUE_ERROR:
                kept.append(vectors[0])
        elif rule_name == "threshold":
            # Pass/fail releases almost nothing about a coin-flip vector; a pass would be kept.
            if out.symbol == "pass":
                kept.append(vectors[0])
        elif score is not None and score < TRUE_ERROR:
            kept.append(vectors[0])

    seen.append(_plain(client.history(name)))
    seen.append(_plain(client.status(name)))
    # Anything that would let a guess of an exact score be tested?
    result.salt_fields_seen = sum(k in ("salt", "nonce", "opening") for k in _keys(seen, []))

    if not kept:
        kept = [random_vector()]
        result.notes.append("nothing looked better than chance: voting one random vector")
    vote = [max("01", key=lambda c: sum(v[i] == c for v in kept)) for i in range(n)]
    out = client.submit(name, vote, ids=ids, note="majority vote", raise_on_refusal=False)
    if isinstance(out, hl.Refusal):
        result.refusals += 1
        result.notes.append(f"vote refused: {out.reason}")
    else:
        check(out)
        result.vote_symbol = out.symbol
        result.vote_interval = (out.interval.lower, out.interval.upper)
        score = out.score
        if score is not None:
            result.vote_naive_interval = naive_interval(score, n)
            lo, hi = result.vote_naive_interval
            result.naive_missed = not (lo <= TRUE_ERROR <= hi)

    # The auditor's side: no salt of the export was ever in what the attacker read.
    export = Path(daemon.dir) / f"{name}.jsonl"
    auditor = daemon.add_user(f"audit-{rule_name}-{seed}", "auditor")
    daemon.cli(auditor, "export", name, "--out", str(export), check=0)
    salts = [json.loads(line)["salt"] for line in export.read_text().splitlines()[1:]]
    text = json.dumps(seen, default=str)
    result.export_salts_seen = sum(s in text for s in salts)
    return result


def summarize(results):
    by_rule = {}
    for r in results:
        s = by_rule.setdefault(r.rule, {"runs": 0, "answers": 0, "intervals_missing_truth": 0,
                                         "runs_with_a_miss": 0, "false_passes": 0,
                                         "naive_missed": 0, "salts_seen": 0, "vote_scores": []})
        s["runs"] += 1
        s["answers"] += r.answers
        s["intervals_missing_truth"] += r.intervals_missing_truth
        s["runs_with_a_miss"] += r.intervals_missing_truth > 0
        s["false_passes"] += r.false_passes
        s["naive_missed"] += r.naive_missed
        s["salts_seen"] += r.export_salts_seen + r.salt_fields_seen
        if r.vote_symbol:
            s["vote_scores"].append(r.vote_symbol)
    return by_rule


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--bin", help="holdout binary (default: $HOLDOUT_BIN or target/debug)")
    ap.add_argument("--runs", type=int, default=20, help="seeded runs per rule")
    ap.add_argument("--rules", default=",".join(RULES), help="comma-separated: " + ",".join(RULES))
    ap.add_argument("--n", type=int, default=4000, help="rows of the holdout")
    ap.add_argument("--queries", type=int, default=120, help="random vectors per run")
    ap.add_argument("--json", help="write every run's result to this file")
    ap.add_argument("--leak-exact", action="store_true",
                    help="control: give the attacker every exact score (the check must then fail)")
    args = ap.parse_args()
    import os
    if args.bin:
        os.environ["HOLDOUT_BIN"] = args.bin
    import conftest  # the same daemon harness the interop tests use

    if args.bin:
        conftest.BIN = Path(args.bin).resolve()
    results = []
    with tempfile.TemporaryDirectory() as tmp:
        daemon = conftest.Daemon(Path(tmp))
        try:
            for rule in args.rules.split(","):
                for seed in range(1, args.runs + 1):
                    r = run_attack(daemon, rule, seed, n=args.n, queries=args.queries,
                                   leak_exact=args.leak_exact)
                    results.append(r)
                    print(f"{rule:9} seed {seed:2}: {r.answers:3} answers, "
                          f"{r.intervals_missing_truth} missed 0.5, vote {r.vote_symbol or '-'} "
                          f"{tuple(round(x, 4) for x in r.vote_interval)}, naive missed "
                          f"{r.naive_missed}, salts seen {r.export_salts_seen + r.salt_fields_seen}",
                          flush=True)
        finally:
            daemon.stop()
    summary = summarize(results)
    print(json.dumps(summary, indent=2))
    if args.json:
        Path(args.json).write_text(json.dumps({"summary": summary,
                                               "runs": [asdict(r) for r in results]}, indent=2))
    bad = sum(s["intervals_missing_truth"] + s["false_passes"] + s["salts_seen"]
              for s in summary.values())
    return 1 if bad else 0


if __name__ == "__main__":
    sys.exit(main())
