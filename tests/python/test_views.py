"""The organizer's views through the Python client: best per team on a rounded holdout,
a sealed round's status per team, `submit(final=True)`, `ranking()` and `duplicates()`.

Invented data: the 400 inspected tiles of test_interop (sound / chipped / cracked).
"""

import pytest

import holdout_ledger as hl
from test_interop import CLASSES, predictions, tiles


def test_best_per_team_on_a_rounded_holdout(daemon):
    labels = tiles()
    with hl.connect(daemon.url, daemon.admin) as admin:
        admin.create_holdout("tiles-best", labels, metric="error", classes=CLASSES,
                             answers="rounded:0.01", tolerance=0.3)
    # kiln: 0.25 then 0.10; glaze: 0.20 then 0.50 (its first answer stays its best).
    plan = [("kiln", 4), ("glaze", 5), ("kiln", 10), ("glaze", 2)]
    clients = {t: hl.connect(daemon.url, daemon.add_user(f"{t}-1", "analyst", team=t))
               for t in ("kiln", "glaze")}
    answers = {}
    for team, every in plan:
        a = clients[team].submit("tiles-best", predictions(labels, every))
        answers.setdefault(team, []).append(a)
    with hl.connect(daemon.url, daemon.admin) as organizer:
        board = organizer.leaderboard("tiles-best")
    assert board.kind == "best-per-team"
    assert [(r.rank, r.team) for r in board.rows] == [(1, "kiln"), (2, "glaze")]
    for row in board.rows:
        mine = answers[row.team]
        best = min(mine, key=lambda a: a.interval.upper)
        assert row.query == best.query and row.interval == best.interval
        assert row.best == pytest.approx(best.score) and row.submissions == 2
        assert row.target == "label"
    assert 0.10 in board.rows[0].interval and 0.20 in board.rows[1].interval
    for c in clients.values():
        c.close()


def test_a_sealed_round_through_python(daemon, tmp_path):
    labels = tiles()
    with hl.connect(daemon.url, daemon.admin) as admin:
        admin.create_holdout("tiles-round", labels, metric="error", classes=CLASSES,
                             answers="sealed", tolerance=0.3, shares="roster:kiln,glaze,slip")
    kiln = hl.connect(daemon.url, daemon.add_user("kiln-1", "analyst", team="kiln"))
    glaze = hl.connect(daemon.url, daemon.add_user("glaze-1", "analyst", team="glaze"))
    first = kiln.submit("tiles-round", predictions(labels, 10), final=True)
    assert isinstance(first, hl.SealedEntry) and first.marked
    later = kiln.submit("tiles-round", predictions(labels, 3))
    assert isinstance(later, hl.SealedEntry) and not later.marked
    glaze.submit("tiles-round", predictions(labels, 4))
    # Glaze sends kiln's marked file again: a duplicate across teams.
    glaze.submit("tiles-round", predictions(labels, 10))
    status = kiln.status("tiles-round")
    assert status.round is not None and not status.round.closed
    per_team = {t.team: (t.entries, t.selected, t.marked) for t in status.round.teams}
    assert per_team == {"kiln": (2, first.query, True), "glaze": (2, per_team["glaze"][1], False)}
    assert status.budget_of == "kiln" and not status.no_share
    with hl.connect(daemon.url, daemon.admin) as organizer:
        assert organizer.status("tiles-round").round.not_submitted == ("slip",)
        assert organizer.status("tiles-round").no_share
        dups = organizer.duplicates("tiles-round")
        assert [d.teams for d in dups] == [("glaze", "kiln")]
        assert {e.team for e in dups[0].entries} == {"glaze", "kiln"}
        with pytest.raises(hl.StateConflict):  # sealed until the close
            organizer.ranking("tiles-round")
    with pytest.raises(hl.NotAuthorized):
        kiln.duplicates("tiles-round")
    daemon.cli(daemon.admin, "close", "tiles-round", "--reason", "end of round", check=0)
    ranking = kiln.ranking("tiles-round")
    # Kiln's marked entry (error 0.10) is ranked, not its later one (0.33).
    assert [(e.rank, e.team) for e in ranking.entries] == [(1, "kiln"), (2, "glaze")]
    assert ranking.entries[0].score == pytest.approx(0.10)
    assert 0.10 in ranking.entries[0].interval
    assert len(ranking.comparisons) == 1 and ranking.statement
    assert kiln.status("tiles-round").round.closed
    kiln.close()
    glaze.close()
