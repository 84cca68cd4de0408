"""Typed results: plain frozen dataclasses mirroring the messages of proto/holdout/v1.

Field names and meanings are those of the proto (see its comments); proto ``optional`` fields
that are absent become ``None``. Probabilities (``delta``, ``spent``, ``remaining``,
``delta_i``) are failure probabilities; levels are carried in nats, ``level_nats = ln(1/d)``.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Optional, Tuple


@dataclass(frozen=True)
class Interval:
    """A closed interval ``[lower, upper]`` for a mean loss in [0, 1]."""

    lower: float
    upper: float

    @property
    def half_width(self) -> float:
        """Half the interval's width."""
        return (self.upper - self.lower) / 2.0

    def __contains__(self, x: float) -> bool:
        return self.lower <= x <= self.upper

    def scaled(self, bound: float) -> "Interval":
        """This interval multiplied by ``bound``, converted outward: each limit is stepped one
        ulp out whenever the product's rounding moved it inward, so the result contains the
        exact product (as the command line and web view convert regression answers)."""
        from fractions import Fraction

        lo, hi = self.lower * bound, self.upper * bound
        if Fraction(lo) > Fraction(self.lower) * Fraction(bound):
            lo = math.nextafter(lo, -math.inf)
        if Fraction(hi) < Fraction(self.upper) * Fraction(bound):
            hi = math.nextafter(hi, math.inf)
        return Interval(lo, hi)


@dataclass(frozen=True)
class Budget:
    """Budget position of a holdout (per team under the ``isolated`` sharing assumption)."""

    delta: float
    spent: float
    remaining: float
    transcript_nats: float
    next_half_width: float
    #: None when unbounded (the daemon's forecast saturates); never a sentinel integer.
    queries_left: Optional[int]
    answered: int
    refused: int
    open: bool
    quota_resets_at: str
    quota_left_today: int


@dataclass(frozen=True)
class Receipt:
    """Proof that an answer (or refusal) is in the ledger; keep it to check against an export.

    It names the entry by its hash and the team's own query number (0 for a refusal); it never
    carries the entry's salt or its position in the ledger.
    """

    holdout: str
    query: int
    entry_hash: str


@dataclass(frozen=True)
class Proof:
    """A signed checkpoint of a holdout's ledger tree, and proofs against it.

    ``checkpoint`` is the signed note (text); ``inclusion_proof`` and ``consistency_proof``
    are JSON texts (or None when not asked); ``verifier_key`` names the daemon's Ed25519 key.
    Check them offline with :mod:`holdout_ledger.verify`.
    """

    checkpoint: str
    inclusion_proof: Optional[str]
    consistency_proof: Optional[str]
    verifier_key: str

    @property
    def checkpoint_size(self) -> int:
        """The tree size the checkpoint signs (its second line)."""
        return int(self.checkpoint.split("\n")[1])


@dataclass(frozen=True)
class Answer:
    """The released answer to one query.

    ``symbol`` is what the answer rule released (``"0.13"``, ``"pass"``, ``"fail"``, ...);
    ``score`` the released grid value when the rule releases one; ``interval`` is computed from
    the symbol alone and holds simultaneously with every other interval of the holdout.
    """

    query: int
    symbol: str
    score: Optional[float]
    interval: Interval
    delta_i: float
    level_nats: float
    code_nats: float
    budget: Budget
    receipt: Receipt
    guarantee: str
    statement: str
    best_model: Optional[int]
    replayed: bool
    digest: str
    target: str
    #: A regression target's interval in its own units (``interval`` times the metric's bound,
    #: converted outward); None for other targets. ``score_units`` likewise for ``score``.
    units: Optional[Interval] = None
    score_units: Optional[float] = None

    @property
    def level(self) -> float:
        """The failure probability d_i = exp(-level_nats) this answer's interval was built at
        (underflows to 0.0 after long transcripts; use ``level_nats`` then)."""
        return math.exp(-self.level_nats)


@dataclass(frozen=True)
class Refusal:
    """A refusal (recorded in the ledger unless local, charges nothing)."""

    reason: str
    message: str
    budget: Budget
    receipt: Optional[Receipt]


