#!/usr/bin/env bash
# Nightly re-check of one job spec: run it into a dated folder, re-checking against the last
# successful run, and point ROOT/latest at the new folder once it has succeeded.
#
#   nightly-recheck.sh SPEC ROOT
#
#   ROOT/2026-11-02T020000Z/   one folder per run (summary.json, results.zarr, change_report.json)
#   ROOT/latest -> 2026-11-02T020000Z   the newest successful run (the next night's baseline)
#   ROOT/<stamp>.failed/        a run that produced no results (kept for a look, then pruned)
#
# The first run (no ROOT/latest yet) is a full run. Exit status: demaudit's (0: all tiles
# audited; 1: some tiles failed, the run still counts; 2 and up: no usable results, latest
# unchanged). Environment: RECHECK_COMMAND (default: demaudit), RECHECK_KEEP (dated folders to
# keep, default 14), RECHECK_STAMP (folder name instead of the UTC time; for tests and reruns),
# and demaudit's own DEMAUDIT_* settings (DEMAUDIT_SCHEDULER, DEMAUDIT_DATA_ROOTS, ...).
set -euo pipefail

if [ $# -ne 2 ]; then
  echo "usage: $(basename "$0") SPEC ROOT" >&2
  exit 64
fi
spec=$1
root=$2
command=${RECHECK_COMMAND:-demaudit}
keep=${RECHECK_KEEP:-14}
stamp=${RECHECK_STAMP:-$(date -u +%Y-%m-%dT%H%M%SZ)}

mkdir -p "$root"
out="$root/$stamp"
if [ -e "$out" ]; then
  echo "nightly-recheck: $out exists already" >&2
  exit 73
fi

args=(run "$spec" --out "$out" --quiet)
if [ -f "$root/latest/summary.json" ]; then
  args+=(--baseline "$(readlink -f "$root/latest")")
else
  echo "nightly-recheck: no earlier successful run in $root: a full run" >&2
fi

status=0
"$command" "${args[@]}" || status=$?

if [ "$status" -le 1 ] && [ -f "$out/summary.json" ]; then
  # swap the link atomically: a reader sees the old or the new run, never none
  ln -sfn "$stamp" "$root/.latest.new"
  mv -Tf "$root/.latest.new" "$root/latest"
  echo "nightly-recheck: $out succeeded; latest -> $stamp" >&2
else
  [ "$status" -ne 0 ] || status=1
  if [ -e "$out" ]; then
    mv "$out" "$out.failed"
  fi
  echo "nightly-recheck: run failed (exit $status); latest unchanged" >&2
fi

# prune: keep the newest $keep runs (failed ones included), never the one latest points at
current=$(readlink "$root/latest" 2>/dev/null || true)
mapfile -t runs < <(find "$root" -mindepth 1 -maxdepth 1 -type d -name '[0-9][0-9][0-9][0-9]-*' \
  -printf '%f\n' | sort -r)
for old in "${runs[@]:$keep}"; do
  if [ "$old" != "$current" ]; then
    rm -rf -- "${root:?}/$old"
  fi
done
exit "$status"
