#!/usr/bin/env python3
"""A real second client: Python grpcio against a running `keelson serve`.

Generates Python stubs from proto/keelson/v1/weights.proto at run time with
grpcio-tools, starts the server on a free loopback port, checks health and
reflection, sends a window read from CSV and compares the weights with
`keelson fit --format json` on the same file, checks an invalid request,
then stops the server with SIGTERM.

Usage: grpc_client_check.py --keelson target/debug/keelson --returns FILE.csv --market MKT
"""

import argparse
import csv
import json
import math
import os
import signal
import socket
import subprocess
import sys
import tempfile
import time

ROOT = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
CHECKS = []


def check(name, ok, detail=""):
    CHECKS.append((name, bool(ok)))
    print(("ok   " if ok else "FAIL ") + name + (f": {detail}" if detail and not ok else ""))


def generate_stubs(out):
    from grpc_tools import protoc
    import grpc_tools

    include = os.path.join(os.path.dirname(grpc_tools.__file__), "_proto")
    rc = protoc.main([
        "protoc", f"-I{os.path.join(ROOT, 'proto')}", f"-I{include}",
        f"--python_out={out}", f"--grpc_python_out={out}", "keelson/v1/weights.proto",
    ])
    if rc != 0:
        raise SystemExit(f"protoc failed with {rc}")
    sys.path.insert(0, out)


def free_port():
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def read_window(path, market):
    with open(path) as f:
        rows = list(csv.reader(f))
    header, body = rows[0], rows[1:]
    mcol = header.index(market)
    fcols = [i for i in range(1, len(header)) if i != mcol]
    cell = lambda s: math.nan if s in ("", "NA") else float(s)
    return dict(
        names=[header[i] for i in fcols],
        labels=[r[0] for r in body],
        values=[cell(r[i]) for r in body for i in fcols],
        market=[float(r[mcol]) for r in body],
        rows=len(body),
        cols=len(fcols),
    )


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--keelson", required=True)
    ap.add_argument("--returns", required=True)
    ap.add_argument("--market", default="MKT")
    args = ap.parse_args()

    tmp = tempfile.mkdtemp(prefix="keelson-py-")
    generate_stubs(tmp)
    import grpc
    from grpc_health.v1 import health_pb2, health_pb2_grpc
    from grpc_reflection.v1alpha.proto_reflection_descriptor_database import ProtoReflectionDescriptorDatabase
    from keelson.v1 import weights_pb2, weights_pb2_grpc

    port = free_port()
    metrics_port = free_port()
    env = dict(os.environ, KEELSON__LOG__LEVEL="warn", KEELSON__METRICS__ADDRESS=f"127.0.0.1:{metrics_port}")
    server = subprocess.Popen([args.keelson, "serve", "--addr", f"127.0.0.1:{port}"], env=env)
    try:
        channel = grpc.insecure_channel(f"127.0.0.1:{port}")
        health = health_pb2_grpc.HealthStub(channel)
        serving = False
        for _ in range(300):  # at most 30 s for the server to come up
            try:
                r = health.Check(health_pb2.HealthCheckRequest(service=""), timeout=1)
                serving = r.status == health_pb2.HealthCheckResponse.SERVING
                if serving:
                    break
            except grpc.RpcError:
                time.sleep(0.1)
        check("health: server SERVING", serving)
        for name in ["liveness", "readiness", "keelson.v1.WeightsService"]:
            r = health.Check(health_pb2.HealthCheckRequest(service=name), timeout=5)
            check(f"health: {name} SERVING", r.status == health_pb2.HealthCheckResponse.SERVING)

        services = set(ProtoReflectionDescriptorDatabase(channel).get_services())
        check("reflection lists keelson.v1.WeightsService", "keelson.v1.WeightsService" in services, services)

        w = read_window(args.returns, args.market)
        stub = weights_pb2_grpc.WeightsServiceStub(channel)
        req = weights_pb2.ComputeWeightsRequest(
            factor_names=w["names"],
            period_labels=w["labels"],
            returns=weights_pb2.Matrix(rows=w["rows"], cols=w["cols"], values=w["values"]),
            market_returns=w["market"],
            market_name=args.market,
            request_id="py-1",
        )
        resp = stub.ComputeWeights(req, timeout=60)
        check("request id echoed", resp.request_id == "py-1")

        fit = subprocess.run(
            [args.keelson, "fit", "--returns", args.returns, "--market", args.market, "--format", "json"],
            check=True, capture_output=True, text=True,
        )
        local = json.loads(fit.stdout)
        same = [x.factor == y["factor"] and x.weight == y["weight"] for x, y in zip(resp.weights, local["weights"])]
        check("weights over gRPC equal `keelson fit` exactly", len(same) == len(local["weights"]) and all(same))
        check("market weight equal", resp.market_weight == local["marketWeight"])
        check("fingerprint equal", resp.fingerprint == local["fingerprint"])
        check("K and kappa equal", resp.diagnostics.num_components == local["diagnostics"]["numComponents"]
              and resp.diagnostics.kappa == local["diagnostics"]["kappa"])

        bad = weights_pb2.ComputeWeightsRequest()
        bad.CopyFrom(req)
        bad.returns.values[5] = math.inf
        try:
            stub.ComputeWeights(bad, timeout=10)
            check("infinite value rejected", False, "no error")
        except grpc.RpcError as e:
            check("infinite value rejected with INVALID_ARGUMENT", e.code() == grpc.StatusCode.INVALID_ARGUMENT, e.code())
            check("error names row and column", "row 0" in e.details() and "column 5" in e.details(), e.details())

        # The Prometheus endpoint, read with the standard library's HTTP client.
        import urllib.request
        text = urllib.request.urlopen(f"http://127.0.0.1:{metrics_port}/metrics", timeout=10).read().decode()
        ok_line = ('grpc_server_handled_total{grpc_service="keelson.v1.WeightsService",'
                   'grpc_method="ComputeWeights",grpc_type="unary",grpc_code="OK"} 1')
        bad_line = ('grpc_server_handled_total{grpc_service="keelson.v1.WeightsService",'
                    'grpc_method="ComputeWeights",grpc_type="unary",grpc_code="InvalidArgument"} 1')
        check("metrics count the successful call", ok_line in text, ok_line)
        check("metrics count the rejected call", bad_line in text, bad_line)
    finally:
        server.send_signal(signal.SIGTERM)
        try:
            rc = server.wait(timeout=30)
        except subprocess.TimeoutExpired:
            server.kill()
            rc = None
    check("server exits 0 on SIGTERM", rc == 0, rc)

    failed = sum(1 for _, ok in CHECKS if not ok)
    print(f"python grpcio client: {len(CHECKS) - failed} passed, {failed} failed")
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
