#!/bin/sh
# The image's install step, kept in one file so CI can run exactly the same commands in a fresh
# virtual environment (no container engine runs on the CI machines).
# Usage: install.sh SOURCE_DIR   (with the target Python's pip first on PATH)
set -eu
src="${1:-.}"
python -m pip install --no-cache-dir --upgrade pip
python -m pip install --no-cache-dir "${src}[postgres]"
