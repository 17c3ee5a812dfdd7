#!/usr/bin/env bash
# Everything the project checks, from a fresh machine: system packages the tests need, a project
# virtual environment (.venv) with the service and the Python client in editable mode, then every
# test suite and the static checks, all run with the venv's interpreter, and last a check that no
# process any of them started is still running.
# The README's test command; .ci/run calls it after making sure PostgreSQL is up.
set -euo pipefail
cd "$(dirname "$0")/.."

need=()
for pkg in libcurl4-openssl-dev locales chromium; do
    dpkg -s "$pkg" >/dev/null 2>&1 || need+=("$pkg")
done
# Debian and Ubuntu ship venv's pip bootstrap separately from python3.
python3 -c 'import ensurepip' 2>/dev/null || need+=("python3-venv")
if ((${#need[@]})); then
    if [ "$(id -u)" != 0 ]; then
        echo "check.sh: needs the system packages ${need[*]}: install them (as root: apt-get install ${need[*]})" >&2
        exit 1
    fi
    apt-get update -q
    DEBIAN_FRONTEND=noninteractive apt-get install -y -q "${need[@]}"
fi

# A virtual environment of the project's own: works where the system Python forbids global
# installs (PEP 668) and where it allows them, and leaves the system Python untouched.
[ -x .venv/bin/python ] || python3 -m venv .venv
venv="$PWD/.venv/bin"
"$venv/python" -m pip install -q --upgrade pip
"$venv/python" -m pip install -q -e '.[test,postgres]' -e 'clients/python[test]'
export PATH="$venv:$PATH"  # every python3, phaseward, pytest, ruff and mypy below is the venv's

# Every process started from here on carries this mark; scripts/leftovers.py finds any of them
# still running at the end.
export PHASEWARD_CHECK_MARK="check-$$-$RANDOM"

"$venv/python" -m pytest
if pg_isready -h 127.0.0.1 -p 5432 -q 2>/dev/null; then
    PHASEWARD_TEST_DATABASE_URL="postgresql+psycopg://postgres@127.0.0.1:5432/test" \
        "$venv/python" -m pytest tests/service tests/fuzz -q -p no:cacheprovider
fi
(cd clients/python && "$venv/python" -m pytest -q -p no:cacheprovider)
make -C clients/c test
PYTHON="$venv/python" clients/c/run_test.sh
bash docker/check_build.sh

"$venv/ruff" check service tests bench clients/python scripts
"$venv/ruff" format --check service tests bench clients/python scripts
"$venv/mypy"
(cd clients/python && "$venv/mypy")

"$venv/python" scripts/leftovers.py "$PHASEWARD_CHECK_MARK"
