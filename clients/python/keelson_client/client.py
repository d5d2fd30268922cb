"""The blocking Keelson client: DataFrames in, pandas objects out."""

from __future__ import annotations

import time
from typing import Any, Dict, Iterable, List, Optional, Sequence, Tuple

import grpc
import pandas as pd

from . import _common as c
from ._common import RETRYABLE, BacktestResult, KeelsonWarning, WeightsResult
from ._proto import weights_pb2 as pb
from .errors import KeelsonError

__all__ = ["Client", "WeightsResult", "BacktestResult", "KeelsonWarning", "RETRYABLE"]


class Client(c.ClientBase):
    """A connection to a Keelson server.

    ``Client("keelson.internal:50051", token=..., root_certificates=...)``. TLS is on when
    ``root_certificates`` is given (mutual TLS with ``private_key`` and
    ``certificate_chain``); each PEM may be bytes, text or a file path.

    Every call has one deadline, ``timeout`` seconds (per call: the method's ``timeout=``),
    across all its attempts. ``UNAVAILABLE`` and ``RESOURCE_EXHAUSTED`` are retried with
    exponential backoff (from ``backoff`` doubling to ``max_backoff``, full jitter) for up to
    ``retry_window`` seconds after the first attempt, long enough to outlast a rolling
    restart; ``retries`` caps their number (``retries=0`` turns them off). A backtest stream
    is not retried. Every call carries a request id (``request_id=`` or a fresh one) and the
    user agent ``keelson-client/VERSION``, both in the server's log. Safe to share between
    threads. Use it as a context manager, or call :meth:`close`.
    """

    def _secure_channel(self, target: str, creds: grpc.ChannelCredentials, options: List[Tuple[str, Any]]) -> Any:
        return grpc.secure_channel(target, creds, options=options)

    def _insecure_channel(self, target: str, options: List[Tuple[str, Any]]) -> Any:
        return grpc.insecure_channel(target, options=options)

    def __enter__(self) -> "Client":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def close(self) -> None:
        """Closes the channel; later calls raise :class:`ClientClosed`."""
        self._closed = True
        self._channel.close()

    def _call(self, method: str, stub: Any, request: Any, timeout: Optional[float], request_id: str) -> Any:
        """A unary call with one deadline across its retries; failures as KeelsonError."""
        limit, started, deadline = self._start(method, timeout)
        attempt = 0
        last: Optional[KeelsonError] = None
        while True:
            remaining = deadline - time.monotonic()
            if remaining <= 0:
                raise c.deadline_error(method, limit, last)
            try:
                return stub(request, timeout=remaining, metadata=self._metadata(request_id))
            except grpc.RpcError as e:
                last = KeelsonError.from_rpc_error(e)
            except ValueError as e:  # grpc's own, e.g. a channel closed by another thread
                self._check_open(method)
                raise KeelsonError.of(grpc.StatusCode.INTERNAL, f"{method}: {e}") from None
            try:
                pause = self._pause_after(method, request_id, last, attempt, started, deadline, limit)
            except KeelsonError as error:
                raise error from None
            time.sleep(pause)
            attempt += 1

    def compute_weights(
        self,
        returns: pd.DataFrame,
        market: c.Market = None,
        settings: c.Settings = None,
        previous_weights: "Optional[pd.Series[float]]" = None,
        request_id: Optional[str] = None,
        timeout: Optional[float] = None,
    ) -> WeightsResult:
        """Weights for the window ``returns`` (rows periods, columns factors named by strings,
        numeric, NaN missing).

        ``market`` is the name of a column holding the market excess return, or a Series
        aligned on the index. ``settings`` uses the README's setting names; unset ones take
        the server's defaults, and ``periods_per_year`` the index's frequency when it has one.
        ``previous_weights`` (a Series by factor, the market column's name for the hedge
        held) prices turnover and trading costs. The server's warnings are issued as
        :class:`KeelsonWarning` and logged.
        """
        rid = c.new_request_id(request_id)
        request, _ = c.compute_request(returns, market, settings, previous_weights, rid)
        result = WeightsResult(self._call("ComputeWeights", self._stub.ComputeWeights, request, timeout, rid))
        c.emit_warnings(result.warnings, rid)
        return result

    def service_info(self, timeout: Optional[float] = None) -> Dict[str, Any]:
        """The server's versions, default settings, limits and setting descriptions."""
        rid = c.new_request_id(None)
        return c.to_dict(self._call("GetServiceInfo", self._stub.GetServiceInfo, pb.GetServiceInfoRequest(),
                                    timeout, rid))

    def run_backtest(
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
        """Backtests the configured method beside its baselines out of sample.

        The call streams: ``on_progress(done, total)`` is called as fits complete. A
        KeyboardInterrupt (or any exception from ``on_progress``) cancels the call on the
        server and is raised again. ``benchmarks`` is a list of sets of column names (the
        market column's name means the market). The deadline is ``timeout`` (default: the
        client's) for the whole stream; a backtest is not retried. The returns come back
        indexed like ``returns``.
        """
        limit, _, _ = self._start("RunBacktest", timeout)
        rid = c.new_request_id(request_id)
        request, win = c.backtest_request(returns, market, settings, window, step, expanding, benchmarks, cost_bps,
                                          skip_baselines, rid)
        call = self._stub.RunBacktest(request, timeout=limit, metadata=self._metadata(rid))
        result: Optional[pb.BacktestResult] = None
        try:
            for message in call:
                got = c.stream_event(message, on_progress)
                if got is not None:
                    result = got
        except grpc.RpcError as e:
            raise KeelsonError.from_rpc_error(e) from None
        except BaseException:
            call.cancel()
            raise
        return c.finish_backtest(result, win, rid)
