"""keelson_client against a real `keelson serve` started by the tests.

The server binary is KEELSON_BIN (default: the repository's target/debug/keelson).
Each server listens on an ephemeral loopback port with its metrics endpoint on
another ephemeral port. The expected weights come from `keelson fit --format json`
on the same CSV file: the library's own answer, outside this package.
"""

import concurrent.futures
import json
import math
import subprocess
import tempfile

import grpc
import numpy as np
import pandas as pd
import pytest

from keelson_client import Client, KeelsonError

from conftest import DATA, KEELSON, Server


def keelson_fit(*args):
    out = subprocess.run([KEELSON, "fit", "--returns", *args, "--format", "json"], check=True,
                         capture_output=True, text=True).stdout
    return json.loads(out)


def assert_same_weights(result, local):
    expected = pd.Series({w["factor"]: w["weight"] for w in local["weights"]})
    got = result.weights.reindex(expected.index)
    scale = max(1.0, float(expected.abs().max()))
    assert np.allclose(got.to_numpy(), expected.to_numpy(), rtol=0, atol=1e-12 * scale), (got - expected).abs().max()
    assert abs(result.market_weight - local["marketWeight"]) <= 1e-12 * scale
    assert result.fingerprint == local["fingerprint"]


def test_the_readme_example_gives_keelson_fit_weights(server, window):
    # The README's five lines.
    with Client(server.address) as keelson:
        result = keelson.compute_weights(window, market="MKT")
    assert_same_weights(result, keelson_fit(DATA, "--market", "MKT"))
    assert list(result.weights.index) == [c for c in window.columns if c != "MKT"]
    assert result.diagnostics["numComponents"] >= 1 and "cvSharpe" in result.diagnostics
    frame = result.to_frame()
    assert frame.loc[frame.index[0], "weight"] == result.weights.iloc[0]
    assert {"eigenvalue", "coefficient", "loadings"} <= set(result.components.columns)


def test_settings_and_previous_weights_match_the_command_line(server, window):
    held = pd.Series({"f01": 0.3, "f02": -0.1, "MKT": -0.05})
    with tempfile.NamedTemporaryFile("w", suffix=".csv", delete=False) as f:
        f.write("factor,weight\n" + "".join(f"{k},{v!r}\n" for k, v in held.items()))
    settings = {"method": "components", "scaling": "covariance", "kappa": "auto", "max_weight": 0.15,
                "cost_bps": 5, "target_volatility": 0.08}
    with Client(server.address) as keelson:
        result = keelson.compute_weights(window, market="MKT", settings=settings, previous_weights=held,
                                         request_id="py-settings")
    sets = [a for k, v in settings.items() for a in ("--set", f"{k}={v}")]
    assert_same_weights(result, keelson_fit(DATA, "--market", "MKT", "--previous-weights", f.name, *sets))
    assert result.request_id == "py-settings"
    assert (result.weights.abs() <= 0.15 + 1e-9).all()
    assert not np.allclose(result.weights, result.model_weights), "the cap binds: implemented differs from model"


def test_a_market_series_and_a_datetime_index_work(server, window):
    frame = window.drop(columns=["MKT"])
    frame.index = pd.to_datetime(frame.index + "-01")
    with Client(server.address) as keelson:
        result = keelson.compute_weights(frame, market=window["MKT"].set_axis(frame.index))
    assert_same_weights(result, keelson_fit(DATA, "--market", "MKT") | {"fingerprint": result.fingerprint})


def test_a_missing_value_names_its_row_and_column(server, window):
    factors = window.drop(columns=["MKT"])
    factors.iloc[5, 3] = np.nan
    with Client(server.address) as keelson:
        with pytest.raises(KeelsonError) as err:
            keelson.compute_weights(factors, market=window["MKT"], settings={"missing_policy": "reject"})
    e = err.value
    assert e.code == grpc.StatusCode.INVALID_ARGUMENT
    assert (e.row, e.column) == (5, 3)
    assert e.factor == factors.columns[3] and e.period == factors.index[5]
    assert e.field == "returns" and e.reason
    assert any(path.startswith("returns.values[") for path, _ in e.violations), e.violations


