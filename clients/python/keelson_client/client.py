"""The Keelson gRPC client: DataFrames in, pandas objects out."""

from __future__ import annotations

import os
import random
import time
from typing import Callable, Iterable, Mapping, Optional, Sequence, Union

import grpc
import numpy as np
import pandas as pd
from google.protobuf import json_format

from ._proto import weights_pb2 as pb
from ._proto import weights_pb2_grpc as rpc
from .errors import KeelsonError
from .settings import settings_message

#: Status codes worth retrying: the server shed the call or was briefly unreachable
#: (the service's error table recommends backoff for exactly these).
RETRYABLE = (grpc.StatusCode.UNAVAILABLE, grpc.StatusCode.RESOURCE_EXHAUSTED)

PemSource = Union[bytes, str, os.PathLike, None]


def _pem(source: PemSource) -> Optional[bytes]:
    """PEM bytes, given as bytes, PEM text or a path to a file."""
    if source is None or isinstance(source, bytes):
        return source
    text = os.fspath(source)
    if "-----BEGIN" in text:
        return text.encode()
    with open(text, "rb") as f:
        return f.read()


def _to_dict(message) -> dict:
    """A message in the proto3 JSON mapping (lowerCamelCase names, every field)."""
    return json_format.MessageToDict(message, always_print_fields_with_no_presence=True)


def _labels(index: pd.Index) -> list:
    """Period labels as the service reads them: YYYY-MM for months, YYYY-MM-DD for days."""
    if isinstance(index, pd.PeriodIndex):
        # Months as YYYY-MM; any other period by its last day, so that the service reads the
        # frequency from the labels' spacing (weekly, quarterly and annual periods included).
        if index.freqstr.startswith("M"):
            return [p.strftime("%Y-%m") for p in index]
        return [p.end_time.strftime("%Y-%m-%d") for p in index]
    if isinstance(index, pd.DatetimeIndex):
        return [t.strftime("%Y-%m-%d") for t in index]
    return [str(v) for v in index]


def _panel(returns: pd.DataFrame, market: Union[str, pd.Series, None]):
    """Factor names, labels, row-major values and market returns of a DataFrame."""
    if not isinstance(returns, pd.DataFrame):
        raise TypeError("returns must be a pandas DataFrame (rows periods, columns factors)")
    market_name = ""
    market_values: Sequence[float] = []
    frame = returns
    if isinstance(market, str):
        if market not in returns.columns:
            raise KeelsonError(grpc.StatusCode.INVALID_ARGUMENT,
                               f"no column named {market!r} for market; the columns are: "
                               f"{', '.join(map(str, returns.columns))}",
                               reason="MARKET_COLUMN_MISSING", metadata={"field": "market_returns"})
        market_name = market
        market_values = returns[market].to_numpy(dtype=float)
        frame = returns.drop(columns=[market])
    elif isinstance(market, pd.Series):
        aligned = market.reindex(returns.index)
        market_name = str(market.name) if market.name is not None else ""
        market_values = aligned.to_numpy(dtype=float)
    elif market is not None:
        raise TypeError("market must be a column name, a pandas Series or None")
    values = frame.to_numpy(dtype=float)
    matrix = pb.Matrix(rows=values.shape[0], cols=values.shape[1], values=values.ravel(order="C").tolist())
    return [str(c) for c in frame.columns], _labels(returns.index), matrix, list(map(float, market_values)), market_name


def _window_fields(returns, market, settings, request_id):
    """The fields both requests share (names, labels, returns, market, settings,
    request id), and the market column's name."""
    names, labels, matrix, market_values, market_name = _panel(returns, market)
    fields = dict(factor_names=names, period_labels=labels, returns=matrix, market_returns=market_values,
                  settings=settings_message(settings), request_id=request_id or "")
    return fields, market_name