@dataclass(frozen=True)
class Quote:
    """What a query would cost (a dry run): nothing was scored, charged or recorded.

    ``would_refuse`` is the refusal reason if the query would be refused, else ``""``.
    """

    query: int
    delta_i: float
    level_nats: float
    half_width: float
    worst_code_nats: float
    would_refuse: str
    budget: Budget


@dataclass(frozen=True)
class Validation:
    """Predictions matched the public declaration: rows read per model, and the digest of the
    parsed predictions (the same digest an answer to these predictions will carry)."""

    rows: int
    digest: str


@dataclass(frozen=True)
class Target:
    """A label column of a holdout, its metric, interval method and public label domain."""

    name: str
    column: str
    metric: str
    method: str
    classes: Tuple[str, ...]

    @property
    def uses_classes(self) -> bool:
        """True when predictions are class names (metric ``error``), False for numbers."""
        return self.metric.split(":", 1)[0] == "error"

    @property
    def bound(self) -> Optional[float]:
        """The bound ``B`` of a regression metric (``abs_error:B``, ``sq_error:B``): its
        answers are released on [0, 1] as the mean loss (each row capped at ``B``) divided by
        ``B``. None for metrics already on the reader's scale (error, brier, log_loss)."""
        name, _, b = self.metric.partition(":")
        if name not in ("abs_error", "sq_error"):
            return None
        try:
            value = float(b)
        except ValueError:
            return None
        return value if math.isfinite(value) and value > 0 else None

    @property
    def measure(self) -> str:
        """What the target's own units measure (``"mean absolute error"``...); empty for
        metrics without a bound."""
        return {"abs_error": "mean absolute error", "sq_error": "mean squared error"}.get(
            self.metric.split(":", 1)[0], "") if self.bound is not None else ""


@dataclass(frozen=True)
class Policy:
    """A holdout's policy, fixed at creation."""

    delta: float
    schedule: str
    answers: str
    tolerance: float
    sharing: str
    tolerance_reference: str
    shares: str
    daily_quota: int
    canonical_json: str


@dataclass(frozen=True)
class RoundTeam:
    """One team's entries on one target of a sealed round: how many, and which one the close
    ranks (``selected``, a query number as its reply, receipt and history give it: the team's
    latest marked entry, else its latest; ``marked`` says which). Nothing about a score."""

    team: str
    target: str
    entries: int
    selected: int
    marked: bool


@dataclass(frozen=True)
class RoundStatus:
    """A sealed round's entries per team. ``not_submitted`` names the declared (roster) teams
    without an entry; under ``isolated`` an analyst sees its own team only
    (``own_team_only``) and not who else has entered."""

    teams: Tuple[RoundTeam, ...]
    not_submitted: Tuple[str, ...]
    closed: bool
    own_team_only: bool


@dataclass(frozen=True)
class ProbeFlag:
    """A team flagged for heavy probing (``kind``: ``transcript-share`` or
    ``near-duplicates``), with what was seen in words."""

    team: str
    kind: str
    detail: str


@dataclass(frozen=True)
class Status:
    """Budget position of a holdout as the caller may see it; for a sealed round also its
    entries per team (``round``, None for other holdouts)."""

    holdout: str
    budget: Budget
    guarantee: str
    policy: Policy
    round: Optional[RoundStatus] = None
    flags: Tuple[ProbeFlag, ...] = field(default_factory=tuple)
    #: Under per-team shares, whose share ``budget`` is (empty: the holdout's one pool).
    budget_of: str = ""
    #: True when the caller's team has no share: ``budget`` then describes no pool.
    no_share: bool = False


@dataclass(frozen=True)
class HoldoutInfo:
    """Public facts of a holdout."""

    name: str
    description: str
    rows: int
    policy: Policy
    targets: Tuple[Target, ...]
    created_at: str
    open: bool
    budget: Budget
    genesis_hash: str
    guarantee: str
    #: When it was withdrawn (RFC 3339; empty: not withdrawn).
    withdrawn_at: str = ""
    #: A withdrawal request waiting for the other role, in words (empty: none).
    withdrawal_pending: str = ""


