#!/usr/bin/env bash
# CI's stand-in for `docker build`: the image's install step in a fresh virtual environment,
# then the image's command and health check against the installed service.
set -euo pipefail
root="$(cd "$(dirname "$0")/.." && pwd)"
work="$(mktemp -d)"
trap 'kill "${server:-0}" 2>/dev/null || true; rm -rf "$work"' EXIT

python3 -m venv "$work/venv"
mkdir "$work/src"
cp -r "$root/pyproject.toml" "$root/README.md" "$root/service" "$work/src/"  # the COPY lines
PATH="$work/venv/bin:$PATH" sh "$root/docker/install.sh" "$work/src" >"$work/install.log" 2>&1 \
    || { cat "$work/install.log"; echo "the install step failed"; exit 1; }

port="$(python3 -c 'import socket; s=socket.socket(); s.bind(("127.0.0.1",0)); print(s.getsockname()[1])')"
(cd "$work" && PHASEWARD_HOST=127.0.0.1 PHASEWARD_PORT="$port" PHASEWARD_DATA_DIR="$work/data" \
    "$work/venv/bin/phaseward" serve >"$work/serve.log" 2>&1) &
server=$!
for _ in $(seq 1 100); do
    if PHASEWARD_PORT="$port" "$work/venv/bin/python" "$root/docker/healthcheck.py"; then
        curl -fsS "http://127.0.0.1:$port/" | grep -q "phaseward" || { echo "page missing"; exit 1; }
        echo "docker build steps: installed in a fresh venv, served, healthy, page served"
        exit 0
    fi
    sleep 0.2
done
cat "$work/serve.log"
echo "the installed service did not become healthy"
exit 1
