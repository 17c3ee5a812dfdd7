#!/usr/bin/env bash
# End-to-end check of the C client: start phaseward on a free loopback port with a temporary
# data dir, define a 4-phase rail with curl, run the example, check with curl that its samples
# were stored, then run test_post. Exits non-zero on any failure.
set -euo pipefail
here="$(cd "$(dirname "$0")" && pwd)"
repo="$(cd "$here/../.." && pwd)"
cd "$here"
PYTHON="${PYTHON:-python3}"
RAIL=c-client-test

make -s all

free_port() {
    "$PYTHON" -c 'import socket; s = socket.socket(); s.bind(("127.0.0.1", 0)); print(s.getsockname()[1]); s.close()'
}

data="$(mktemp -d)"
port="$(free_port)"
base="http://127.0.0.1:$port"
env -u PHASEWARD_DATABASE_URL \
    PHASEWARD_DATA_DIR="$data" PHASEWARD_HOST=127.0.0.1 PHASEWARD_PORT="$port" \
    PHASEWARD_LOG_LEVEL=warning PHASEWARD_AUTH_MODE=open PYTHONPATH="$repo/service${PYTHONPATH:+:$PYTHONPATH}" \
    "$PYTHON" -m phaseward.cli serve >"$data/serve.log" 2>&1 &
pid=$!
cleanup() {
    kill "$pid" 2>/dev/null || true
    wait "$pid" 2>/dev/null || true
    rm -rf "$data"
}
trap cleanup EXIT

up=0
for _ in $(seq 1 600); do
    if curl -sf "$base/healthz" >/dev/null 2>&1; then
        up=1
        break
    fi
    if ! kill -0 "$pid" 2>/dev/null; then
        break
    fi
    sleep 0.1
done
if [ "$up" != 1 ]; then
    echo "run_test.sh: phaseward did not start" >&2
    cat "$data/serve.log" >&2
    exit 1
fi
echo "run_test.sh: phaseward serves $base (data in $data)"

code="$(curl -s -o "$data/rail.out" -w '%{http_code}' -X POST "$base/v1/rails" \
    -H 'content-type: application/json' --data-binary @test_rail.json)"
if [ "$code" != 201 ]; then
    echo "run_test.sh: creating the rail answered $code: $(cat "$data/rail.out")" >&2
    exit 1
fi

./build/example "$base" "$RAIL" 0

# The example posted seq 0 alone and 1..4 as a batch: all five must be stored as sent.
curl -sf "$base/v1/rails/$RAIL/samples?since=0&until=1e10" >"$data/window.json"
"$PYTHON" - "$data/window.json" <<'PY'
import json
import sys

window = json.load(open(sys.argv[1]))
problems = []
if window["seq"] != [0, 1, 2, 3, 4]:
    problems.append(f"stored seq {window['seq']}, expected [0, 1, 2, 3, 4]")
else:
    want_current = [[(60.0 + max(k - 1, 0)) / 4] * 4 for k in range(5)]
    if window["current_a"] != want_current:
        problems.append(f"currents {window['current_a']} != {want_current}")
    hot = [row[3] for row in window["temp_c"]]
    want_hot = [55.75, 55.75, 57.25, 58.75, 60.25]
    if hot != want_hot:
        problems.append(f"phase 3 temperatures {hot} != {want_hot}")
    if window["vout_v"] != [1.0] * 5 or window["vin_v"] != [12.0] * 5:
        problems.append("voltages differ from what was sent")
    steps = [round(b - a, 6) for a, b in zip(window["time_s"], window["time_s"][1:])]
    if steps != [0.1] * 4:
        problems.append(f"time steps {steps} != 0.1 s")
if problems:
    print("run_test.sh: " + "; ".join(problems), file=sys.stderr)
    sys.exit(1)
print("run_test.sh: the example's 5 samples are stored as sent")
PY

./build/test_post "$base" "$RAIL" "http://127.0.0.1:$(free_port)"

count="$(curl -sf "$base/v1/rails/$RAIL/samples?since=0&until=1e10" |
    "$PYTHON" -c 'import json, sys; w = json.load(sys.stdin); print(w["count"], sorted(w["seq"])[-3:])')"
if [ "$count" != "8 [100, 101, 102]" ]; then
    echo "run_test.sh: after test_post the rail holds $count, expected 8 ending [100, 101, 102]" >&2
    exit 1
fi
# Export: rehearse a small trace, fetch row 0 as a C header with export_settings, compile it.
trace_id="$(printf 'time_s,vin_v,i0_a,i1_a\n0,12,10,10\n1,12,25,10\n2,12,25,10\n3,12,10,10\n' |
    curl -sf -X POST "$base/v1/traces" -H 'content-type: text/csv' --data-binary @- |
    "$PYTHON" -c 'import json, sys; print(json.load(sys.stdin)["id"])')"
job="$(curl -sf -X POST "$base/v1/rehearsals" -H 'content-type: application/json' \
    -d "{\"trace\": {\"trace_id\": $trace_id}, \"settings\": {\"oc_level_a\": 20, \"oc_debounce_s\": 1}}" |
    "$PYTHON" -c 'import json, sys; print(json.load(sys.stdin)["id"])')"
for _ in $(seq 1 200); do
    state="$(curl -sf "$base/v1/rehearsals/$job" | "$PYTHON" -c 'import json, sys; print(json.load(sys.stdin)["status"])')"
    [ "$state" = done ] && break
    sleep 0.1
done
./build/export_settings "$base" "$job" 0 "$data/protection.h"
printf '#include "protection.h"\nint main(void) { return PW_OC_ENABLED == 1 && PW_OC_DEBOUNCE_NS == 1000000000LL ? 0 : 1; }\n' >"$data/use.c"
${CC:-cc} -std=c99 -Wall -Werror -I"$data" -o "$data/use" "$data/use.c"
"$data/use"
echo "run_test.sh: the exported header compiles and holds the rehearsed settings"

echo "run_test.sh: all checks passed"
