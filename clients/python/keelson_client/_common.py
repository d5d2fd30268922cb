"""What the blocking and the asyncio clients share: the frame checks and the
request messages, the results as pandas objects, the server's warnings, the
retry policy and the call metadata."""

from __future__ import annotations

import logging
import os
import random
import sys
import threading
import time
import uuid
import warnings
from dataclasses import dataclass
from typing import Any, Callable, Dict, Iterable, List, Mapping, Optional, Sequence, Tuple, Union

import grpc
import numpy as np
import pandas as pd
from google.protobuf import json_format

from ._proto import weights_pb2 as pb
from ._proto import weights_pb2_grpc as rpc
from ._version import __version__
from .errors import CLIENT_DOMAIN, ClientClosed, KeelsonError, invalid
from .settings import settings_message

#: The client's logger: retries and their reasons at INFO, server warnings at WARNING.
logger = logging.getLogger("keelson_client")

#: Status codes worth retrying: the server shed the call or was briefly unreachable
#: (the service's error table recommends backoff for exactly these).
RETRYABLE = (grpc.StatusCode.UNAVAILABLE, grpc.StatusCode.RESOURCE_EXHAUSTED)

#: The user agent every call carries (the server logs it beside the request id).
USER_AGENT = f"keelson-client/{__version__} python/{sys.version_info.major}.{sys.version_info.minor}"

PemSource = Union[bytes, str, "os.PathLike[str]", None]
Market = Union[str, "pd.Series[float]", None]
Settings = Optional[Mapping[str, object]]
ProgressCallback = Callable[[int, int], None]


class KeelsonWarning(UserWarning):
    """A warning the server attached to an answer (``code`` is its stable code).

    ``python -W error::keelson_client.KeelsonWarning`` (or
    ``warnings.simplefilter("error", KeelsonWarning)``) makes every such warning an
    exception, for jobs that must not act on a warned answer."""

    def __init__(self, code: str, message: str) -> None:
        super().__init__(f"{code}: {message}")
        self.code = code
        self.message = message

    def __reduce__(self) -> Tuple[Any, ...]:
        return (KeelsonWarning, (self.code, self.message))


def emit_warnings(items: Iterable[Tuple[str, str]], request_id: str) -> None:
    """Each server warning through ``warnings.warn`` and the ``logging`` module."""
    for code, message in items:
        logger.warning("server warning %s for request %s: %s", code, request_id, message)
        warnings.warn(KeelsonWarning(code, message), stacklevel=4)


def pem(source: PemSource) -> Optional[bytes]:
    """PEM bytes, given as bytes, PEM text or a path to a file."""
    if source is None or isinstance(source, bytes):
        return source
    text = os.fspath(source)
    if "-----BEGIN" in text:
        return text.encode()
    with open(text, "rb") as f:
        return f.read()


def check_token(token: Optional[str]) -> Optional[str]:
    """A bearer token as gRPC metadata can carry it: printable ASCII, no spaces."""
    if token is None:
        return None
    if not isinstance(token, str) or token == "":
        raise invalid("token", "the token must be a non-empty string")
    for i, ch in enumerate(token):
        if not ("!" <= ch <= "~"):
            what = {"\n": "a newline", "\r": "a carriage return", " ": "a space", "\t": "a tab"}.get(
                ch, f"the character {ch!r}")
            raise invalid("token", f"the token holds {what} at position {i} (a trailing newline from a file?); "
                                   "tokens are printable ASCII without spaces")
    return token


def check_timeout(timeout: Optional[float], what: str = "timeout") -> Optional[float]:
    """A deadline in seconds: positive and finite, or None for the client's."""
    if timeout is None:
        return None
    if isinstance(timeout, bool) or not isinstance(timeout, (int, float)) or not (0 < float(timeout) < float("inf")):
        raise invalid(what, f"{what} must be a positive number of seconds, got {timeout!r}")
    return float(timeout)