class WeightsResult:
    """The answer of :meth:`Client.compute_weights`.

    Attributes:
        weights: the weights to hold, a Series indexed by factor (0 for excluded factors).
        model_weights: the model portfolio before limits and costs, a Series by factor.
        market_weight: the market hedge.
        diagnostics: the diagnostics, a dict in the proto's JSON names.
        components: per-component diagnostics, a DataFrame indexed by component number.
        fingerprint: SHA-256 of the window and the settings.
        response: the ``ComputeWeightsResponse`` message itself.
    """

    def __init__(self, response: pb.ComputeWeightsResponse):
        self.response = response
        names = [w.factor for w in response.weights]
        self.weights = pd.Series([w.weight for w in response.weights], index=names, name="weight", dtype=float)
        self.model_weights = pd.Series([w.model_weight for w in response.weights], index=names,
                                       name="model_weight", dtype=float)
        self.market_weight = response.market_weight
        self.model_market_weight = response.model_market_weight
        self.diagnostics = _to_dict(response.diagnostics)
        self.components = pd.DataFrame(
            [{"eigenvalue": c.eigenvalue, "trace_share": c.trace_share, "sharpe_annualized": c.sharpe_annualized,
              "coefficient": c.coefficient, "shrinkage_factor": c.shrinkage_factor,
              "loadings": np.asarray(c.loadings, dtype=float)} for c in response.components],
            index=pd.Index([c.index for c in response.components], name="component"),
            columns=["eigenvalue", "trace_share", "sharpe_annualized", "coefficient", "shrinkage_factor", "loadings"],
        )
        self.fingerprint = response.fingerprint
        self.request_id = response.request_id

    def to_frame(self) -> pd.DataFrame:
        """One row per factor: weight, model weight and every per-factor diagnostic."""
        rows = [{
            "weight": w.weight, "model_weight": w.model_weight, "mean_annualized": w.mean_annualized,
            "volatility_annualized": w.volatility_annualized, "sharpe_annualized": w.sharpe_annualized,
            "market_beta": w.market_beta, "scale": w.scale, "risk_contribution": w.risk_contribution,
            "excluded": w.excluded, "exclusion_reason": w.exclusion_reason,
        } for w in self.response.weights]
        return pd.DataFrame(rows, index=pd.Index([w.factor for w in self.response.weights], name="factor"))

    def __repr__(self) -> str:
        d = self.diagnostics
        return (f"WeightsResult({len(self.weights)} factors, market weight {self.market_weight:.4f}, "
                f"K = {d.get('numComponents')}, kappa = {d.get('kappa')}, {self.fingerprint})")


class BacktestResult:
    """The answer of :meth:`Client.run_backtest`.

    Attributes:
        returns: out-of-sample returns, a DataFrame indexed by period, one column per strategy id.
        performance: one row per strategy id: name, Sharpe ratio, volatility, turnover and the
            other figures of ``StrategyPerformance``.
        summary: the whole ``BacktestResult`` message as a dict (the report's ``summary.json``).
        result: the message itself.
    """

    def __init__(self, result: pb.BacktestResult):
        self.result = result
        ids = [s.id or s.name for s in result.strategies]
        self.returns = pd.DataFrame({i: list(s.returns) for i, s in zip(ids, result.strategies)},
                                    index=pd.Index(list(result.periods), name="period"))
        scalar = ("name", "mean", "volatility", "sharpe", "sharpe_se_iid", "sharpe_se_newey_west", "cer",
                  "max_drawdown", "net_sharpe", "average_turnover", "gross_median", "gross_max",
                  "kappa_at_edge", "components_at_cap", "skewness", "kurtosis")
        self.performance = pd.DataFrame([{k: getattr(s, k) for k in scalar} for s in result.strategies],
                                        index=pd.Index(ids, name="strategy"))
        self.summary = _to_dict(result)

    def __repr__(self) -> str:
        return f"BacktestResult({len(self.returns)} periods, {self.returns.shape[1]} strategies)"


