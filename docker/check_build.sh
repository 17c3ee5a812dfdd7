#!/usr/bin/env bash
# CI's stand-in for `docker build`: the image's install step in a fresh virtual environment,
# then the image's command and health check against the installed service, and the operator
# commands of that install. Stops the service it started, whatever happens.
set -euo pipefail
root="$(cd "$(dirname "$0")/.." && pwd)"
work="$(mktemp -d)"
server=""
stop() {
    if [ -n "$server" ]; then
        kill "$server" 2>/dev/null || true
        wait "$server" 2>/dev/null || true
    fi
    rm -rf "$work"
}
trap stop EXIT

python3 -m venv "$work/venv"
mkdir "$work/src"
# The Dockerfile's COPY lines.
cp -r "$root/pyproject.toml" "$root/README.md" "$root/service" "$work/src/"
mkdir -p "$work/src/clients/python" && cp -r "$root/clients/python/src" "$work/src/clients/python/"
PATH="$work/venv/bin:$PATH" sh "$root/docker/install.sh" "$work/src" >"$work/install.log" 2>&1 \
    || { cat "$work/install.log"; echo "the install step failed"; exit 1; }

port="$("$work/venv/bin/python" -c 'import socket; s=socket.socket(); s.bind(("127.0.0.1",0)); print(s.getsockname()[1])')"
cd "$work"
# The service itself is the background job (no subshell in between), so its pid is the one
# stopped on exit.
PHASEWARD_HOST=127.0.0.1 PHASEWARD_PORT="$port" PHASEWARD_DATA_DIR="$work/data" \
    "$work/venv/bin/phaseward" serve >"$work/serve.log" 2>&1 &
server=$!
for _ in $(seq 1 100); do
    if PHASEWARD_PORT="$port" "$work/venv/bin/python" "$root/docker/healthcheck.py"; then
        # Fetched whole into a file first: piped, grep -q stops reading at its first match and
        # curl, still writing the rest of the page, fails (23), which pipefail reports.
        curl -fsS "http://127.0.0.1:$port/" -o "$work/page.html"
        grep -q "phaseward" "$work/page.html" || { echo "page missing"; exit 1; }
        curl -fsS "http://127.0.0.1:$port/docs" -o "$work/docs.html"
        grep -q "swagger" "$work/docs.html" || { echo "API docs missing"; exit 1; }
        # The operator commands work in this install too (they import the bundled client):
        # the service asks for a key, so the command must say so in one line and exit 1.
        set +e
        said="$(PHASEWARD_URL="http://127.0.0.1:$port" "$work/venv/bin/phaseward" status demo-core 2>&1)"
        code=$?
        set -e
        if [ "$code" != 1 ] || [ "$(printf '%s\n' "$said" | wc -l)" != 1 ] || ! grep -q "401" <<<"$said"; then
            echo "phaseward status in the image's install answered ($code): $said"; exit 1
        fi
        echo "docker build steps: installed in a fresh venv, served, healthy, page and docs served, commands run"
        exit 0
    fi
    sleep 0.2
done
cat "$work/serve.log"
echo "the installed service did not become healthy"
exit 1
