#!/usr/bin/env python3
"""Generates the gRPC stubs of keelson_client from the repository's proto/.

    python clients/python/generate_stubs.py          # writes keelson_client/_proto/
    python clients/python/generate_stubs.py --check  # fails if the committed stubs differ

Uses grpcio-tools 1.62.3 (clients/python/stub-tools.txt, in a virtual
environment of its own: it needs protobuf 4), whose gencode loads on every
protobuf and grpcio the package supports. The generated
service module imports its messages with an absolute `keelson.v1` import;
it is rewritten to a relative one so that the stubs live inside the package.
"""

import argparse
import os
import sys
import tempfile

HERE = os.path.dirname(os.path.abspath(__file__))
ROOT = os.path.dirname(os.path.dirname(HERE))
OUT = os.path.join(HERE, "keelson_client", "_proto")
FILES = ("weights_pb2.py", "weights_pb2_grpc.py", "weights_pb2.pyi")


def generate(into):
    import grpc_tools
    from grpc_tools import protoc

    include = os.path.join(os.path.dirname(grpc_tools.__file__), "_proto")
    rc = protoc.main([
        "protoc", f"-I{os.path.join(ROOT, 'proto')}", f"-I{include}",
        f"--python_out={into}", f"--pyi_out={into}", f"--grpc_python_out={into}", "keelson/v1/weights.proto",
    ])
    if rc != 0:
        raise SystemExit(f"protoc failed with {rc}")
    out = {}
    for name in FILES:
        with open(os.path.join(into, "keelson", "v1", name)) as f:
            text = f.read()
        text = text.replace("from keelson.v1 import weights_pb2 as", "from . import weights_pb2 as")
        out[name] = text
    return out


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--check", action="store_true", help="compare with the committed stubs instead of writing")
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        fresh = generate(tmp)
    if args.check:
        stale = []
        for name, text in fresh.items():
            path = os.path.join(OUT, name)
            if not os.path.exists(path) or open(path).read() != text:
                stale.append(name)
        if stale:
            print(f"stale generated stubs: {', '.join(stale)}; run python clients/python/generate_stubs.py")
            return 1
        print(f"generated stubs match proto/ ({', '.join(sorted(fresh))})")
        return 0
    os.makedirs(OUT, exist_ok=True)
    for name, text in fresh.items():
        with open(os.path.join(OUT, name), "w") as f:
            f.write(text)
    print(f"wrote {len(fresh)} files to {os.path.relpath(OUT, ROOT)}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
