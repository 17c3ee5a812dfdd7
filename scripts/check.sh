#!/usr/bin/env bash
# Everything the project checks, from a fresh machine: system packages the tests need, the
# service and the Python client in editable mode, then every test suite and the static checks.
# The README's test command; .ci/run calls it after making sure PostgreSQL is up.
set -euo pipefail
cd "$(dirname "$0")/.."

need=()
for pkg in libcurl4-openssl-dev locales chromium; do
    dpkg -s "$pkg" >/dev/null 2>&1 || need+=("$pkg")
done
if ((${#need[@]})); then
    apt-get update -q
    DEBIAN_FRONTEND=noninteractive apt-get install -y -q "${need[@]}"
fi

python3 -m pip install -q -e '.[test,postgres]' -e 'clients/python[test]'

python3 -m pytest
if pg_isready -h 127.0.0.1 -p 5432 -q 2>/dev/null; then
    PHASEWARD_TEST_DATABASE_URL="postgresql+psycopg://postgres@127.0.0.1:5432/test" \
        python3 -m pytest tests/service tests/fuzz -q -p no:cacheprovider
fi
(cd clients/python && python3 -m pytest -q -p no:cacheprovider)
make -C clients/c test
clients/c/run_test.sh
bash docker/check_build.sh

ruff check service tests bench clients/python
ruff format --check service tests bench clients/python
mypy
(cd clients/python && mypy)
