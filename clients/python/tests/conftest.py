"""Shared pieces of the client tests: a real `keelson serve` on a free loopback port
(KEELSON_BIN, default the repository's target/debug/keelson) and the test window."""

import os
import signal
import socket
import subprocess
import time

import grpc
import pandas as pd
import pytest

from keelson_client import Client, KeelsonError

ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__)))))
KEELSON = os.environ.get("KEELSON_BIN", os.path.join(ROOT, "target", "debug", "keelson"))
DATA = os.path.join(ROOT, "tests", "reference", "data", "a_main.csv")


def free_port():
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class Server:
    """`keelson serve` on a free loopback port, stopped with SIGTERM."""

    def __init__(self, port=None, log=None, **env):
        self.port = port or free_port()
        full = dict(os.environ, KEELSON__LOG__LEVEL="warn", KEELSON__METRICS__ADDRESS="127.0.0.1:0")
        full.update({k: str(v) for k, v in env.items()})
        self.process = subprocess.Popen([KEELSON, "serve", "--addr", f"127.0.0.1:{self.port}"], env=full,
                                        stderr=log, stdout=log)
        self.address = f"127.0.0.1:{self.port}"

    def wait_until_up(self, **client_kwargs):
        deadline = time.monotonic() + 60
        while True:
            try:
                with Client(self.address, timeout=2, retries=0, **client_kwargs) as c:
                    c.service_info()
                return
            except KeelsonError as e:
                if e.code == grpc.StatusCode.UNAUTHENTICATED:
                    return
                if time.monotonic() > deadline or self.process.poll() is not None:
                    raise
                time.sleep(0.1)

    def stop(self):
        self.process.send_signal(signal.SIGTERM)
        try:
            return self.process.wait(timeout=30)
        except subprocess.TimeoutExpired:
            self.process.kill()
            return None


@pytest.fixture(scope="module")
def server():
    s = Server()
    s.wait_until_up()
    yield s
    assert s.stop() == 0, "the server exits 0 on SIGTERM"


@pytest.fixture(scope="module")
def window():
    # Round-trip parsing reads each number as the service's CSV reader does, on every
    # pandas version (pandas' default fast parser can differ in the last bit).
    return pd.read_csv(DATA, index_col=0, float_precision="round_trip")
