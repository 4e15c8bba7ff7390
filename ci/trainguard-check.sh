#!/usr/bin/env bash
# Pull-request check for guarded training tests. Provider-neutral: copy it into your repo
# and call it from any CI service.
#
#   ci/trainguard-check.sh [PYTEST ARGS...]
#
# Runs pytest with trainguard's results and report folders, so that a failing run leaves:
#   $TRAINGUARD_RESULTS_DIR  new runs of every guarded test that did not match bitwise,
#                            in the golden layout (adopt them: trainguard bless --from DIR)
#   $TRAINGUARD_REPORT_DIR   summary.md (a Markdown table for the PR or the job summary),
#                            summary.json, and plots of changed trajectories
# Upload both folders as artifacts. Exits with pytest's status: non-zero on any change.
#
# With TRAINGUARD_AUDIT_SINCE=REV (e.g. origin/main) it also runs `trainguard audit --since REV`
# and writes $TRAINGUARD_REPORT_DIR/audit.md: goldens added, removed or re-blessed, tolerances
# loosened or tightened. A loosened tolerance or a removed golden fails the check unless
# TRAINGUARD_AUDIT_ACCEPT=1 (set it from a pull-request label, after a second review).
set -uo pipefail

RESULTS_DIR="${TRAINGUARD_RESULTS_DIR:-trainguard-results}"
REPORT_DIR="${TRAINGUARD_REPORT_DIR:-trainguard-report}"
PYTHON="${PYTHON:-python}"

rm -rf "$RESULTS_DIR" "$REPORT_DIR"
mkdir -p "$RESULTS_DIR" "$REPORT_DIR"

"$PYTHON" -m pytest --trainguard-results="$RESULTS_DIR" --trainguard-report="$REPORT_DIR" "$@"
status=$?

if [ -f "$REPORT_DIR/summary.md" ]; then
    cat "$REPORT_DIR/summary.md"
    # Job summaries: GitHub Actions reads GITHUB_STEP_SUMMARY; other services ignore it.
    if [ -n "${GITHUB_STEP_SUMMARY:-}" ]; then
        cat "$REPORT_DIR/summary.md" >> "$GITHUB_STEP_SUMMARY"
    fi
fi
if [ -n "${TRAINGUARD_AUDIT_SINCE:-}" ]; then
    "$PYTHON" -m trainguard audit --since "$TRAINGUARD_AUDIT_SINCE" --markdown --output "$REPORT_DIR/audit.md"
    audit_status=$?
    if [ -f "$REPORT_DIR/audit.md" ]; then
        cat "$REPORT_DIR/audit.md"
        if [ -n "${GITHUB_STEP_SUMMARY:-}" ]; then
            cat "$REPORT_DIR/audit.md" >> "$GITHUB_STEP_SUMMARY"
        fi
    fi
    if [ "$audit_status" -ne 0 ]; then
        if [ "${TRAINGUARD_AUDIT_ACCEPT:-}" = "1" ] && [ "$audit_status" -eq 1 ]; then
            echo "trainguard audit: loosened or removed guards accepted (TRAINGUARD_AUDIT_ACCEPT=1)"
        else
            echo "trainguard audit: a tolerance got looser or a golden was removed; a second reviewer must accept it"
            [ "$status" -eq 0 ] && status=$audit_status
        fi
    fi
fi
if [ "$status" -ne 0 ] && [ -n "$(ls -A "$RESULTS_DIR" 2>/dev/null)" ]; then
    echo
    echo "trainguard: behaviour changed. If the change is intended, download the results artifact and run:"
    echo "  ci/trainguard-rebless.sh --from <artifact folder> --reason 'why the change is intended'"
fi
exit "$status"
