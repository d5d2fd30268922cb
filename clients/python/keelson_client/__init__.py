"""Python client of the Keelson service: pandas in, portfolio weights and diagnostics out.

    from keelson_client import Client

    with Client("keelson.internal:50051", token=token) as keelson:
        result = keelson.compute_weights(returns, market="MKT", settings={"max_weight": 0.2})
    result.weights  # a Series by factor

See the package README for the whole API.
"""

from .client import RETRYABLE, BacktestResult, Client, WeightsResult
from .errors import KeelsonError
from .settings import SETTING_NAMES, settings_message

__all__ = [
    "Client",
    "KeelsonError",
    "WeightsResult",
    "BacktestResult",
    "RETRYABLE",
    "SETTING_NAMES",
    "settings_message",
]
__version__ = "0.1.0"
