"""One exception for every failure, with the server's structured details."""

from __future__ import annotations

from typing import Optional

import grpc
from google.rpc import error_details_pb2, status_pb2

_DETAILS_KEY = "grpc-status-details-bin"


class KeelsonError(Exception):
    """A call that failed, or a request refused before it was sent.

    Attributes:
        code: the gRPC status code (``grpc.StatusCode``).
        reason: the stable reason from ``google.rpc.ErrorInfo`` (e.g. ``VALUE_MISSING``,
            ``OVERLOADED``), or ``None``.
        field: the request field at fault (``returns``, ``settings.folds``, ...), or ``None``.
        row, column: zero-based indices into the returns matrix (periods, factors), when
            the error is about one value; for a DataFrame, its ``iloc`` position.
        period, factor: the period label and factor name at fault, when known.
        metadata: every ``ErrorInfo`` metadata entry.
        violations: the ``BadRequest`` field violations as ``(field, description)`` pairs.
        message: the server's message.
    """

    def __init__(
        self,
        code: grpc.StatusCode,
        message: str,
        *,
        reason: Optional[str] = None,
        metadata: Optional[dict] = None,
        violations: Optional[list] = None,
    ):
        self.code = code
        self.message = message
        self.reason = reason
        self.metadata = dict(metadata or {})
        self.violations = list(violations or [])
        self.field = self.metadata.get("field") or (self.violations[0][0] if self.violations else None)
        self.row = _int(self.metadata.get("row"))
        self.column = _int(self.metadata.get("column"))
        self.period = self.metadata.get("period")
        self.factor = self.metadata.get("factor")
        where = ", ".join(f"{k}={v}" for k, v in (("field", self.field), ("row", self.row),
                                                    ("column", self.column)) if v is not None)
        super().__init__(f"{code.name}{f' {reason}' if reason else ''}: {message}{f' ({where})' if where else ''}")

    @classmethod
    def from_rpc_error(cls, error: grpc.RpcError) -> "KeelsonError":
        """Reads the status, ``ErrorInfo`` and ``BadRequest`` of a failed call."""
        code = error.code() if hasattr(error, "code") else grpc.StatusCode.UNKNOWN
        message = error.details() if hasattr(error, "details") else str(error)
        reason, metadata, violations = None, {}, []
        trailers = error.trailing_metadata() if hasattr(error, "trailing_metadata") else None
        for key, value in trailers or ():
            if key != _DETAILS_KEY:
                continue
            status = status_pb2.Status.FromString(value)
            for detail in status.details:
                if detail.Is(error_details_pb2.ErrorInfo.DESCRIPTOR):
                    info = error_details_pb2.ErrorInfo()
                    detail.Unpack(info)
                    reason = info.reason or None
                    metadata.update(info.metadata)
                elif detail.Is(error_details_pb2.BadRequest.DESCRIPTOR):
                    bad = error_details_pb2.BadRequest()
                    detail.Unpack(bad)
                    violations.extend((v.field, v.description) for v in bad.field_violations)
        return cls(code or grpc.StatusCode.UNKNOWN, message or "", reason=reason, metadata=metadata,
                   violations=violations)


def _int(value) -> Optional[int]:
    try:
        return int(value) if value not in (None, "") else None
    except (TypeError, ValueError):
        return None