class Client:
    """A connection to a Keelson server.

    ``Client("keelson.internal:50051", token=..., root_certificates=...)``. TLS is on when
    ``root_certificates`` is given (mutual TLS with ``private_key`` and
    ``certificate_chain``); each PEM may be bytes, text or a file path. Every call carries a
    deadline of ``timeout`` seconds and is retried up to ``retries`` times with exponential
    backoff and full jitter on ``UNAVAILABLE`` and ``RESOURCE_EXHAUSTED`` only. Use it as a
    context manager, or call :meth:`close`.
    """

    def __init__(
        self,
        address: str,
        *,
        token: Optional[str] = None,
        root_certificates: PemSource = None,
        private_key: PemSource = None,
        certificate_chain: PemSource = None,
        timeout: float = 30.0,
        retries: int = 3,
        backoff: float = 0.1,
        max_backoff: float = 5.0,
        server_name: Optional[str] = None,
    ):
        if not (timeout > 0):
            raise ValueError("timeout must be positive (seconds)")
        if retries < 0:
            raise ValueError("retries must be 0 or more")
        target = address.split("://", 1)[-1]
        tls = root_certificates is not None or address.startswith("https://")
        options = [("grpc.max_receive_message_length", 256 << 20), ("grpc.max_send_message_length", 256 << 20)]
        if server_name:
            options.append(("grpc.ssl_target_name_override", server_name))
        if tls:
            creds = grpc.ssl_channel_credentials(_pem(root_certificates), _pem(private_key), _pem(certificate_chain))
            self._channel = grpc.secure_channel(target, creds, options=options)
        else:
            self._channel = grpc.insecure_channel(target, options=options)
        self._stub = rpc.WeightsServiceStub(self._channel)
        self._metadata = (("authorization", f"Bearer {token}"),) if token else ()
        self.timeout = timeout
        self.retries = retries
        self.backoff = backoff
        self.max_backoff = max_backoff
        #: Retries made so far by this client (every call counted).
        self.retries_made = 0

    def __enter__(self) -> "Client":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def close(self) -> None:
        """Closes the channel."""
        self._channel.close()

    def _call(self, method: Callable, request):
        """A unary call with deadline and retries; failures as KeelsonError."""
        attempt = 0
        while True:
            try:
                return method(request, timeout=self.timeout, metadata=self._metadata)
            except grpc.RpcError as e:
                if e.code() in RETRYABLE and attempt < self.retries:
                    # Full jitter (uniform in [0, cap]) spreads the retries of many clients.
                    cap = min(self.max_backoff, self.backoff * (2 ** attempt))
                    time.sleep(random.uniform(0.0, cap))
                    attempt += 1
                    self.retries_made += 1
                    continue
                raise KeelsonError.from_rpc_error(e) from None

    def compute_weights(
        self,
        returns: pd.DataFrame,
        market: Union[str, pd.Series, None] = None,
        settings: Optional[Mapping[str, object]] = None,
        previous_weights: Optional[pd.Series] = None,
        request_id: Optional[str] = None,
    ) -> WeightsResult:
        """Weights for the window ``returns`` (rows periods, columns factors, NaN missing).

        ``market`` is the name of a column holding the market excess return, or a Series
        aligned on the index. ``settings`` uses the README's setting names; unset ones take
        the server's defaults. ``previous_weights`` (a Series by factor, the market column's
        name for the hedge held) prices turnover and trading costs.
        """
        fields, market_name = _window_fields(returns, market, settings, request_id)
        request = pb.ComputeWeightsRequest(market_name=market_name, **fields)
        if previous_weights is not None:
            request.previous_weights.extend(
                pb.FactorWeight(factor=str(k), weight=float(v)) for k, v in previous_weights.items())
        return WeightsResult(self._call(self._stub.ComputeWeights, request))

    def service_info(self) -> dict:
        """The server's versions, default settings, limits and setting descriptions."""
        return _to_dict(self._call(self._stub.GetServiceInfo, pb.GetServiceInfoRequest()))

    def run_backtest(
        self,
        returns: pd.DataFrame,
        market: Union[str, pd.Series, None] = None,
        settings: Optional[Mapping[str, object]] = None,
        window: int = 120,
        step: int = 1,
        expanding: bool = False,
        benchmarks: Optional[Iterable[Sequence[str]]] = None,
        cost_bps: Optional[float] = None,
        on_progress: Optional[Callable[[int, int], None]] = None,
        request_id: Optional[str] = None,
        skip_baselines: bool = False,
        timeout: Optional[float] = None,
    ) -> BacktestResult:
        """Backtests the configured method beside its baselines out of sample.

        The call streams: ``on_progress(done, total)`` is called as fits complete. A
        KeyboardInterrupt (or any exception from ``on_progress``) cancels the call on the
        server and is raised again. ``benchmarks`` is a list of sets of column names (the
        market column's name means the market). The deadline is ``timeout`` (default: the
        client's) for the whole stream; a backtest is not retried.
        """
        fields, _ = _window_fields(returns, market, settings, request_id)
        sets = [pb.BenchmarkSet(names=["market" if isinstance(market, str) and n == market else str(n)
                                       for n in group]) for group in (benchmarks or [])]
        request = pb.RunBacktestRequest(window=window, expanding=expanding, step=step, benchmark_sets=sets,
                                        skip_baselines=skip_baselines, **fields)
        if cost_bps is not None:
            request.cost_bps = float(cost_bps)
        call = self._stub.RunBacktest(request, timeout=timeout or self.timeout, metadata=self._metadata)
        result = None
        try:
            for message in call:
                event = message.WhichOneof("event")
                if event == "progress" and on_progress is not None:
                    on_progress(int(message.progress.fits_done), int(message.progress.fits_total))
                elif event == "result":
                    result = message.result
        except grpc.RpcError as e:
            raise KeelsonError.from_rpc_error(e) from None
        except BaseException:
            call.cancel()
            raise
        if result is None:
            raise KeelsonError(grpc.StatusCode.INTERNAL, "the backtest stream ended without a result")
        return BacktestResult(result)