def channel_options(server_name: Optional[str]) -> List[Tuple[str, Any]]:
    options: List[Tuple[str, Any]] = [
        ("grpc.max_receive_message_length", 256 << 20),
        ("grpc.max_send_message_length", 256 << 20),
        ("grpc.primary_user_agent", USER_AGENT),
    ]
    if server_name:
        options.append(("grpc.ssl_target_name_override", server_name))
    return options


def call_metadata(token: Optional[str], request_id: str) -> Tuple[Tuple[str, str], ...]:
    meta: Tuple[Tuple[str, str], ...] = (("x-request-id", request_id),)
    if token:
        meta += (("authorization", f"Bearer {token}"),)
    return meta


def new_request_id(request_id: Optional[str]) -> str:
    """The caller's request id, or a fresh one."""
    if request_id is None or request_id == "":
        return uuid.uuid4().hex
    if not isinstance(request_id, str) or not all(" " <= ch <= "~" for ch in request_id):
        raise invalid("request_id", "request_id must be printable ASCII")
    return request_id


@dataclass
class RetryPolicy:
    """Exponential backoff with full jitter on UNAVAILABLE and RESOURCE_EXHAUSTED, for at
    most ``window`` seconds after the first attempt and never past the call's deadline."""

    window: float
    backoff: float
    max_backoff: float

    def pause(self, attempt: int) -> float:
        """Seconds to wait before retry number ``attempt`` (0-based)."""
        cap = min(self.max_backoff, self.backoff * (2 ** attempt))
        # Full jitter (uniform in [0, cap]) spreads the retries of many clients.
        return random.uniform(0.0, cap)


def log_retry(method: str, request_id: str, error: KeelsonError, attempt: int, pause: float) -> None:
    logger.info("retrying %s (request %s) after %s: %s; attempt %d in %.2f s", method, request_id,
                error.code.name, error.message, attempt + 2, pause)


def deadline_error(method: str, timeout: float, last: Optional[KeelsonError]) -> KeelsonError:
    after = f"; the last attempt failed with {last.code.name}: {last.message}" if last else ""
    return KeelsonError.of(grpc.StatusCode.DEADLINE_EXCEEDED,
                           f"{method} did not complete within its deadline of {timeout:g} s{after}",
                           reason="CLIENT_DEADLINE", domain="keelson.client")


