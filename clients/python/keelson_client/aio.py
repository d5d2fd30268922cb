"""The asyncio Keelson client, on ``grpc.aio``: the methods of
:class:`keelson_client.Client`, awaited.

    from keelson_client.aio import Client

    async with Client("keelson.internal:50051", token=token) as keelson:
        result = await keelson.compute_weights(returns, market="MKT")
"""

from __future__ import annotations

import asyncio
import time
from typing import Any, Dict, Iterable, List, Optional, Sequence, Tuple

import grpc
import grpc.aio
import pandas as pd

from . import _common as c
from ._common import BacktestResult, WeightsResult
from ._proto import weights_pb2 as pb
from .errors import KeelsonError

__all__ = ["Client"]


class Client(c.ClientBase):
    """An asyncio connection to a Keelson server, with the options, deadlines, retries,
    request ids and warnings of :class:`keelson_client.Client`. Create it inside a
    running event loop; use ``async with`` or ``await client.close()``."""

    def _secure_channel(self, target: str, creds: grpc.ChannelCredentials, options: List[Tuple[str, Any]]) -> Any:
        return grpc.aio.secure_channel(target, creds, options=options)

    def _insecure_channel(self, target: str, options: List[Tuple[str, Any]]) -> Any:
        return grpc.aio.insecure_channel(target, options=options)

    async def __aenter__(self) -> "Client":
        return self

    async def __aexit__(self, *exc: object) -> None:
        await self.close()

    async def close(self) -> None:
        """Closes the channel; later calls raise :class:`ClientClosed`."""
        self._closed = True
        await self._channel.close(None)

    async def _call(self, method: str, stub: Any, request: Any, timeout: Optional[float], request_id: str) -> Any:
        """A unary call with one deadline across its retries; failures as KeelsonError."""
        limit, started, deadline = self._start(method, timeout)
        attempt = 0
        last: Optional[KeelsonError] = None
        while True:
            remaining = deadline - time.monotonic()
            if remaining <= 0:
                raise c.deadline_error(method, limit, last)
            try:
                return await stub(request, timeout=remaining, metadata=self._metadata(request_id))
            except grpc.RpcError as e:
                last = KeelsonError.from_rpc_error(e)
            try:
                pause = self._pause_after(method, request_id, last, attempt, started, deadline, limit)
            except KeelsonError as error:
                raise error from None
            await asyncio.sleep(pause)
            attempt += 1

    async def compute_weights(
        self,
        returns: pd.DataFrame,
        market: c.Market = None,
        settings: c.Settings = None,
        previous_weights: "Optional[pd.Series[float]]" = None,
        request_id: Optional[str] = None,
        timeout: Optional[float] = None,
    ) -> WeightsResult:
        """As :meth:`keelson_client.Client.compute_weights`."""
        rid = c.new_request_id(request_id)
        request, _ = c.compute_request(returns, market, settings, previous_weights, rid)
        result = WeightsResult(await self._call("ComputeWeights", self._stub.ComputeWeights, request, timeout, rid))
        c.emit_warnings(result.warnings, rid)
        return result

    async def service_info(self, timeout: Optional[float] = None) -> Dict[str, Any]:
        """As :meth:`keelson_client.Client.service_info`."""
        rid = c.new_request_id(None)
        return c.to_dict(await self._call("GetServiceInfo", self._stub.GetServiceInfo, pb.GetServiceInfoRequest(),
                                          timeout, rid))

    async def run_backtest(
        self,
        returns: pd.DataFrame,
        market: c.Market = None,
        settings: c.Settings = None,
        window: int = 120,
        step: int = 1,
        expanding: bool = False,
        benchmarks: Optional[Iterable[Sequence[str]]] = None,
        cost_bps: Optional[float] = None,
        on_progress: Optional[c.ProgressCallback] = None,
        request_id: Optional[str] = None,
        skip_baselines: bool = False,
        timeout: Optional[float] = None,
    ) -> BacktestResult:
        """As :meth:`keelson_client.Client.run_backtest`; cancelling the task cancels the
        backtest on the server."""
        limit, _, _ = self._start("RunBacktest", timeout)
        rid = c.new_request_id(request_id)
        request, win = c.backtest_request(returns, market, settings, window, step, expanding, benchmarks, cost_bps,
                                          skip_baselines, rid)
        call = self._stub.RunBacktest(request, timeout=limit, metadata=self._metadata(rid))
        result: Optional[pb.BacktestResult] = None
        try:
            async for message in call:
                got = c.stream_event(message, on_progress)
                if got is not None:
                    result = got
        except grpc.RpcError as e:
            raise KeelsonError.from_rpc_error(e) from None
        except BaseException:
            call.cancel()
            raise
        return c.finish_backtest(result, win, rid)
