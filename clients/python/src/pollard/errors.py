"""What can go wrong, as exception types.

Every failed call raises a subclass of `CallError` named after its gRPC status (`NotFound`,
`InvalidArgument`, ...), with the server's message; the mapping is `from_rpc_error`, the one
place a `grpc.RpcError` becomes one of ours. Mistakes caught before any call is made raise
`UsageError`; a run that ended without finishing raises `RunFailed` or `RunCancelled` from
`Client.wait`; a feature that needs an optional package raises `MissingExtra`.
"""

from __future__ import annotations

from typing import Dict, Optional, Type

import grpc


class PollardError(Exception):
    """Base of every error this package raises."""


class UsageError(PollardError, ValueError):
    """An argument the client refuses before calling the server."""


class MissingExtra(PollardError, ImportError):
    """A feature needs an optional package that is not installed."""

    def __init__(self, package: str, extra: str, feature: str) -> None:
        super().__init__(f"{feature} needs {package}: pip install 'pollard-client[{extra}]'")
        self.package = package
        self.extra = extra


class RunEnded(PollardError):
    """A run ended without finishing (see `RunFailed`, `RunCancelled`)."""

    def __init__(self, run_id: str, reason: str) -> None:
        super().__init__(f"run {run_id} {self.verb}: {reason}" if reason else f"run {run_id} {self.verb}")
        self.run_id = run_id
        self.reason = reason

    verb = "ended"


class RunFailed(RunEnded):
    verb = "failed"


class RunCancelled(RunEnded):
    verb = "was cancelled"


class CallError(PollardError):
    """A call the server (or the channel) answered with a status other than OK."""

    #: The gRPC status name, such as "NOT_FOUND".
    status: str = "UNKNOWN"

    def __init__(self, message: str, status: Optional[str] = None) -> None:
        super().__init__(message)
        self.message = message
        if status is not None:
            self.status = status

    def __str__(self) -> str:
        return f"{self.status}: {self.message}"


class CallCancelled(CallError):
    status = "CANCELLED"


class InvalidArgument(CallError):
    status = "INVALID_ARGUMENT"


class DeadlineExceeded(CallError):
    status = "DEADLINE_EXCEEDED"


class NotFound(CallError):
    status = "NOT_FOUND"


class AlreadyExists(CallError):
    status = "ALREADY_EXISTS"


class PermissionDenied(CallError):
    status = "PERMISSION_DENIED"


class ResourceExhausted(CallError):
    status = "RESOURCE_EXHAUSTED"


class FailedPrecondition(CallError):
    status = "FAILED_PRECONDITION"


class Internal(CallError):
    status = "INTERNAL"


class Unavailable(CallError):
    status = "UNAVAILABLE"


class Unauthenticated(CallError):
    status = "UNAUTHENTICATED"


_BY_CODE: Dict[grpc.StatusCode, Type[CallError]] = {
    grpc.StatusCode.CANCELLED: CallCancelled,
    grpc.StatusCode.INVALID_ARGUMENT: InvalidArgument,
    grpc.StatusCode.DEADLINE_EXCEEDED: DeadlineExceeded,
    grpc.StatusCode.NOT_FOUND: NotFound,
    grpc.StatusCode.ALREADY_EXISTS: AlreadyExists,
    grpc.StatusCode.PERMISSION_DENIED: PermissionDenied,
    grpc.StatusCode.RESOURCE_EXHAUSTED: ResourceExhausted,
    grpc.StatusCode.FAILED_PRECONDITION: FailedPrecondition,
    grpc.StatusCode.INTERNAL: Internal,
    grpc.StatusCode.UNAVAILABLE: Unavailable,
    grpc.StatusCode.UNAUTHENTICATED: Unauthenticated,
}


def from_rpc_error(e: grpc.RpcError) -> CallError:
    """The `CallError` of a failed call: its class by status, the server's message."""
    code = e.code() if hasattr(e, "code") else None
    details = (e.details() if hasattr(e, "details") else None) or str(e)
    cls = _BY_CODE.get(code, CallError)
    name = code.name if isinstance(code, grpc.StatusCode) else "UNKNOWN"
    return cls(details, None if cls is not CallError else name)