class ClientBase:
    """The options, channel, stub and retry decisions the blocking and the asyncio
    clients share; each supplies its channel constructors and its own waiting."""

    def __init__(
        self,
        address: str,
        *,
        token: Optional[str] = None,
        root_certificates: PemSource = None,
        private_key: PemSource = None,
        certificate_chain: PemSource = None,
        timeout: float = 30.0,
        retry_window: float = 20.0,
        retries: Optional[int] = None,
        backoff: float = 0.1,
        max_backoff: float = 5.0,
        server_name: Optional[str] = None,
    ) -> None:
        self.timeout = check_timeout(timeout) or 30.0
        if not (retry_window >= 0):
            raise invalid("retry_window", f"retry_window must be 0 or more seconds, got {retry_window!r}")
        if retries is not None and (isinstance(retries, bool) or not isinstance(retries, int) or retries < 0):
            raise invalid("retries", f"retries must be a whole number 0 or more, or None, got {retries!r}")
        self.retries = retries
        self._token = check_token(token)
        self.retry = RetryPolicy(window=float(retry_window), backoff=float(backoff), max_backoff=float(max_backoff))
        target = address.split("://", 1)[-1]
        options = channel_options(server_name)
        if root_certificates is not None or address.startswith("https://"):
            creds = grpc.ssl_channel_credentials(pem(root_certificates), pem(private_key), pem(certificate_chain))
            self._channel = self._secure_channel(target, creds, options)
        else:
            self._channel = self._insecure_channel(target, options)
        self._stub = rpc.WeightsServiceStub(self._channel)  # type: ignore[no-untyped-call]
        self._closed = False
        self._count_lock = threading.Lock()
        #: Retries made so far by this client (every call counted).
        self.retries_made = 0

    def _secure_channel(self, target: str, creds: grpc.ChannelCredentials, options: List[Tuple[str, Any]]) -> Any:
        raise NotImplementedError

    def _insecure_channel(self, target: str, options: List[Tuple[str, Any]]) -> Any:
        raise NotImplementedError

    def _check_open(self, method: str) -> None:
        if self._closed:
            raise ClientClosed(grpc.StatusCode.CANCELLED, f"{method} on a closed client; create a new Client",
                               reason="CLIENT_CLOSED", domain=CLIENT_DOMAIN)

    def _start(self, method: str, timeout: Optional[float]) -> Tuple[float, float, float]:
        """The call's limit, start and deadline (monotonic seconds)."""
        self._check_open(method)
        limit = check_timeout(timeout) or self.timeout
        started = time.monotonic()
        return limit, started, started + limit

    def _pause_after(self, method: str, request_id: str, error: KeelsonError, attempt: int, started: float,
                     deadline: float, limit: float) -> float:
        """Seconds to wait before retrying after ``error``, or the error to raise."""
        if error.code not in RETRYABLE:
            raise error
        now = time.monotonic()
        if now - started >= self.retry.window or (self.retries is not None and attempt >= self.retries):
            raise error
        pause = self.retry.pause(attempt)
        if now + pause >= deadline:
            raise deadline_error(method, limit, error)
        log_retry(method, request_id, error, attempt, pause)
        with self._count_lock:
            self.retries_made += 1
        return pause

    def _metadata(self, request_id: str) -> Tuple[Tuple[str, str], ...]:
        return call_metadata(self._token, request_id)


def stream_event(message: pb.RunBacktestResponse, on_progress: Optional[ProgressCallback]
                 ) -> Optional[pb.BacktestResult]:
    """Reports a progress message; returns the result message when this is it."""
    event = message.WhichOneof("event")
    if event == "progress" and on_progress is not None:
        on_progress(int(message.progress.fits_done), int(message.progress.fits_total))
    elif event == "result":
        return message.result
    return None


def finish_backtest(result: Optional[pb.BacktestResult], win: Window, request_id: str) -> "BacktestResult":
    if result is None:
        raise KeelsonError.of(grpc.StatusCode.INTERNAL, "the backtest stream ended without a result")
    answer = BacktestResult(result, win.index)
    emit_warnings(backtest_warnings(answer), request_id)
    return answer


# ---- frames in -------------------------------------------------------------------------------


@dataclass
class Window:
    """A DataFrame as the service reads it, and what is needed to map answers back."""

    names: List[str]
    labels: List[str]
    matrix: pb.Matrix
    market_values: List[float]
    market_name: str
    index: pd.Index
    periods_per_year: Optional[int]


# The index frequency → periods per year, as the service's inference reads label spacing.
_FREQUENCIES = (("B", 252), ("C", 252), ("D", 252), ("W", 52), ("M", 12), ("BM", 12), ("SM", 24),
                ("Q", 4), ("BQ", 4), ("A", 1), ("Y", 1), ("BA", 1), ("BY", 1))


def periods_per_year(index: pd.Index) -> Optional[int]:
    """Periods per year of an index with a frequency (set or inferable), else None."""
    freq: Optional[str] = None
    if isinstance(index, pd.PeriodIndex):
        freq = index.freqstr
    elif isinstance(index, pd.DatetimeIndex):
        freq = index.freqstr if index.freq is not None else (pd.infer_freq(index) if len(index) >= 3 else None)
    if not freq:
        return None
    # "ME", "2W-FRI", "QE-DEC", "YS" → the letters before a dash, without a multiple or anchor.
    base = freq.split("-")[0].lstrip("0123456789").upper()
    for suffix in ("E", "S"):
        if len(base) > 1 and base.endswith(suffix):
            base = base[: -len(suffix)]
    for name, per_year in _FREQUENCIES:
        if base == name:
            return per_year
    return None


