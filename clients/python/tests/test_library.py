"""keelson_client as a library: typed results (mypy --strict), every failure a
KeelsonError subclass that pickles, server warnings through `warnings` and
`logging`, one deadline across retries that outlast a restart, pandas index types
kept, the asyncio client, packaging metadata, and the request id and user agent in
the server's log. Against real `keelson serve` processes (conftest.py)."""

import asyncio
import concurrent.futures
import importlib.metadata
import logging
import os
import pickle
import subprocess
import sys
import threading
import time
import warnings

import grpc
import numpy as np
import pandas as pd
import pytest

import keelson_client
from keelson_client import (
    Client,
    ClientClosed,
    DeadlineExceeded,
    Infeasible,
    InvalidInput,
    KeelsonError,
    KeelsonWarning,
)
from keelson_client.aio import Client as AsyncClient

from conftest import ROOT, Server, free_port

HERE = os.path.dirname(os.path.abspath(__file__))
PACKAGE = os.path.dirname(HERE)


def test_mypy_strict_checks_a_user_script_and_the_package():
    pytest.importorskip("mypy")
    script = subprocess.run([sys.executable, "-m", "mypy", "--strict", os.path.join(HERE, "typed", "rebalance.py")],
                            capture_output=True, text=True, cwd=PACKAGE)
    assert script.returncode == 0, script.stdout + script.stderr
    package = subprocess.run([sys.executable, "-m", "mypy", "keelson_client"], capture_output=True, text=True,
                             cwd=PACKAGE)
    assert package.returncode == 0, package.stdout + package.stderr
    print(script.stdout.strip(), "|", package.stdout.strip())


def test_bad_frames_are_refused_before_sending_naming_the_column(server, window):
    text = window.copy()
    text["f03"] = text["f03"].astype(object)
    text.iloc[5, text.columns.get_loc("f03")] = "n/a"
    numbered = window.set_axis(range(window.shape[1]), axis=1)
    flags = window.copy()
    flags["f02"] = flags["f02"] > 0
    with Client(server.address) as keelson:
        with pytest.raises(InvalidInput) as e:
            keelson.compute_weights(text, market="MKT")
        assert e.value.factor == "f03" and e.value.row == 5 and "'n/a'" in e.value.message, e.value
        assert e.value.domain == "keelson.client" and e.value.reason == "NOT_NUMERIC"
        with pytest.raises(InvalidInput) as e:
            keelson.compute_weights(numbered)
        assert e.value.field == "factor_names" and e.value.column == 0 and "must be strings" in e.value.message
        with pytest.raises(InvalidInput) as e:
            keelson.compute_weights(flags, market="MKT")
        assert e.value.factor == "f02"
        # An InvalidInput is a ValueError too, for code that catches those.
        with pytest.raises(ValueError):
            keelson.compute_weights(text, market="MKT")
        shuffled = window.set_axis(pd.date_range("2001-01-31", periods=len(window), freq="ME")[::-1])
        with pytest.raises(InvalidInput) as e:
            keelson.compute_weights(shuffled, market="MKT")
        assert e.value.field == "period_labels" and e.value.row == 1
    assert str(e.value).startswith("the index is not sorted"), "str(e) is the message, no code repeated"


def test_tokens_timeouts_and_closed_clients_are_keelson_errors(server, window):
    with pytest.raises(InvalidInput) as e:
        Client(server.address, token="secret-token\n")
    assert e.value.field == "token" and "newline" in e.value.message
    with pytest.raises(InvalidInput) as e:
        Client(server.address, timeout=0)
    assert e.value.field == "timeout"
    keelson = Client(server.address)
    assert keelson.retry.window >= 10, "the default retry window outlasts a rolling restart"
    with pytest.raises(InvalidInput) as e:
        keelson.service_info(timeout=0)
    assert e.value.field == "timeout"
    assert keelson.service_info(timeout=5)["limits"]["maxFactors"]
    keelson.close()
    with pytest.raises(ClientClosed) as closed:
        keelson.compute_weights(window, market="MKT")
    assert isinstance(closed.value, KeelsonError) and closed.value.code == grpc.StatusCode.CANCELLED


