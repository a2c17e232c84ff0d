"""tidegate_client: the retraining job's side of the tidegate release gate.

Post each snapshot's metrics and a sample of its scores, act on the verdict, and ask what
serves::

    from tidegate_client import Client

    with Client("https://tidegate.internal", token=TRAINER_TOKEN) as gate:
        verdict = gate.submit("shelf-ranker", key, sample=frame, metrics={"auc": auc})
        if verdict.serves_now:
            deploy(key)

Depends on httpx and numpy only; pandas, polars and pyarrow samples work when those are
installed (extras ``pandas``, ``polars``, ``arrow``; ``zstd`` for zstd bodies).
"""

from __future__ import annotations

from tidegate_client.client import DEFAULT_URL, Client
from tidegate_client.errors import (
    Conflict,
    Forbidden,
    NotFound,
    Rejected,
    TidegateError,
    Unauthorised,
    Unreachable,
)
from tidegate_client.results import Finding, Serving, Verdict, WaitResult

__version__ = "0.1.0"

__all__ = [
    "DEFAULT_URL",
    "Client",
    "Conflict",
    "Finding",
    "Forbidden",
    "NotFound",
    "Rejected",
    "Serving",
    "TidegateError",
    "Unauthorised",
    "Unreachable",
    "Verdict",
    "WaitResult",
    "__version__",
]