def _labels(index: pd.Index) -> List[str]:
    """Period labels as the service reads them: YYYY-MM for months, YYYY-MM-DD for days."""
    if isinstance(index, pd.PeriodIndex):
        # Months as YYYY-MM; any other period by its last day, so that the service reads the
        # frequency from the labels' spacing (weekly, quarterly and annual periods included).
        if index.freqstr.startswith("M"):
            return [p.strftime("%Y-%m") for p in index]
        return [p.end_time.strftime("%Y-%m-%d") for p in index]
    if isinstance(index, pd.DatetimeIndex):
        if not index.is_monotonic_increasing:
            bad = next(i for i in range(1, len(index)) if index[i] < index[i - 1])
            raise invalid("period_labels", f"the index is not sorted: row {bad} ({index[bad]}) comes before "
                                           f"row {bad - 1} ({index[bad - 1]})", row=bad)
        return [t.strftime("%Y-%m-%d") for t in index]
    return [str(v) for v in index]


def _numeric(frame: pd.DataFrame) -> np.ndarray:
    """The frame's values as float64, or an error naming the first column that is not numeric."""
    for j, (name, dtype) in enumerate(frame.dtypes.items()):
        if pd.api.types.is_bool_dtype(dtype):
            raise invalid("returns", f"column {name!r} (position {j}) holds true/false values, not returns",
                          reason="NOT_NUMERIC", column=j, factor=name)
        if pd.api.types.is_numeric_dtype(dtype):
            continue
        column = frame.iloc[:, j]
        converted = pd.to_numeric(column, errors="coerce")
        bad = column.notna() & converted.isna()
        if bad.any():
            i = int(np.flatnonzero(bad.to_numpy())[0])
            raise invalid("returns", f"column {name!r} (position {j}) is not numeric: row {i} "
                                     f"({frame.index[i]}) holds {column.iloc[i]!r}",
                          reason="NOT_NUMERIC", row=i, column=j, factor=name)
    try:
        return frame.to_numpy(dtype=float)
    except (TypeError, ValueError) as e:
        raise invalid("returns", f"the returns are not numbers: {e}", reason="NOT_NUMERIC") from None


def window(returns: pd.DataFrame, market: Market) -> Window:
    """Names, labels, row-major values and market returns of a DataFrame, checked."""
    if not isinstance(returns, pd.DataFrame):
        raise invalid("returns", "returns must be a pandas DataFrame (rows periods, columns factors), "
                                 f"got {type(returns).__name__}")
    for j, name in enumerate(returns.columns):
        if not isinstance(name, str):
            raise invalid("factor_names", f"column {j} is named {name!r} ({type(name).__name__}); factor names "
                                          "must be strings (returns.columns = returns.columns.astype(str))",
                          reason="NAME_NOT_STRING", column=j)
    market_name = ""
    market_values: List[float] = []
    frame = returns
    if isinstance(market, str):
        if market not in returns.columns:
            raise invalid("market_returns", f"no column named {market!r} for market; the columns are: "
                                            f"{', '.join(map(str, returns.columns))}",
                          reason="MARKET_COLUMN_MISSING")
        market_name = market
        market_values = _numeric(returns[[market]])[:, 0].tolist()
        frame = returns.drop(columns=[market])
    elif isinstance(market, pd.Series):
        aligned = market.reindex(returns.index)
        market_name = str(market.name) if market.name is not None else ""
        market_values = _numeric(aligned.to_frame(market_name or "market"))[:, 0].tolist()
    elif market is not None:
        raise invalid("market_returns", "market must be a column name, a pandas Series or None")
    values = _numeric(frame)
    matrix = pb.Matrix(rows=values.shape[0], cols=values.shape[1], values=values.ravel(order="C").tolist())
    return Window(names=[str(c) for c in frame.columns], labels=_labels(returns.index), matrix=matrix,
                  market_values=market_values, market_name=market_name, index=returns.index,
                  periods_per_year=periods_per_year(returns.index))


