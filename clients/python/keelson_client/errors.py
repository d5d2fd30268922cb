"""Every failure is a :class:`KeelsonError`, with a subclass per kind of failure
and the server's structured details (``ErrorInfo``, ``BadRequest``,
``PreconditionFailure``) as attributes. Errors pickle, so that
multiprocessing, joblib and dask can pass them between processes."""

from __future__ import annotations

from typing import Any, Dict, Iterable, List, NamedTuple, Optional, Tuple, Type, cast

import grpc
from google.rpc import error_details_pb2, status_pb2

_DETAILS_KEY = "grpc-status-details-bin"


class Violation(NamedTuple):
    """One field or precondition at fault: the request field (``settings.max_turnover``,
    ``returns.values[12]``) and what is wrong with it."""

    field: str
    description: str


class KeelsonError(Exception):
    """A call that failed, or a request refused before it was sent.

    Attributes:
        code: the gRPC status code (``grpc.StatusCode``).
        message: the server's (or the client's) message.
        reason: the stable reason from ``google.rpc.ErrorInfo`` (e.g. ``VALUE_MISSING``,
            ``OVERLOADED``), or ``None``.
        domain: the ``ErrorInfo`` domain (``keelson.v1`` for the service's own errors,
            ``keelson.client`` for refusals before sending), or ``None``.
        metadata: every ``ErrorInfo`` metadata entry.
        violations: the ``BadRequest`` field violations and ``PreconditionFailure``
            violations, as :class:`Violation` tuples.
        field: the request field at fault (``returns``, ``settings.folds``, ...), or ``None``.
        row, column: zero-based indices into the returns matrix (periods, factors), when
            the error is about one value; for a DataFrame, its ``iloc`` position.
        period, factor: the period label and factor name at fault, when known.
    """

    #: The status codes this class stands for (the base class: any).
    codes: Tuple[grpc.StatusCode, ...] = ()

    def __init__(
        self,
        code: grpc.StatusCode,
        message: str,
        *,
        reason: Optional[str] = None,
        domain: Optional[str] = None,
        metadata: Optional[Dict[str, str]] = None,
        violations: Optional[List[Violation]] = None,
    ) -> None:
        self.code = code
        self.message = message
        self.reason = reason
        self.domain = domain
        self.metadata: Dict[str, str] = dict(metadata or {})
        self.violations: List[Violation] = [Violation(*v) for v in (violations or [])]
        self.field: Optional[str] = self.metadata.get("field") or (
            self.violations[0].field if self.violations else None)
        self.row = _int(self.metadata.get("row"))
        self.column = _int(self.metadata.get("column"))
        self.period: Optional[str] = self.metadata.get("period")
        self.factor: Optional[str] = self.metadata.get("factor")
        super().__init__(message)

    def __str__(self) -> str:
        where = ", ".join(f"{k}={v}" for k, v in (("field", self.field), ("row", self.row),
                                                    ("column", self.column)) if v is not None)
        return f"{self.message} ({where})" if where else self.message

    def __repr__(self) -> str:
        return f"{type(self).__name__}(code={self.code.name}, reason={self.reason!r}, message={self.message!r})"

    def __reduce__(self) -> Tuple[Any, ...]:
        return (_rebuild, (type(self), self.code.name, self.message, self.reason, self.domain,
                           self.metadata, [tuple(v) for v in self.violations]))

    @classmethod
    def of(
        cls,
        code: grpc.StatusCode,
        message: str,
        *,
        reason: Optional[str] = None,
        domain: Optional[str] = None,
        metadata: Optional[Dict[str, str]] = None,
        violations: Optional[List[Violation]] = None,
    ) -> "KeelsonError":
        """The error of the subclass that stands for ``code``."""
        kind = _BY_CODE.get(code, KeelsonError)
        return kind(code, message, reason=reason, domain=domain, metadata=metadata, violations=violations)

    @classmethod
    def from_rpc_error(cls, error: grpc.RpcError) -> "KeelsonError":
        """Reads the status, ``ErrorInfo``, ``BadRequest`` and ``PreconditionFailure``
        of a failed call."""
        code = error.code() if hasattr(error, "code") else grpc.StatusCode.UNKNOWN
        message = error.details() if hasattr(error, "details") else str(error)
        reason: Optional[str] = None
        domain: Optional[str] = None
        metadata: Dict[str, str] = {}
        violations: List[Violation] = []
        trailers = error.trailing_metadata() if hasattr(error, "trailing_metadata") else None
        # (key, value) pairs: named tuples from grpc, plain tuples from grpc.aio.
        for item in cast(Iterable[Tuple[str, Any]], trailers or ()):
            key, value = item
            if key != _DETAILS_KEY:
                continue
            status = status_pb2.Status.FromString(value)
            for detail in status.details:
                if detail.Is(error_details_pb2.ErrorInfo.DESCRIPTOR):
                    info = error_details_pb2.ErrorInfo()
                    detail.Unpack(info)
                    reason = info.reason or None
                    domain = info.domain or None
                    metadata.update(info.metadata)
                elif detail.Is(error_details_pb2.BadRequest.DESCRIPTOR):
                    bad = error_details_pb2.BadRequest()
                    detail.Unpack(bad)
                    violations.extend(Violation(v.field, v.description) for v in bad.field_violations)
                elif detail.Is(error_details_pb2.PreconditionFailure.DESCRIPTOR):
                    failure = error_details_pb2.PreconditionFailure()
                    detail.Unpack(failure)
                    violations.extend(Violation(v.subject, v.description) for v in failure.violations)
        return cls.of(code or grpc.StatusCode.UNKNOWN, message or "", reason=reason, domain=domain,
                      metadata=metadata, violations=violations)


