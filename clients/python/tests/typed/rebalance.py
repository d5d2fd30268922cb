"""A user's rebalancing script, type-checked with `mypy --strict` by
test_library.py: the client's results must carry their types through."""

import asyncio
import warnings

import pandas as pd

import keelson_client
from keelson_client import Client, Infeasible, KeelsonError, KeelsonWarning, WeightsResult
from keelson_client.aio import Client as AsyncClient


def rebalance(address: str, returns: pd.DataFrame, held: "pd.Series[float]") -> "pd.Series[float]":
    warnings.simplefilter("error", KeelsonWarning)
    with Client(address, timeout=10.0, retry_window=15.0) as keelson:
        try:
            result: WeightsResult = keelson.compute_weights(returns, market="MKT", previous_weights=held,
                                                            settings={"max_weight": 0.2}, timeout=5.0)
        except Infeasible as e:
            limits: list[str] = [v.field for v in e.violations]
            raise SystemExit(f"limits conflict: {', '.join(limits)}") from e
        except KeelsonError as e:
            code: str = e.code.name
            raise SystemExit(f"{code} {e.reason} {e.domain}: {e}") from e
    weights: pd.Series[float] = result.weights
    hedge: float = result.market_weight
    k: object = result.diagnostics.get("numComponents")
    print(k, hedge, result.fingerprint, result.request_id, keelson_client.__version__)
    return weights


async def rebalance_async(address: str, returns: pd.DataFrame) -> float:
    async with AsyncClient(address) as keelson:
        result = await keelson.compute_weights(returns, timeout=5.0)
        backtest = await keelson.run_backtest(returns, window=60, step=12, skip_baselines=True)
    sharpe: pd.Series[float] = backtest.performance["sharpe"]
    return float(sharpe.iloc[0]) + float(result.weights.sum())


if __name__ == "__main__":
    frame = pd.DataFrame({"a": [0.01, 0.02]})
    print(rebalance("localhost:50051", frame, pd.Series({"a": 0.1})))
    print(asyncio.run(rebalance_async("localhost:50051", frame)))