def settings_for(settings: Settings, win: Window) -> pb.Settings:
    """The settings message, with the index's frequency when the caller set none."""
    msg = settings_message(settings)
    if win.periods_per_year is not None and msg.WhichOneof("periods_per_year_choice") is None:
        msg.periods_per_year = win.periods_per_year
    return msg


def compute_request(returns: pd.DataFrame, market: Market, settings: Settings,
                    previous_weights: "Optional[pd.Series[float]]", request_id: str
                    ) -> Tuple[pb.ComputeWeightsRequest, Window]:
    win = window(returns, market)
    request = pb.ComputeWeightsRequest(
        factor_names=win.names, period_labels=win.labels, returns=win.matrix, market_returns=win.market_values,
        market_name=win.market_name, settings=settings_for(settings, win), request_id=request_id)
    if previous_weights is not None:
        if not isinstance(previous_weights, pd.Series):
            raise invalid("previous_weights", "previous_weights must be a pandas Series by factor")
        for i, (k, v) in enumerate(previous_weights.items()):
            try:
                weight = float(v)
            except (TypeError, ValueError):
                raise invalid("previous_weights", f"the weight of {k!r} (position {i}) is not a number: {v!r}",
                              reason="NOT_NUMERIC", row=i) from None
            request.previous_weights.append(pb.FactorWeight(factor=str(k), weight=weight))
    return request, win


def backtest_request(returns: pd.DataFrame, market: Market, settings: Settings, window_length: int, step: int,
                     expanding: bool, benchmarks: Optional[Iterable[Sequence[str]]], cost_bps: Optional[float],
                     skip_baselines: bool, request_id: str) -> Tuple[pb.RunBacktestRequest, Window]:
    win = window(returns, market)
    sets = [pb.BenchmarkSet(names=["market" if isinstance(market, str) and n == market else str(n)
                                   for n in group]) for group in (benchmarks or [])]
    request = pb.RunBacktestRequest(
        factor_names=win.names, period_labels=win.labels, returns=win.matrix, market_returns=win.market_values,
        settings=settings_for(settings, win), request_id=request_id, window=window_length, expanding=expanding, step=step, benchmark_sets=sets, skip_baselines=skip_baselines)
    if cost_bps is not None:
        request.cost_bps = float(cost_bps)
    return request, win


# ---- answers out -----------------------------------------------------------------------------


def to_dict(message: Any) -> Dict[str, Any]:
    """A message in the proto3 JSON mapping (lowerCamelCase names, every field)."""
    try:
        return json_format.MessageToDict(message, always_print_fields_with_no_presence=True)
    except TypeError:  # protobuf < 5.26 names the option differently
        return json_format.MessageToDict(message, including_default_value_fields=True)  # type: ignore[call-arg]


def like_input(labels: Sequence[str], index: pd.Index, name: str = "period") -> pd.Index:
    """Period labels back in the type of the input index (PeriodIndex in, PeriodIndex
    out; a DatetimeIndex keeps its times); other indexes as the labels."""
    if isinstance(index, pd.PeriodIndex):
        freq: Any = index.freq
        return pd.PeriodIndex([pd.Period(v, freq=freq) for v in labels], freq=freq, name=name)
    if isinstance(index, pd.DatetimeIndex):
        back = dict(zip(_labels(index), index))
        return pd.DatetimeIndex([back.get(v, pd.Timestamp(v)) for v in labels], name=name)
    return pd.Index(list(labels), name=name)


