"""holdout_ledger: a Python client for the holdout-ledger daemon.

The daemon keeps a holdout set's labels sealed, scores the predictions you send, charges each
answer against the holdout's confidence budget and records everything in a hash-chained ledger.
This package talks to it over gRPC (stubs generated from the repository's ``proto/`` when the
package is installed).

Example::

    import pandas as pd
    import holdout_ledger as hl

    client = hl.connect("127.0.0.1:7361", token=open("analyst.token").read())
    preds = pd.DataFrame({"id": ["r-001", "r-002"], "prediction": ["ok", "dent"]})
    client.validate("feedback", preds)                  # checks ids and classes; charges nothing
    print(client.dry_run("feedback", preds))             # what the query would cost
    try:
        answer = client.submit("feedback", preds, note="gbm v3")
        print(answer.symbol, answer.interval, answer.budget.remaining)
    except hl.BudgetRefused as refused:
        print("refused:", refused.reason, refused.message)
"""

from .client import CHUNK_ROWS, DEFAULT_SERVER, Client, connect
from .errors import (
    BudgetRefused,
    HoldoutError,
    InvalidInput,
    NotAuthorized,
    NotFound,
    StateConflict,
    Unreachable,
)
from .types import (
    Answer,
    Budget,
    Comparison,
    Declaration,
    Duplicate,
    DuplicateEntry,
    HistoryEntry,
    HoldoutInfo,
    Interval,
    Leaderboard,
    LeaderboardRow,
    Policy,
    ProbeFlag,
    Proof,
    Quote,
    RankedEntry,
    Ranking,
    Receipt,
    Refusal,
    RoundStatus,
    RoundTeam,
    SealedEntry,
    Status,
    Target,
    Validation,
)

__version__ = "0.5.0"

__all__ = [
    "connect", "Client", "DEFAULT_SERVER", "CHUNK_ROWS",
    "HoldoutError", "BudgetRefused", "InvalidInput", "NotAuthorized", "NotFound",
    "StateConflict", "Unreachable",
    "Answer", "Budget", "Declaration", "HistoryEntry", "HoldoutInfo", "Interval", "Leaderboard",
    "LeaderboardRow", "Policy", "ProbeFlag", "Proof",
    "Quote", "Receipt", "Refusal", "Status", "Target", "Validation",
    "SealedEntry", "RankedEntry", "Comparison", "Ranking", "Duplicate", "DuplicateEntry",
    "RoundStatus", "RoundTeam",
]
