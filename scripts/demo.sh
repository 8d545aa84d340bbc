#!/usr/bin/env bash
# Install tempofield's engine in ./.venv and analyse the shipped sample stack.
# Usage: bash scripts/demo.sh [OUTPUT_FOLDER]
set -euo pipefail
cd "$(dirname "$0")/.."
PY=${PYTHON:-python3.11}
command -v "$PY" >/dev/null 2>&1 || PY=python3
[ -x .venv/bin/python ] || "$PY" -m venv .venv
.venv/bin/python -m pip install -q --upgrade pip
.venv/bin/python -m pip install -q -c scripts/constraints.txt -e .
.venv/bin/tempofield demo -o "${1:-tempofield-demo}" --overwrite