def test_bad_settings_are_refused_with_the_field(server, window):
    with Client(server.address) as keelson:
        with pytest.raises(KeelsonError) as unknown:
            keelson.compute_weights(window, market="MKT", settings={"scalng": "sharpe"})
        with pytest.raises(KeelsonError) as out_of_range:
            keelson.compute_weights(window, market="MKT", settings={"folds": 1})
    assert "did you mean scaling" in str(unknown.value) and unknown.value.field == "settings.scalng"
    assert out_of_range.value.code == grpc.StatusCode.INVALID_ARGUMENT
    assert out_of_range.value.field == "settings.folds", out_of_range.value.metadata


def test_service_info_gives_defaults_and_limits(server):
    with Client(server.address) as keelson:
        info = keelson.service_info()
    assert info["defaultSettings"]["method"] == "METHOD_BLEND"
    assert int(info["limits"]["maxFactors"]) > 0
    assert {s["name"] for s in info["settings"]} >= {"method", "max_weight", "seed"}


def test_a_backtest_streams_progress_then_the_result(server, window):
    progress = []
    with Client(server.address, timeout=300) as keelson:
        bt = keelson.run_backtest(window, market="MKT", window=60, step=6, benchmarks=[["MKT", "f01"]],
                                  settings={"method": "components"}, on_progress=lambda d, t: progress.append((d, t)))
    assert progress and all(a[0] <= b[0] for a, b in zip(progress, progress[1:]))
    assert progress[-1][0] <= progress[-1][1]
    assert bt.returns.shape[0] == len(window) - 60
    assert bt.returns.columns[0] == "configured" and "market" in bt.returns.columns
    assert list(bt.performance.index) == list(bt.returns.columns)
    assert np.isclose(bt.performance.loc["market", "mean"], 12 * window["MKT"].iloc[60:].mean(), rtol=1e-12)
    assert bt.summary["provenance"]["invocation"].startswith("RunBacktest request")
    assert any(a["benchmarks"] == ["market", "f01"] for a in bt.summary["alphas"])


def test_an_interrupt_cancels_the_backtest(server, window):
    def interrupt(done, total):
        raise KeyboardInterrupt

    with Client(server.address, timeout=300) as keelson:
        with pytest.raises(KeyboardInterrupt):
            keelson.run_backtest(window, market="MKT", window=60, step=1, on_progress=interrupt)
        # The server is still serving.
        assert keelson.service_info()["serverVersion"]


def test_shed_requests_are_retried_with_backoff():
    # One request admitted at a time: concurrent calls are shed with RESOURCE_EXHAUSTED.
    s = Server(KEELSON__SERVER__MAX_IN_FLIGHT=1, KEELSON__SERVER__WORKERS=1)
    try:
        s.wait_until_up()
        rng = np.random.default_rng(7)
        big = pd.DataFrame(0.01 * rng.standard_normal((240, 150)), columns=[f"g{i:03d}" for i in range(150)],
                           index=[f"{2000 + t // 12}-{t % 12 + 1:02d}" for t in range(240)])
        settings = {"method": "components"}

        def calls(client):
            return [client.compute_weights(big, settings=settings).fingerprint for _ in range(3)]

        with Client(s.address, retries=0) as impatient:
            with concurrent.futures.ThreadPoolExecutor(4) as pool:
                outcomes = [f.exception() for f in [pool.submit(calls, impatient) for _ in range(4)]]
        shed = [e for e in outcomes if e is not None]
        assert shed, "with no retries some calls are shed"
        assert all(e.code == grpc.StatusCode.RESOURCE_EXHAUSTED and e.reason == "OVERLOADED" for e in shed)

        with Client(s.address, retries=12, backoff=0.02, max_backoff=0.5) as patient:
            with concurrent.futures.ThreadPoolExecutor(4) as pool:
                results = [f.result() for f in [pool.submit(calls, patient) for _ in range(4)]]
            assert patient.retries_made > 0, "calls were shed and retried"
        assert len({fp for r in results for fp in r}) == 1, "every retried call got the same answer"
    finally:
        assert s.stop() == 0


