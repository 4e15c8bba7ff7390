"""`--trainguard-report DIR`: summary.md and summary.json at the end of the session (controller only)."""

from __future__ import annotations

import pytest

from .guard import GuardPlugin


class ReportPlugin:
    """Writes the report folder from the rows the guard gathered; plots were written as tests ran."""

    NAME = "trainguard-report"

    def pytest_sessionfinish(self, session: pytest.Session, exitstatus: int) -> None:
        from ...core.report_files import write_report

        guard = GuardPlugin.of(session.config)
        if guard is None:
            return
        report_dir = guard.resolve(session.config.getoption("--trainguard-report"))
        guard.report_path = write_report(report_dir, guard.rows)
