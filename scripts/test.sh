#!/usr/bin/env bash
# Install everything (Debian packages for the virtual screen, the Python
# environment in ./.venv with every extra) and run the whole test suite.
# Usage: bash scripts/test.sh [extra pytest arguments]
set -euo pipefail
cd "$(dirname "$0")/.."
if [ "$(id -u)" = 0 ] && command -v apt-get >/dev/null 2>&1; then
  export DEBIAN_FRONTEND=noninteractive
  apt-get update -qq
  apt-get install -y -qq $(grep -v '^#' scripts/system-packages.txt) >/dev/null
fi
PY=${PYTHON:-python3.11}
command -v "$PY" >/dev/null 2>&1 || PY=python3
[ -x .venv/bin/python ] || "$PY" -m venv .venv
.venv/bin/python -m pip install -q --upgrade pip
.venv/bin/python -m pip install -q -c scripts/constraints.txt -e ".[napari,qt,cluster,test]"
# Software OpenGL for napari's canvas on machines without a GPU.
export LIBGL_ALWAYS_SOFTWARE=1
.venv/bin/python -m pytest -q -p no:cacheprovider "$@"