@dataclass(frozen=True)
class HistoryEntry:
    """One released event: ``kind`` is ``"answer"`` (``answer`` set) or ``"refusal"``
    (``refusal`` set). ``exact_scores`` is filled only for ``history(..., exact=True)`` by a role
    allowed to read exact scores (auditor; organizer once the holdout is closed). ``entry`` is the
    row's number in the history the caller sees (from 1), ``entry_hash`` names the ledger entry."""

    entry: int
    kind: str
    team: str
    at: str
    answer: Optional[Answer]
    refusal: Optional[Refusal]
    note: str
    exact_scores: Tuple[float, ...] = field(default_factory=tuple)
    entry_hash: str = ""


@dataclass(frozen=True)
class Declaration:
    """The public declaration of a holdout: its targets and row ids, in the holdout's order."""

    targets: Tuple[Target, ...]
    ids: Tuple[str, ...]


@dataclass(frozen=True)
class LeaderboardRow:
    """One team's row. On a ladder (``Leaderboard.kind == "ladder"``): ``best`` is the team's
    shown best on the grid (None before its first release), ``interval`` covers the smallest
    true error among the team's submissions. Best per team (every other rule): the team's
    released answer with the lowest upper limit on ``target``, its score (``best``), interval
    and query number (``query``); ``rank`` counts within the target."""

    rank: int
    team: str
    best: Optional[float]
    interval: Interval
    submissions: int
    improvements: int
    best_at: str
    target: str = ""
    query: int = 0
    #: For a regression target, ``interval`` and ``best`` in the target's own units.
    units: Optional[Interval] = None
    best_units: Optional[float] = None


@dataclass(frozen=True)
class Leaderboard:
    """Each team's best, ranked: a ladder leaderboard (``kind == "ladder"``) or, under every
    other rule, the best per team (``kind == "best-per-team"``). ``own_team_only`` is True
    when the policy shows the full board to organizers only and the caller sees just its
    team's row."""

    holdout: str
    target: str
    rows: Tuple[LeaderboardRow, ...]
    statement: str
    guarantee: str
    own_team_only: bool
    kind: str = "ladder"


@dataclass(frozen=True)
class SealedEntry:
    """The receipt of a sealed entry (``submit(..., final=True)`` or any entry of a sealed
    round): nothing about its score until the round closes. ``query`` is its number as its
    receipt and history give it; ``marked`` whether it is the team's selected entry."""

    query: int
    ticket: int
    target: str
    delta_i: float
    level_nats: float
    receipt: Receipt
    digest: str
    marked: bool
    closes_at: str
    statement: str
    guarantee: str
    replayed: bool


@dataclass(frozen=True)
class RankedEntry:
    """One entry of a closed round's ranking (ranks count within ``target``)."""

    rank: int
    team: str
    ticket: int
    score: Optional[float]
    interval: Interval
    digest: str
    target: str
    query: int = 0  # as its reply, receipt and history number it
    #: For a regression target, ``interval`` and ``score`` in the target's own units.
    units: Optional[Interval] = None
    score_units: Optional[float] = None


@dataclass(frozen=True)
class Comparison:
    """The paired comparison of two neighbours (by ticket): ``difference`` is an interval for
    R(ahead) - R(behind); ``distinguishable`` when it excludes 0."""

    ahead: int
    behind: int
    difference: Interval
    level_nats: float
    distinguishable: bool
    target: str
    #: For a regression target, ``difference`` in the target's own units.
    units: Optional[Interval] = None


@dataclass(frozen=True)
class Ranking:
    """A closed sealed round's ranking with the comparisons between neighbours."""

    holdout: str
    closed_at: str
    trigger: str
    entries: Tuple[RankedEntry, ...]
    comparisons: Tuple[Comparison, ...]
    statement: str
    guarantee: str


@dataclass(frozen=True)
class DuplicateEntry:
    """One ledger entry carrying a duplicated prediction digest."""

    entry: int
    team: str
    user: str


