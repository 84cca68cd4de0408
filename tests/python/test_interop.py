"""Interop: the Python client (holdout_ledger) against the real daemon.

Invented data: 400 inspected tiles, each labelled sound / chipped / cracked.
"""

import json
import math
import socket

import grpc
import numpy as np
import pandas as pd
import pytest

import holdout_ledger as hl

CLASSES = ["chipped", "cracked", "sound"]
N = 400


def tiles():
    """Labels: a DataFrame with columns id, label (deterministic, invented)."""
    ids = [f"tile-{i:04d}" for i in range(N)]
    labels = [CLASSES[(i * 7 + i // 3) % 3] for i in range(N)]
    return pd.DataFrame({"id": ids, "label": labels})


def predictions(labels, wrong_every):
    """Predictions wrong on every `wrong_every`-th row: error rate 1/wrong_every exactly."""
    pred = labels["label"].copy()
    wrong = np.arange(N) % wrong_every == 0
    pred[wrong] = np.where(pred[wrong] == "sound", "chipped", "sound")
    return pd.DataFrame({"id": labels["id"], "prediction": pred})


@pytest.fixture
def setup(daemon):
    """A holdout `tiles` (even:2 schedule: exactly two answers) and an analyst client."""
    labels = tiles()
    with hl.connect(daemon.url, daemon.admin) as admin:
        info = admin.create_holdout(
            "tiles", labels, metric="error", method="exact", classes=CLASSES, delta=0.05,
            schedule="even:2",
            answers="rounded:0.01", tolerance=0.2, description="invented tile inspections",
        )
    token = daemon.add_user("ines", "analyst", team="kiln")
    client = hl.connect(daemon.url, token)
    yield daemon, client, labels, info
    client.close()


def test_create_returns_public_facts(setup):
    _, client, labels, info = setup
    assert info.name == "tiles" and info.rows == N and info.open
    assert info.targets[0].metric == "error" and info.targets[0].method == "exact"
    assert info.targets[0].classes == tuple(CLASSES)
    assert info.policy.schedule == "even:2" and info.policy.answers == "rounded:0.01"
    assert info.budget.answered == 0 and info.budget.delta == pytest.approx(0.05)
    assert client.ids("tiles") == list(labels["id"])


def test_validate_accepts_every_input_form_with_one_digest(setup):
    _, client, labels, _ = setup
    frame = predictions(labels, 10)
    v = client.validate("tiles", frame)
    assert v.rows == N and len(v.digest) == 64
    series = frame.set_index("id")["prediction"]
    as_array = frame["prediction"].to_numpy()  # declared order, no ids
    shuffled = frame.sample(frac=1.0, random_state=3)
    forms = {
        "series": client.validate("tiles", series),
        "array": client.validate("tiles", as_array),
        "list+ids": client.validate("tiles", list(shuffled["prediction"]), list(shuffled["id"])),
        "dict": client.validate("tiles", dict(zip(frame["id"], frame["prediction"]))),
    }
    for name, got in forms.items():
        assert got == v, name
    other = client.validate("tiles", predictions(labels, 5))
    assert other.digest != v.digest
    assert client.status("tiles").budget.answered == 0


def test_bad_input_is_invalid_input_and_charges_nothing(setup):
    _, client, labels, _ = setup
    frame = predictions(labels, 10)
    unknown = frame.copy()
    unknown.loc[7, "id"] = "tile-9999"
    with pytest.raises(hl.InvalidInput) as e:  # checked by the daemon
        client.validate("tiles", unknown)
    assert e.value.code == grpc.StatusCode.INVALID_ARGUMENT
    assert "tile-9999" in str(e.value)
    with pytest.raises(hl.InvalidInput):
        client.submit("tiles", frame.iloc[:-1])  # a missing row
    bad_class = frame.copy()
    bad_class.loc[3, "prediction"] = "warped"
    with pytest.raises(hl.InvalidInput, match="warped"):  # checked locally
        client.submit("tiles", bad_class)
    with pytest.raises(hl.InvalidInput):
        client.submit("tiles", ["sound"] * 3, ids=["tile-0000"])
    assert isinstance(hl.InvalidInput("x"), ValueError)
    s = client.status("tiles").budget
    assert (s.answered, s.spent) == (0, 0.0)


def test_dry_run_quotes_and_charges_nothing(setup):
    _, client, labels, _ = setup
    q = client.dry_run("tiles", predictions(labels, 10))
    assert q.query == 1 and q.would_refuse == ""
    assert q.delta_i == pytest.approx(0.025)  # even:2 of delta 0.05
    assert q.level_nats == pytest.approx(math.log(1 / 0.025))
    assert 0 < q.half_width < 0.2
    assert q.worst_code_nats == pytest.approx(math.log(101))  # rounded:0.01, ln(M+1)
    assert client.dry_run("tiles") == q  # predictions are optional for a quote
    s = client.status("tiles").budget
    assert (s.answered, s.refused, s.spent) == (0, 0, 0.0)
    assert client.history("tiles") == []


def test_submit_answers_replays_then_refuses_when_spent(setup):
    _, client, labels, _ = setup
    frame = predictions(labels, 10)  # exactly 40 errors of 400: 0.10
    digest = client.validate("tiles", frame).digest

    with pytest.raises(hl.BudgetRefused) as e:
        client.submit("tiles", frame, max_cost=0.001)
    assert e.value.reason == "max-cost" and not e.value.spent and e.value.exit_code == 3
    assert str(e.value).count("max-cost") >= 1 and not str(e.value).startswith("refused (max-cost): refused")
    assert client.status("tiles").budget.answered == 0

    a = client.submit("tiles", frame, note="baseline", request_id="run-1")
    assert isinstance(a, hl.Answer)
    assert a.query == 1 and a.symbol in ("0.1", "0.10")
    assert a.score == pytest.approx(0.10)
    assert 0.10 in a.interval and a.interval.lower > 0.05 and a.interval.upper < 0.16
    assert a.delta_i == pytest.approx(0.025) and a.level_nats == pytest.approx(math.log(40))
    assert a.code_nats == pytest.approx(math.log(101))
    assert a.digest == digest and not a.replayed and a.best_model is None
    assert a.receipt.holdout == "tiles" and a.receipt.query == 1 and len(a.receipt.entry_hash) == 64
    assert a.budget.answered == 1 and a.budget.spent == pytest.approx(0.025)
    assert "0.05" in a.guarantee

    again = client.submit("tiles", frame, request_id="run-1")
    assert again.replayed and again.query == 1 and again.receipt == a.receipt
    assert client.status("tiles").budget.answered == 1

    b = client.submit("tiles", predictions(labels, 4), note="second")  # 100 errors: 0.25
    assert b.query == 2 and b.score == pytest.approx(0.25)
    assert b.budget.answered == 2 and b.budget.remaining == pytest.approx(0.0, abs=1e-12)

    with pytest.raises(hl.BudgetRefused) as e:
        client.submit("tiles", predictions(labels, 5), note="third")
    r = e.value
    assert r.reason == "budget-spent" and r.spent
    assert r.budget.answered == 2 and r.receipt is not None and r.receipt.query == 0
    assert len(r.receipt.entry_hash) == 64 and r.receipt.entry_hash != b.receipt.entry_hash
    refusal = client.submit("tiles", predictions(labels, 5), raise_on_refusal=False)
    assert isinstance(refusal, hl.Refusal) and refusal.reason == "budget-spent"

    assert client.dry_run("tiles").would_refuse == "budget-spent"
    st = client.status("tiles")
    assert st.holdout == "tiles" and st.budget.answered == 2 and st.budget.refused >= 2
    assert st.policy.schedule == "even:2" and st.guarantee

    hist = client.history("tiles")
    kinds = [h.kind for h in hist]
    assert kinds.count("answer") == 2 and kinds[-1] == "refusal"
    first = next(h for h in hist if h.kind == "answer")
    assert first.answer == a and first.note == "baseline" and first.team == "kiln"
    assert all(h.exact_scores == () for h in hist)  # analysts never see exact scores


def test_auth_not_found_and_unreachable(setup):
    daemon, client, labels, _ = setup
    with pytest.raises(hl.NotFound) as e:
        client.status("no-such-holdout")
    assert e.value.exit_code == 5 and isinstance(e.value, LookupError)
    with pytest.raises(hl.NotAuthorized) as e:
        client.create_holdout("more-tiles", tiles(), classes=CLASSES)  # not a custodian
    assert e.value.code == grpc.StatusCode.PERMISSION_DENIED and isinstance(e.value, PermissionError)
    with hl.connect(daemon.url, "not-a-token") as stranger:
        with pytest.raises(hl.NotAuthorized) as e:
            stranger.status("tiles")
    assert e.value.code == grpc.StatusCode.UNAUTHENTICATED and e.value.exit_code == 4
    with hl.connect(daemon.url, None) as anonymous:
        with pytest.raises(hl.NotAuthorized):
            anonymous.history("tiles")
    s = socket.socket()
    s.bind(("127.0.0.1", 0))
    dead = f"127.0.0.1:{s.getsockname()[1]}"
    s.close()
    with pytest.raises(hl.Unreachable) as e:
        hl.connect(dead, "x", connect_timeout=1.0)
    assert e.value.exit_code == 6 and isinstance(e.value, ConnectionError)


def test_cli_created_holdout_and_cli_digest_agree_with_python(daemon, tmp_path):
    labels = tiles()
    path = tmp_path / "labels.csv"
    labels.to_csv(path, index=False)
    daemon.cli(daemon.admin, "create", "cli-tiles", "--labels", str(path), "--metric", "error",
               "--classes", ",".join(CLASSES), "--delta", "0.05", "--answers", "rounded:0.01",
               "--tolerance", "0.2", check=0)
    frame = predictions(labels, 8)
    pred_path = tmp_path / "preds.csv"
    frame.to_csv(pred_path, index=False)
    cli = json.loads(daemon.cli(daemon.admin, "validate", "cli-tiles", "--predictions",
                                str(pred_path), "--json", check=0).stdout)
    with hl.connect(daemon.url, daemon.admin) as admin:
        assert admin.validate("cli-tiles", frame).digest == cli["digest"]
        assert admin.holdout("cli-tiles").targets[0].classes == tuple(CLASSES)
        with pytest.raises(hl.StateConflict):  # the same rows again
            admin.create_holdout("cli-tiles", labels, classes=CLASSES, tolerance=0.2)


def test_ladder_leaderboard(daemon):
    labels = tiles()
    with hl.connect(daemon.url, daemon.admin) as admin:
        admin.create_holdout("tiles-ladder", labels, metric="error", classes=CLASSES,
                             answers="ladder:0.01", tolerance=0.2)
    teams = {"kiln": 10, "glaze": 4}  # error 0.10 and 0.25
    for team, every in teams.items():
        with hl.connect(daemon.url, daemon.add_user(f"{team}-1", "analyst", team=team)) as c:
            a = c.submit("tiles-ladder", predictions(labels, every))
            assert a.score == pytest.approx(1 / every)
    with hl.connect(daemon.url, daemon.admin) as organizer:
        board = organizer.leaderboard("tiles-ladder")
    assert board.holdout == "tiles-ladder" and not board.own_team_only
    assert [(r.rank, r.team) for r in board.rows] == [(1, "kiln"), (2, "glaze")]
    assert board.rows[0].best == pytest.approx(0.10) and 0.10 in board.rows[0].interval
    assert board.rows[1].submissions == 1 and board.statement
    with hl.connect(daemon.url, daemon.admin) as organizer:
        with pytest.raises(hl.NotFound):
            organizer.leaderboard("no-such-ladder")


def test_error_holdouts_need_declared_classes_and_families_cap_shares(daemon):
    labels = tiles()
    first, second, third = labels.iloc[:100], labels.iloc[100:200], labels.iloc[200:300]
    with hl.connect(daemon.url, daemon.admin) as admin:
        # No classes: refused by the client before anything is sent (the label domain is declared).
        with pytest.raises(hl.InvalidInput) as e:
            admin.create_holdout("no-classes", first)
        assert "classes" in str(e.value) and e.value.exit_code == 2
        assert admin.holdouts() == []
        # A label outside the declared classes: refused by the daemon, naming target and row id.
        with pytest.raises(hl.InvalidInput) as e:
            admin.create_holdout("narrow", first, classes=["sound"])
        assert "target label" in str(e.value) and "tile-0" in str(e.value)
        assert admin.holdouts() == []
        # A family: the first member fixes the total; a share past it is refused, nothing stored.
        a = admin.create_holdout("fam-a", first, classes=CLASSES, tolerance=0.5, delta=0.02, family="batch",
                                 family_delta=0.05)
        assert a.policy.delta == pytest.approx(0.02)
        admin.create_holdout("fam-b", second, classes=CLASSES, tolerance=0.5, delta=0.03, family="batch")
        with pytest.raises(hl.StateConflict) as e:
            admin.create_holdout("fam-c", third, classes=CLASSES, tolerance=0.5, delta=0.01, family="batch")
        assert "sum past the total" in str(e.value)
        assert sorted(h.name for h in admin.holdouts()) == ["fam-a", "fam-b"]
        with pytest.raises(hl.InvalidInput):
            admin.create_holdout("fam-d", third, classes=CLASSES, tolerance=0.5, family_delta=0.05)