class WeightsResult:
    """The answer of ``compute_weights``.

    Attributes:
        weights: the weights to hold, a Series indexed by factor (index name ``factor``;
            0 for excluded factors).
        model_weights: the model portfolio before limits and costs, a Series by factor.
        market_weight: the market hedge; model_market_weight: the model's.
        diagnostics: the diagnostics, a dict in the proto's JSON names.
        warnings: the server's warnings as ``(code, message)`` pairs (also issued as
            :class:`KeelsonWarning`).
        components: per-component diagnostics, a DataFrame indexed by component number.
        fingerprint: SHA-256 of the window and the settings.
        request_id: the request id the call carried.
        response: the ``ComputeWeightsResponse`` message itself.
    """

    weights: "pd.Series[float]"
    model_weights: "pd.Series[float]"
    market_weight: float
    model_market_weight: float
    diagnostics: Dict[str, Any]
    warnings: List[Tuple[str, str]]
    components: pd.DataFrame
    fingerprint: str
    request_id: str
    response: pb.ComputeWeightsResponse

    def __init__(self, response: pb.ComputeWeightsResponse) -> None:
        self.response = response
        names = pd.Index([w.factor for w in response.weights], name="factor")
        self.weights = pd.Series([w.weight for w in response.weights], index=names, name="weight", dtype=float)
        self.model_weights = pd.Series([w.model_weight for w in response.weights], index=names,
                                       name="model_weight", dtype=float)
        self.market_weight = float(response.market_weight)
        self.model_market_weight = float(response.model_market_weight)
        self.diagnostics = to_dict(response.diagnostics)
        self.warnings = [(w.code, w.message) for w in response.diagnostics.warnings]
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
    """The answer of ``run_backtest``.

    Attributes:
        returns: out-of-sample returns, a DataFrame indexed by period (in the type of the
            input's index), one column per strategy id.
        performance: one row per strategy id: name, Sharpe ratio, volatility, turnover and the
            other figures of ``StrategyPerformance``.
        warnings: ``(strategy id, code, refits)`` for every warning a strategy's refits
            raised (also issued as :class:`KeelsonWarning`).
        summary: the whole ``BacktestResult`` message as a dict (the report's ``summary.json``).
        result: the message itself.
    """

    returns: pd.DataFrame
    performance: pd.DataFrame
    warnings: List[Tuple[str, str, int]]
    summary: Dict[str, Any]
    result: pb.BacktestResult

    def __init__(self, result: pb.BacktestResult, index: Optional[pd.Index] = None) -> None:
        self.result = result
        ids = [s.id or s.name for s in result.strategies]
        periods = list(result.periods)
        idx = like_input(periods, index) if index is not None else pd.Index(periods, name="period")
        self.returns = pd.DataFrame({i: list(s.returns) for i, s in zip(ids, result.strategies)}, index=idx)
        scalar = ("name", "mean", "volatility", "sharpe", "sharpe_se_iid", "sharpe_se_newey_west", "cer",
                  "max_drawdown", "net_sharpe", "average_turnover", "gross_median", "gross_max",
                  "kappa_at_edge", "components_at_cap", "skewness", "kurtosis")
        self.performance = pd.DataFrame([{k: getattr(s, k) for k in scalar} for s in result.strategies],
                                        index=pd.Index(ids, name="strategy"))
        self.warnings = [(i, w.code, int(w.refits)) for i, s in zip(ids, result.strategies) for w in s.warnings]
        self.summary = to_dict(result)

    def __repr__(self) -> str:
        return f"BacktestResult({len(self.returns)} periods, {self.returns.shape[1]} strategies)"


def backtest_warnings(result: BacktestResult) -> List[Tuple[str, str]]:
    """The configured strategy's warnings of a backtest as ``(code, message)``, one per
    code (the baselines' stay in ``BacktestResult.warnings``: a strict job should not fail
    on a baseline's warning)."""
    return [(code, f"strategy {sid}: raised at {refits} refit(s)")
            for sid, code, refits in result.warnings if sid.startswith("configured")]