@dataclass(frozen=True)
class Duplicate:
    """A prediction digest submitted by more than one team."""

    digest: str
    teams: Tuple[str, ...]
    entries: Tuple[DuplicateEntry, ...]


# -- conversions from the generated protobuf messages -------------------------------------------


def _budget(m) -> Budget:
    return Budget(
        delta=m.delta,
        spent=m.spent,
        remaining=m.remaining,
        transcript_nats=m.transcript_nats,
        next_half_width=m.next_half_width,
        queries_left=None if m.queries_left == 2**64 - 1 else m.queries_left,
        answered=m.answered,
        refused=m.refused,
        open=m.open,
        quota_resets_at=m.quota_resets_at,
        quota_left_today=m.quota_left_today,
    )


def _receipt(m) -> Receipt:
    return Receipt(holdout=m.holdout, query=m.query, entry_hash=m.entry_hash)


def _answer(m) -> Answer:
    return Answer(
        query=m.query,
        symbol=m.symbol,
        score=m.score if m.HasField("score") else None,
        interval=Interval(m.interval.lower, m.interval.upper),
        delta_i=m.delta_i,
        level_nats=m.level_nats,
        code_nats=m.code_nats,
        budget=_budget(m.budget),
        receipt=_receipt(m.receipt),
        guarantee=m.guarantee,
        statement=m.statement,
        best_model=m.best_model if m.HasField("best_model") else None,
        replayed=m.replayed,
        digest=m.digest,
        target=m.target,
    )


def _refusal(m) -> Refusal:
    has_receipt = m.HasField("receipt") and bool(m.receipt.entry_hash)
    return Refusal(
        reason=m.reason,
        message=m.message,
        budget=_budget(m.budget),
        receipt=_receipt(m.receipt) if has_receipt else None,
    )


def _quote(m) -> Quote:
    return Quote(
        query=m.query,
        delta_i=m.delta_i,
        level_nats=m.level_nats,
        half_width=m.half_width,
        worst_code_nats=m.worst_code_nats,
        would_refuse=m.would_refuse,
        budget=_budget(m.budget),
    )


def _target(m) -> Target:
    return Target(
        name=m.name, column=m.column, metric=m.metric, method=m.method, classes=tuple(m.classes)
    )


def _policy(m) -> Policy:
    return Policy(
        delta=m.delta,
        schedule=m.schedule,
        answers=m.answers,
        tolerance=m.tolerance,
        sharing=m.sharing,
        tolerance_reference=m.tolerance_reference,
        shares=m.shares,
        daily_quota=m.daily_quota,
        canonical_json=m.canonical_json,
    )


def _holdout_info(m) -> HoldoutInfo:
    return HoldoutInfo(
        name=m.name,
        description=m.description,
        rows=m.rows,
        policy=_policy(m.policy),
        targets=tuple(_target(t) for t in m.targets),
        created_at=m.created_at,
        open=m.open,
        budget=_budget(m.budget),
        genesis_hash=m.genesis_hash,
        guarantee=m.guarantee,
        withdrawn_at=m.withdrawn_at,
        withdrawal_pending=m.withdrawal_pending,
    )


def _status(m) -> Status:
    round_ = None
    if m.HasField("round"):
        round_ = RoundStatus(
            teams=tuple(
                RoundTeam(team=t.team, target=t.target, entries=t.entries, selected=t.selected,
                          marked=t.marked)
                for t in m.round.teams
            ),
            not_submitted=tuple(m.round.not_submitted),
            closed=m.round.closed,
            own_team_only=m.round.own_team_only,
        )
    return Status(
        holdout=m.holdout, budget=_budget(m.budget), guarantee=m.guarantee,
        policy=_policy(m.policy), round=round_, budget_of=m.budget_of, no_share=m.no_share,
        flags=tuple(ProbeFlag(team=f.team, kind=f.kind, detail=f.detail) for f in m.flags),
    )


