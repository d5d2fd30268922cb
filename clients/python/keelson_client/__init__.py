"""Python client of the Keelson service: pandas in, portfolio weights and diagnostics out.

    from keelson_client import Client

    with Client("keelson.internal:50051", token=token) as keelson:
        result = keelson.compute_weights(returns, market="MKT", settings={"max_weight": 0.2})
    result.weights  # a Series by factor

``keelson_client.aio.Client`` is the same client for asyncio. See the package README for
the whole API.
"""

from ._common import RETRYABLE, USER_AGENT, BacktestResult, KeelsonWarning, WeightsResult
from ._version import __version__
from .client import Client
from .errors import (
    Cancelled,
    ClientClosed,
    DeadlineExceeded,
    Infeasible,
    InvalidInput,
    KeelsonError,
    Overloaded,
    ServerError,
    Unauthenticated,
    Unavailable,
    Violation,
)
from .settings import SETTING_NAMES, settings_message

__all__ = [
    "Client",
    "KeelsonError",
    "InvalidInput",
    "Infeasible",
    "Overloaded",
    "Unavailable",
    "DeadlineExceeded",
    "Cancelled",
    "ClientClosed",
    "Unauthenticated",
    "ServerError",
    "Violation",
    "KeelsonWarning",
    "WeightsResult",
    "BacktestResult",
    "RETRYABLE",
    "USER_AGENT",
    "SETTING_NAMES",
    "settings_message",
    "__version__",
]