def infeasible_request(window):
    held = pd.Series({name: (0.2 if i % 2 else -0.2) for i, name in enumerate(window.columns[1:6])})
    settings = {"max_gross": 0.1, "max_turnover": 0.05}
    return held, settings


def test_infeasible_limits_name_the_limits_and_the_error_pickles(server, window):
    held, settings = infeasible_request(window)
    with Client(server.address) as keelson:
        with pytest.raises(Infeasible) as e:
            keelson.compute_weights(window, market="MKT", settings=settings, previous_weights=held)
    err = e.value
    assert err.code == grpc.StatusCode.FAILED_PRECONDITION and err.reason == "CONSTRAINTS_INFEASIBLE"
    assert err.domain == "keelson.v1"
    fields = sorted(v.field for v in err.violations)
    assert fields == ["settings.max_gross", "settings.max_turnover"], err.violations
    assert err.field in fields
    assert not str(err).startswith("FAILED_PRECONDITION"), str(err)
    # Pickling keeps the class and every attribute (multiprocessing, joblib, dask).
    for original in (err, InvalidInput(grpc.StatusCode.INVALID_ARGUMENT, "m", metadata={"field": "f", "row": "3"}),
                     ClientClosed(grpc.StatusCode.CANCELLED, "closed")):
        back = pickle.loads(pickle.dumps(original))
        assert type(back) is type(original)
        assert (back.code, back.message, back.reason, back.domain, back.violations, back.field, back.row, str(back)) \
            == (original.code, original.message, original.reason, original.domain, original.violations,
                original.field, original.row, str(original))
    with concurrent.futures.ProcessPoolExecutor(1) as pool:
        with pytest.raises(Infeasible) as remote:
            pool.submit(_raise, err).result()
    assert remote.value.violations == err.violations
    warning = pickle.loads(pickle.dumps(KeelsonWarning("kappa-at-grid-edge", "text")))
    assert (warning.code, warning.message) == ("kappa-at-grid-edge", "text")


def _raise(error):
    raise error


def test_server_warnings_reach_warnings_and_logging(server, window, caplog):
    caplog.set_level(logging.WARNING, logger="keelson_client")
    with Client(server.address) as keelson:
        with pytest.warns(KeelsonWarning) as caught:
            result = keelson.compute_weights(window, market="MKT", request_id="py-warned")
        assert result.warnings, "the default fit of the test window carries a warning"
        assert {w.message.code for w in caught} == {code for code, _ in result.warnings}
        assert any("py-warned" in r.getMessage() and r.levelno == logging.WARNING for r in caplog.records)
        # Strict jobs: -W error::KeelsonWarning.
        with warnings.catch_warnings():
            warnings.simplefilter("error", KeelsonWarning)
            with pytest.raises(KeelsonWarning):
                keelson.compute_weights(window, market="MKT")


def test_retries_outlast_a_restart_and_are_logged(window, caplog):
    caplog.set_level(logging.INFO, logger="keelson_client")
    port = free_port()
    first = Server(port=port)
    first.wait_until_up()
    assert first.stop() == 0
    holder = {}

    def restart():
        time.sleep(1.5)
        holder["server"] = Server(port=port)

    t = threading.Thread(target=restart)
    t.start()
    try:
        with Client(f"127.0.0.1:{port}", timeout=30) as keelson:
            result = keelson.compute_weights(window, market="MKT")
            assert keelson.retries_made > 0
        assert len(result.weights) == window.shape[1] - 1
        assert any("retrying ComputeWeights" in r.getMessage() and "UNAVAILABLE" in r.getMessage()
                   for r in caplog.records), [r.getMessage() for r in caplog.records]
    finally:
        t.join()
        holder["server"].stop()