def _sealed(m) -> SealedEntry:
    return SealedEntry(
        query=m.query,
        ticket=m.ticket,
        target=m.target,
        delta_i=m.delta_i,
        level_nats=m.level_nats,
        receipt=_receipt(m.receipt),
        digest=m.digest,
        marked=m.marked,
        closes_at=m.closes_at,
        statement=m.statement,
        guarantee=m.guarantee,
        replayed=m.replayed,
    )


def _ranking(m) -> Ranking:
    return Ranking(
        holdout=m.holdout,
        closed_at=m.closed_at,
        trigger=m.trigger,
        entries=tuple(
            RankedEntry(
                rank=e.rank, team=e.team, ticket=e.ticket,
                score=e.score if e.HasField("score") else None,
                interval=Interval(e.interval.lower, e.interval.upper), digest=e.digest,
                target=e.target, query=e.query,
            )
            for e in m.entries
        ),
        comparisons=tuple(
            Comparison(
                ahead=c.ahead, behind=c.behind,
                difference=Interval(c.difference.lower, c.difference.upper),
                level_nats=c.level_nats, distinguishable=c.distinguishable, target=c.target,
            )
            for c in m.comparisons
        ),
        statement=m.statement,
        guarantee=m.guarantee,
    )


def _duplicates(m) -> Tuple[Duplicate, ...]:
    return tuple(
        Duplicate(
            digest=d.digest,
            teams=tuple(d.teams),
            entries=tuple(DuplicateEntry(entry=e.entry, team=e.team, user=e.user)
                          for e in d.entries),
        )
        for d in m.duplicates
    )


def _history_entry(m) -> HistoryEntry:
    return HistoryEntry(
        entry=m.entry,
        kind=m.kind,
        team=m.team,
        at=m.at,
        answer=_answer(m.answer) if m.HasField("answer") else None,
        refusal=_refusal(m.refusal) if m.HasField("refusal") else None,
        note=m.note,
        exact_scores=tuple(m.exact_scores),
        entry_hash=m.entry_hash,
    )


def _leaderboard(m) -> Leaderboard:
    return Leaderboard(
        holdout=m.holdout,
        target=m.target,
        rows=tuple(
            LeaderboardRow(
                rank=r.rank,
                team=r.team,
                best=r.best if r.HasField("best") else None,
                interval=Interval(r.interval.lower, r.interval.upper),
                submissions=r.submissions,
                improvements=r.improvements,
                best_at=r.best_at,
                target=r.target,
                query=r.query,
            )
            for r in m.rows
        ),
        statement=m.statement,
        guarantee=m.guarantee,
        own_team_only=m.own_team_only,
        kind=m.kind or "ladder",
    )


def _bounds(targets) -> dict:
    """Each regression target's bound, by name (with ``""`` for a holdout's only target)."""
    out = {t.name: t.bound for t in targets if t.bound is not None}
    if len(targets) == 1 and targets[0].bound is not None:
        out[""] = targets[0].bound
    return out


def _in_units(x, bounds: dict):
    """``x`` (an Answer, LeaderboardRow, RankedEntry, Comparison, HistoryEntry, Leaderboard
    or Ranking) with its ``units`` fields filled for regression targets."""
    from dataclasses import replace

    if isinstance(x, Leaderboard):
        return replace(x, rows=tuple(_in_units(r, bounds) for r in x.rows))
    if isinstance(x, Ranking):
        return replace(x, entries=tuple(_in_units(e, bounds) for e in x.entries),
                       comparisons=tuple(_in_units(c, bounds) for c in x.comparisons))
    if isinstance(x, HistoryEntry):
        return replace(x, answer=_in_units(x.answer, bounds)) if x.answer else x
    b = bounds.get(getattr(x, "target", ""))
    if b is None:
        return x
    if isinstance(x, Comparison):
        return replace(x, units=x.difference.scaled(b))
    if isinstance(x, LeaderboardRow):
        return replace(x, units=x.interval.scaled(b),
                       best_units=None if x.best is None else x.best * b)
    if isinstance(x, (Answer, RankedEntry)):
        return replace(x, units=x.interval.scaled(b),
                       score_units=None if x.score is None else x.score * b)
    return x
