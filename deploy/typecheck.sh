#!/usr/bin/env bash
# Type-check the code under its import name (demaudit.service, demaudit.workers): mypy cannot follow
# the editable install's import hook, so build/typecheck/demaudit links the two top-level folders.
set -euo pipefail
cd "$(dirname "$0")/.."
mkdir -p build/typecheck/demaudit
ln -sfn ../../../service build/typecheck/demaudit/service
ln -sfn ../../../workers build/typecheck/demaudit/workers
MYPYPATH=build/typecheck exec .venv/bin/mypy -p demaudit.service -p demaudit.workers "$@"
