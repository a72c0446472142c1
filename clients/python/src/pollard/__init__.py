"""The Python client of pollard, the service that tunes decision-tree complexity limits by
cross-validated sweeps.

    import pollard

    with pollard.connect("127.0.0.1:7311") as client:
        iris = client.upload("iris.csv", target="target")
        run = client.sweep(iris, max_depth=range(1, 9), min_leaf_rows=[1, 5, 10], folds=5)
        run = client.wait(run, progress=True)
        best = run.picked_score

The generated gRPC modules are in `pollard.v1` for anything the helpers do not cover.
"""

from ._convert import LogSpan, Span, log_span, span
from .client import DEFAULT_SERVER, Client, connect
from .errors import (
    AlreadyExists,
    CallCancelled,
    CallError,
    DeadlineExceeded,
    FailedPrecondition,
    Internal,
    InvalidArgument,
    MissingExtra,
    NotFound,
    PermissionDenied,
    PollardError,
    ResourceExhausted,
    RunCancelled,
    RunEnded,
    RunFailed,
    Unauthenticated,
    Unavailable,
    UsageError,
)
from .types import Cancelled, Column, Dataset, Decision, Event, Failed, Finished, ModelFormat, Nested, OuterFold, Predictions, Progress, Run, RunState, Score, Scored

__all__ = [
    "AlreadyExists", "CallCancelled", "CallError", "Cancelled", "Client", "Column", "DEFAULT_SERVER", "Dataset",
    "DeadlineExceeded", "Decision", "Event", "Failed", "FailedPrecondition", "Finished", "Internal", "InvalidArgument", "LogSpan",
    "MissingExtra", "ModelFormat", "Nested", "NotFound", "OuterFold", "PermissionDenied", "PollardError", "Predictions", "Progress",
    "ResourceExhausted", "Run", "RunCancelled", "RunEnded", "RunFailed", "RunState", "Score", "Scored", "Span",
    "Unauthenticated", "Unavailable", "UsageError", "connect", "log_span", "span",
]