class InvalidInput(KeelsonError, ValueError):
    """The request as sent cannot be served: a bad value, shape, setting or size
    (``INVALID_ARGUMENT``, ``OUT_OF_RANGE``). Also a ``ValueError``."""

    codes = (grpc.StatusCode.INVALID_ARGUMENT, grpc.StatusCode.OUT_OF_RANGE)


class Infeasible(KeelsonError):
    """The data or the limits admit no portfolio (``FAILED_PRECONDITION``): infeasible
    limits (``violations`` names them), no finite cross-validation score, a degenerate
    portfolio."""

    codes = (grpc.StatusCode.FAILED_PRECONDITION,)


class Overloaded(KeelsonError):
    """The server shed the call or the request is over its budget (``RESOURCE_EXHAUSTED``)."""

    codes = (grpc.StatusCode.RESOURCE_EXHAUSTED,)


class Unavailable(KeelsonError):
    """The server could not be reached or was restarting (``UNAVAILABLE``)."""

    codes = (grpc.StatusCode.UNAVAILABLE,)


class DeadlineExceeded(KeelsonError):
    """The call's deadline passed, retries included (``DEADLINE_EXCEEDED``)."""

    codes = (grpc.StatusCode.DEADLINE_EXCEEDED,)


class Cancelled(KeelsonError):
    """The call was cancelled (``CANCELLED``), or the client was closed before it."""

    codes = (grpc.StatusCode.CANCELLED,)


class Unauthenticated(KeelsonError):
    """The token is missing or wrong (``UNAUTHENTICATED``, ``PERMISSION_DENIED``)."""

    codes = (grpc.StatusCode.UNAUTHENTICATED, grpc.StatusCode.PERMISSION_DENIED)


class ServerError(KeelsonError):
    """The server failed (``INTERNAL``, ``UNKNOWN``, ``UNIMPLEMENTED``, ``DATA_LOSS``):
    report it with the request id."""

    codes = (grpc.StatusCode.INTERNAL, grpc.StatusCode.UNKNOWN, grpc.StatusCode.UNIMPLEMENTED,
             grpc.StatusCode.DATA_LOSS)


class ClientClosed(Cancelled):
    """A call on a client after :meth:`Client.close`."""


_BY_CODE: Dict[grpc.StatusCode, Type[KeelsonError]] = {
    code: kind
    for kind in (InvalidInput, Infeasible, Overloaded, Unavailable, DeadlineExceeded, Cancelled, Unauthenticated,
                 ServerError)
    for code in kind.codes
}

#: The domain of errors raised by the client before anything is sent.
CLIENT_DOMAIN = "keelson.client"


def invalid(field: str, message: str, reason: str = "INVALID_INPUT", **metadata: object) -> InvalidInput:
    """A request refused by the client before sending, naming the field."""
    meta = {"field": field, **{k: str(v) for k, v in metadata.items() if v is not None}}
    return InvalidInput(grpc.StatusCode.INVALID_ARGUMENT, message, reason=reason, domain=CLIENT_DOMAIN,
                        metadata=meta)


def _rebuild(kind: Type[KeelsonError], code: str, message: str, reason: Optional[str], domain: Optional[str],
             metadata: Dict[str, str], violations: List[Tuple[Any, ...]]) -> KeelsonError:
    return kind(grpc.StatusCode[code], message, reason=reason, domain=domain, metadata=metadata,
                violations=[Violation(*v) for v in violations])


def _int(value: Optional[str]) -> Optional[int]:
    try:
        return int(value) if value not in (None, "") else None
    except (TypeError, ValueError):
        return None
