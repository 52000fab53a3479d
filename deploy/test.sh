#!/usr/bin/env bash
# The full check, as CI runs it: set up (once), lint, type-check, then every test, including the
# integration tests (real Dask, uvicorn and chromium processes) and the slow ones. Extra arguments go
# to pytest. The quick local run is plain `.venv/bin/python -m pytest` (unit tests, < 3 min).
set -euo pipefail
cd "$(dirname "$0")/.."
bash deploy/setup.sh --tests
.venv/bin/ruff check service workers tests benchmarks
bash deploy/typecheck.sh
exec .venv/bin/python -m pytest -m "" "$@"
