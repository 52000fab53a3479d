#!/usr/bin/env bash
# Set up demaudit on a fresh Debian machine, idempotently:
#   - Debian's proj-data, which holds PROJ's EGM96 geoid grid (egm96_15.gtx; pyproj ships none),
#   - a virtualenv in .venv with demaudit and its test tools installed (editable),
#   - with --tests (or DEMAUDIT_WITH_BROWSER=1): Debian's chromium and chromedriver, for the
#     report-page and job-page tests.
# Needs Python 3.11+ as python3 and root (or sudo) for apt-get.
set -euo pipefail
cd "$(dirname "$0")/.."

[ "${1:-}" = "--tests" ] && DEMAUDIT_WITH_BROWSER=1
need_apt=()
[ -f /usr/share/proj/egm96_15.gtx ] || need_apt+=(proj-data)
if [ "${DEMAUDIT_WITH_BROWSER:-0}" = "1" ] \
   && ! { command -v chromium && command -v chromedriver; } >/dev/null; then
  need_apt+=(chromium chromium-driver)
fi
if [ ${#need_apt[@]} -gt 0 ]; then
  sudo=""
  [ "$(id -u)" -ne 0 ] && sudo="sudo"
  echo "setup: installing Debian packages: ${need_apt[*]}" >&2
  $sudo apt-get update -qq
  DEBIAN_FRONTEND=noninteractive $sudo apt-get install -y -qq "${need_apt[@]}" >/dev/null
fi
[ -f /usr/share/proj/egm96_15.gtx ] || { echo "setup: egm96_15.gtx still missing" >&2; exit 1; }

python3 -c 'import sys; sys.exit(sys.version_info < (3, 11))' \
  || { echo "setup: demaudit needs Python 3.11 or newer as python3" >&2; exit 1; }
[ -x .venv/bin/python ] || python3 -m venv .venv
if ! .venv/bin/python -c 'import demaudit.workers, demaudit.service, pytest, hypothesis' 2>/dev/null \
   || [ pyproject.toml -nt .venv/.demaudit-installed ]; then
  echo "setup: installing Python packages into .venv" >&2
  log=.venv/pip-install.log
  { .venv/bin/python -m pip install --disable-pip-version-check --upgrade pip \
    && .venv/bin/python -m pip install --disable-pip-version-check -e ".[dev]"; } >"$log" 2>&1 \
    || { tail -40 "$log" >&2; echo "setup: pip install failed (full log: $log)" >&2; exit 1; }
  .venv/bin/python -c 'import demaudit.workers, demaudit.service, pytest, hypothesis'
  touch .venv/.demaudit-installed
fi
