#!/usr/bin/env bash
# Builds the FROM-scratch image with a Docker daemon started just for this
# run, runs it on a loopback port with host networking, and checks it:
# the image's own healthcheck command, one ComputeWeights call, the metrics
# endpoint, a non-root user, a clean exit on SIGTERM. Stops the container
# and the daemon it started (by process id) whatever happens.
#
# Needs: dockerd, containerd and runc (Debian's docker.io), root.
# Usage: deploy/check-image.sh   (from the repository root); with
# KEELSON_BIN=PATH it checks the image of that static binary instead of a
# fresh release build.
set -euo pipefail
cd "$(dirname "$0")/.."

root=$(mktemp -d /tmp/keelson-docker.XXXXXX)
sock="$root/docker.sock"
export DOCKER_HOST="unix://$sock"
export DOCKER_BUILDKIT=0
tag="keelson:ci-$$"
name="keelson-ci-$$"
dockerd_pid=""
container_started=""

cleanup() {
  set +e
  if [ -n "$container_started" ]; then
    docker rm -f "$name" >/dev/null 2>&1
  fi
  if [ -n "$dockerd_pid" ] && kill -0 "$dockerd_pid" 2>/dev/null; then
    kill -TERM "$dockerd_pid"
    for _ in $(seq 1 60); do kill -0 "$dockerd_pid" 2>/dev/null || break; sleep 0.5; done
    kill -0 "$dockerd_pid" 2>/dev/null && kill -KILL "$dockerd_pid"
  fi
  # containerd started by this dockerd exits with it; unmount anything left before removing the folder.
  grep " $root" /proc/mounts | awk '{print $2}' | sort -r | xargs -r -n1 umount -l 2>/dev/null
  rm -rf "$root"
}
trap cleanup EXIT

echo "-- docker daemon under $root (no bridge, no iptables)"
dockerd --data-root "$root/data" --exec-root "$root/exec" --pidfile "$root/dockerd.pid" \
  -H "$DOCKER_HOST" --bridge=none --iptables=false --ip6tables=false --storage-driver=vfs \
  >"$root/dockerd.log" 2>&1 &
dockerd_pid=$!
for _ in $(seq 1 120); do
  docker version >/dev/null 2>&1 && break
  kill -0 "$dockerd_pid" 2>/dev/null || { cat "$root/dockerd.log"; exit 1; }
  sleep 0.5
done
docker version --format 'daemon {{.Server.Version}}'

echo "-- static binary and image (deploy/build-image.sh)"
deploy/build-image.sh "$tag"
bin="${KEELSON_BIN:-target/x86_64-unknown-linux-gnu/release/keelson}"
ls -l "$bin"
docker image inspect "$tag" --format 'image size {{.Size}} bytes, user {{.Config.User}}'
user=$(docker image inspect "$tag" --format '{{.Config.User}}')
[ "$user" = "65532:65532" ] || { echo "error: image user is '$user'" >&2; exit 1; }

port=$(python3 -c 'import socket; s=socket.socket(); s.bind(("127.0.0.1",0)); print(s.getsockname()[1])')
mport=$(python3 -c 'import socket; s=socket.socket(); s.bind(("127.0.0.1",0)); print(s.getsockname()[1])')

echo "-- run on 127.0.0.1:$port (metrics $mport), host network"
docker run -d --name "$name" --network host --read-only --cap-drop ALL \
  --security-opt no-new-privileges:true \
  -e KEELSON__SERVER__ADDRESS="127.0.0.1:$port" -e KEELSON__METRICS__ADDRESS="127.0.0.1:$mport" \
  "$tag" serve >/dev/null
container_started=1
ready=""
for _ in $(seq 1 60); do
  if docker exec "$name" /keelson healthcheck --addr "http://127.0.0.1:$port" --service readiness >/dev/null 2>&1; then
    ready=1
    break
  fi
  sleep 0.5
done
[ -n "$ready" ] || { docker logs "$name"; echo "error: not ready" >&2; exit 1; }
echo "healthcheck inside the container: $(docker exec "$name" /keelson healthcheck --addr "http://127.0.0.1:$port" --service liveness)"

pid=$(docker inspect -f '{{.State.Pid}}' "$name")
uid=$(awk '/^Uid:/{print $2}' "/proc/$pid/status")
echo "container process $pid runs as uid $uid"
[ "$uid" = "65532" ] || { echo "error: the server runs as uid $uid" >&2; exit 1; }

echo "-- one ComputeWeights call from the host"
"$bin" call --addr "http://127.0.0.1:$port" --returns tests/reference/data/a_main.csv --market MKT \
  --set method=components --set components=3 --format json > "$root/response.json"
python3 - "$root/response.json" <<'PY'
import json, math, sys
r = json.load(open(sys.argv[1]))
w = [x["weight"] for x in r["weights"]]
assert len(w) == 20 and all(math.isfinite(v) for v in w) and any(v != 0 for v in w), w
print(f"ComputeWeights: {len(w)} finite weights, fingerprint {r['fingerprint'][:19]}...")
PY

echo "-- metrics"
python3 - "$mport" <<'PY'
import sys, urllib.request
text = urllib.request.urlopen(f"http://127.0.0.1:{sys.argv[1]}/metrics", timeout=10).read().decode()
line = ('grpc_server_handled_total{grpc_service="keelson.v1.WeightsService",grpc_method="ComputeWeights",'
        'grpc_type="unary",grpc_code="OK"} 1')
assert line in text, text
print("metrics: " + line)
PY

echo "-- docker HEALTHCHECK status"
health=""
for _ in $(seq 1 40); do
  health=$(docker inspect -f '{{.State.Health.Status}}' "$name")
  [ "$health" = "healthy" ] && break
  sleep 1
done
echo "health: $health"
[ "$health" = "healthy" ] || { echo "error: the image's HEALTHCHECK did not pass" >&2; exit 1; }

echo "-- SIGTERM"
docker stop -t 30 "$name" >/dev/null
code=$(docker inspect -f '{{.State.ExitCode}}' "$name")
echo "exit code after SIGTERM: $code"
[ "$code" = "0" ] || { docker logs "$name" | tail -20; exit 1; }
echo "image check: passed"
