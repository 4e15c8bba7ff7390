#!/usr/bin/env bash
# Re-bless golden files after an intended change, with a reason that is stored in them.
#
#   ci/trainguard-rebless.sh --reason TEXT [--from RESULTS_DIR] [NODEID...]
#
# With --from: adopt the results a CI run saved (the CI artifact), without re-running:
#   the goldens then hold exactly what CI's platform computed.
# Without --from: re-run the selected guarded tests here with --trainguard-bless.
# Afterwards review `git diff --stat` of the golden folder and commit it.
set -euo pipefail

reason=""
from=""
nodeids=()
while [ $# -gt 0 ]; do
    case "$1" in
        --reason) reason="${2:-}"; shift 2 ;;
        --from) from="${2:-}"; shift 2 ;;
        -h|--help) sed -n '2,10p' "$0"; exit 0 ;;
        *) nodeids+=("$1"); shift ;;
    esac
done
if [ -z "$reason" ]; then
    echo "trainguard-rebless: give --reason 'why the change is intended'; it is stored in the goldens" >&2
    exit 2
fi
PYTHON="${PYTHON:-python}"
if [ -n "$from" ]; then
    "$PYTHON" -m trainguard bless --from "$from" --reason "$reason" "${nodeids[@]}"
else
    "$PYTHON" -m pytest --trainguard-bless --trainguard-reason "$reason" "${nodeids[@]}"
fi
echo
echo "next: review the goldens (git diff --stat), then commit them, e.g."
echo "  git add golden && git commit -m \"Re-bless goldens: $reason\""