def test_tls_and_a_bearer_token(tmp_path, window):
    # A CA and a server certificate for 127.0.0.1, made with the openssl command.
    def openssl(*args):
        subprocess.run(["openssl", *args], check=True, capture_output=True)

    ca_key, ca, key, csr, cert = (tmp_path / n for n in ("ca.key", "ca.pem", "server.key", "server.csr", "server.pem"))
    openssl("req", "-x509", "-newkey", "rsa:2048", "-nodes", "-keyout", ca_key, "-out", ca, "-days", "2",
            "-subj", "/CN=keelson test CA")
    openssl("req", "-newkey", "rsa:2048", "-nodes", "-keyout", key, "-out", csr, "-subj", "/CN=127.0.0.1")
    ext = tmp_path / "ext.cnf"
    ext.write_text("subjectAltName=IP:127.0.0.1,DNS:localhost\n")
    openssl("x509", "-req", "-in", csr, "-CA", ca, "-CAkey", ca_key, "-CAcreateserial", "-out", cert, "-days", "2",
            "-extfile", ext)
    s = Server(KEELSON__TLS__CERT_FILE=cert, KEELSON__TLS__KEY_FILE=key, KEELSON__AUTH__TOKENS="py-secret-token-0123456789")
    try:
        s.wait_until_up(root_certificates=str(ca), token="py-secret-token-0123456789")
        with Client(s.address, root_certificates=str(ca), token="py-secret-token-0123456789") as keelson:
            result = keelson.compute_weights(window, market="MKT")
        assert_same_weights(result, keelson_fit(DATA, "--market", "MKT"))
        with Client(s.address, root_certificates=ca.read_bytes()) as anonymous:
            with pytest.raises(KeelsonError) as err:
                anonymous.compute_weights(window, market="MKT")
        assert err.value.code == grpc.StatusCode.UNAUTHENTICATED
        with Client(s.address, token="py-secret-token-0123456789", retries=0, timeout=5) as plaintext:
            with pytest.raises(KeelsonError) as err:
                plaintext.compute_weights(window, market="MKT")
        assert err.value.code in (grpc.StatusCode.UNAVAILABLE, grpc.StatusCode.INTERNAL), err.value
    finally:
        assert s.stop() == 0


def test_nan_returns_pass_as_missing_values(server, window):
    factors = window.drop(columns=["MKT"])
    factors.iloc[:4, 2] = math.nan
    with Client(server.address) as keelson:
        result = keelson.compute_weights(factors, market=window["MKT"])
    excluded = result.to_frame().loc[factors.columns[2]]
    assert bool(excluded["excluded"]) and result.weights[factors.columns[2]] == 0.0


def test_the_frequency_is_read_from_the_index_and_a_contradiction_refused(server, window):
    # SPEC §13: business days (pandas bdate_range) → 252 a year; quarters → 4, each sent
    # from the index's frequency and checked by the server against the labels (so not
    # "inferred"); without a frequency on the index the server reads it from the labels; a
    # stated monthly frequency that daily labels contradict → FREQUENCY_MISMATCH naming both.
    factors = window.drop(columns=["MKT"])
    daily = factors.set_axis(pd.bdate_range("2015-01-02", periods=len(factors)))
    quarterly = factors.set_axis(pd.period_range("1990Q1", periods=len(factors), freq="Q"))
    with Client(server.address) as keelson:
        d = keelson.compute_weights(daily).diagnostics
        q = keelson.compute_weights(quarterly).diagnostics
        with pytest.raises(KeelsonError) as err:
            keelson.compute_weights(daily, settings={"periods_per_year": 12})
        unchecked = keelson.compute_weights(daily, settings={"periods_per_year": 12, "frequency_check": False})
        labels_only = keelson.compute_weights(daily.set_axis(daily.index.strftime("%Y-%m-%d"))).diagnostics
    assert (d["periodsPerYear"], d["periodsPerYearInferred"]) == (252, False)
    assert (q["periodsPerYear"], q["periodsPerYearInferred"]) == (4, False)
    assert (labels_only["periodsPerYear"], labels_only["periodsPerYearInferred"]) == (252, True)
    e = err.value
    assert e.code == grpc.StatusCode.INVALID_ARGUMENT and e.reason == "FREQUENCY_MISMATCH"
    assert e.field == "settings.periods_per_year" and e.metadata.get("inferred") == "252"
    assert unchecked.diagnostics["periodsPerYear"] == 12
