"""Exceptions raised by the client.

Every exception derives from :class:`HoldoutError` and carries ``exit_code``, the code the
``holdout`` command line uses for the same situation (see "Exit codes" in the repository README),
so a pipeline step written in Python can exit exactly like the CLI would::

    try:
        answer = client.submit("feedback", frame)
    except holdout_ledger.BudgetRefused as refused:
        print(refused.reason, refused.budget.remaining)
        sys.exit(refused.exit_code)          # 3, like `holdout submit`

Refusals are normal replies of the daemon (recorded in the ledger, nothing charged); they are
raised as :class:`BudgetRefused` so that "the holdout said no" can never be mistaken for an answer.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Optional

if TYPE_CHECKING:  # pragma: no cover
    import grpc

    from .types import Budget, Receipt, Refusal


class HoldoutError(Exception):
    """Base class of every error of this package.

    Attributes:
        message: the explanation (for gRPC errors, the daemon's status details, which name the
            offending field or row id).
        code: the gRPC status code when the daemon (or the transport) reported the error, else None.
        exit_code: the ``holdout`` CLI exit code for the same situation.
    """

    exit_code = 1

    def __init__(self, message: str, code: "Optional[grpc.StatusCode]" = None):
        super().__init__(message)
        self.message = message
        self.code = code

    def __str__(self) -> str:
        if self.code is not None:
            return f"{self.message} [{self.code.name}]"
        return self.message


class InvalidInput(HoldoutError, ValueError):
    """Bad input: unknown or missing row ids, an undeclared class, a non-finite number, a bad
    policy. Nothing was charged or recorded. (gRPC INVALID_ARGUMENT / OUT_OF_RANGE; exit code 2.)"""

    exit_code = 2


class NotAuthorized(HoldoutError, PermissionError):
    """A missing, revoked or wrong token (UNAUTHENTICATED), or a role that may not do this
    (PERMISSION_DENIED). Exit code 4. Check ``code`` to tell the two apart."""

    exit_code = 4


class NotFound(HoldoutError, LookupError):
    """Unknown holdout, target or user (gRPC NOT_FOUND; exit code 5)."""

    exit_code = 5


class Unreachable(HoldoutError, ConnectionError):
    """The daemon cannot be reached, or the connection was lost (UNAVAILABLE, DEADLINE_EXCEEDED;
    exit code 6). Whether a lost submission was answered can be checked with ``history`` or by
    retrying with the same ``request_id`` (a replay is never charged twice)."""

    exit_code = 6


class StateConflict(HoldoutError):
    """Not possible in the current state: a closed holdout, a request id reused with other
    predictions, a name that exists (FAILED_PRECONDITION, ALREADY_EXISTS, ABORTED; exit code 7)."""

    exit_code = 7


class BudgetRefused(HoldoutError):
    """The daemon refused to answer; nothing was charged.

    Attributes:
        reason: machine-readable reason: ``"budget-spent"`` (the holdout's budget is used up),
            ``"tolerance"`` (the next interval would be wider than the policy's tolerance),
            ``"quota"`` (daily quota reached), ``"closed"``, ``"max-cost"`` (the query would cost
            more than the ``max_cost`` you gave), ``"shares"`` (no budget share for your team).
        budget: the :class:`~holdout_ledger.types.Budget` at the time of the refusal.
        receipt: the ledger receipt of the refusal (None for a local max-cost refusal).
        refusal: the whole :class:`~holdout_ledger.types.Refusal`.

    ``spent`` is True when the set is used up for you (budget-spent or tolerance): no later
    query can be answered, as opposed to quota or max-cost refusals, which depend on when or how
    you ask.
    """

    exit_code = 3

    def __init__(self, refusal: "Refusal"):
        text = refusal.message
        if not text.startswith("refused"):
            text = f"refused ({refusal.reason}): {text}"
        super().__init__(text)
        self.refusal = refusal
        self.reason: str = refusal.reason
        self.budget: "Budget" = refusal.budget
        self.receipt: "Optional[Receipt]" = refusal.receipt

    @property
    def spent(self) -> bool:
        """True when the holdout cannot answer this caller any more (budget or tolerance)."""
        return self.reason in ("budget-spent", "tolerance")


def from_rpc_error(err: "grpc.RpcError", server: str = "") -> HoldoutError:
    """Maps a gRPC error to the matching exception (the daemon's message is kept verbatim)."""
    import grpc

    code = err.code() if hasattr(err, "code") else None
    details = (err.details() if hasattr(err, "details") else None) or str(err)
    C = grpc.StatusCode
    if code in (C.INVALID_ARGUMENT, C.OUT_OF_RANGE):
        return InvalidInput(details, code)
    if code in (C.UNAUTHENTICATED, C.PERMISSION_DENIED):
        return NotAuthorized(details, code)
    if code == C.NOT_FOUND:
        return NotFound(details, code)
    if code in (C.UNAVAILABLE, C.DEADLINE_EXCEEDED):
        where = f" at {server}" if server else ""
        return Unreachable(f"cannot reach the daemon{where}: {details}", code)
    if code in (C.FAILED_PRECONDITION, C.ALREADY_EXISTS, C.ABORTED):
        return StateConflict(details, code)
    return HoldoutError(details, code)