def test_one_deadline_covers_every_retry(window):
    nobody = f"127.0.0.1:{free_port()}"
    started = time.monotonic()
    with Client(nobody, timeout=1.5, retry_window=60) as keelson:
        with pytest.raises(DeadlineExceeded) as e:
            keelson.compute_weights(window, market="MKT")
        assert keelson.retries_made > 0
    elapsed = time.monotonic() - started
    assert "UNAVAILABLE" in e.value.message and e.value.reason == "CLIENT_DEADLINE", e.value
    # The deadline, not the 60 s retry window, ended the call.
    assert elapsed < 30, elapsed


def test_index_types_come_back_as_they_went_in(server, window):
    monthly = window.set_axis(pd.period_range("2001-01", periods=len(window), freq="M"))
    timed = window.set_axis(pd.date_range("2001-01-31 16:00", periods=len(window), freq="ME")
                            + pd.Timedelta(hours=16))
    with Client(server.address) as keelson:
        weights = keelson.compute_weights(monthly, market="MKT")
        periods = keelson.run_backtest(monthly, market="MKT", window=60, step=12, skip_baselines=True)
        times = keelson.run_backtest(timed, market="MKT", window=60, step=12, skip_baselines=True)
    assert weights.weights.index.name == "factor" and weights.model_weights.index.name == "factor"
    assert weights.diagnostics["periodsPerYear"] == 12
    assert isinstance(periods.returns.index, pd.PeriodIndex) and periods.returns.index.freqstr == "M"
    assert list(periods.returns.index) == list(monthly.index[60:])
    assert isinstance(times.returns.index, pd.DatetimeIndex)
    assert list(times.returns.index) == list(timed.index[60:]), "times of day kept"
    assert np.allclose(periods.returns.to_numpy(), times.returns.to_numpy())


def test_the_async_client_gives_the_same_answers(server, window):
    with Client(server.address) as keelson:
        expected = keelson.compute_weights(window, market="MKT", request_id="py-sync")

    async def main():
        seen = []
        async with AsyncClient(server.address) as keelson:
            result = await keelson.compute_weights(window, market="MKT", request_id="py-async", timeout=10)
            info = await keelson.service_info()
            backtest = await keelson.run_backtest(window, market="MKT", window=60, step=12, skip_baselines=True,
                                                  on_progress=lambda d, t: seen.append((d, t)))
            with pytest.raises(InvalidInput):
                await keelson.service_info(timeout=0)
        with pytest.raises(ClientClosed):
            await keelson.service_info()
        return result, info, backtest, seen

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", KeelsonWarning)
        result, info, backtest, seen = asyncio.run(main())
    assert result.fingerprint == expected.fingerprint
    assert result.weights.equals(expected.weights)
    assert info["limits"]["maxFactors"] > 0
    assert seen and seen[-1][0] == seen[-1][1]
    assert backtest.returns.shape[0] == len(window) - 60


def test_packaging_metadata_and_one_version():
    try:
        meta = importlib.metadata.metadata("keelson-client")
    except importlib.metadata.PackageNotFoundError:
        pytest.skip("keelson-client is not installed (source tree on PYTHONPATH)")
    assert importlib.metadata.version("keelson-client") == keelson_client.__version__
    assert meta.get("License-Expression") == "Apache-2.0", dict(meta)
    files = [str(f) for f in importlib.metadata.files("keelson-client") or []]
    assert any(f.endswith("LICENSE") for f in files), files
    assert any(f.endswith("keelson_client/py.typed") for f in files), files
    with open(os.path.join(ROOT, "LICENSE")) as a, open(os.path.join(PACKAGE, "LICENSE")) as b:
        assert a.read() == b.read(), "one licence text"


def test_the_server_logs_the_request_id_and_user_agent(window, tmp_path):
    log_path = tmp_path / "server.log"
    with open(log_path, "w") as log:
        s = Server(log=log, KEELSON__LOG__LEVEL="info")
        try:
            s.wait_until_up()
            with Client(s.address) as keelson:
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore", KeelsonWarning)
                    keelson.compute_weights(window, market="MKT", request_id="py-agent-check")
        finally:
            s.stop()
    lines = [line for line in log_path.read_text().splitlines() if "py-agent-check" in line]
    assert lines, log_path.read_text()[-2000:]
    assert any(keelson_client.USER_AGENT in line for line in lines), lines
