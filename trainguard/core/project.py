"""Facts about the project and the process that every layer may ask: golden dir, CI.

Finding the golden dir means reading the project's pytest configuration the way pytest
would from a folder; it lives here (not in the CLI) because calibrate and bisect need it
too, and they sit below the CLI.
"""

from __future__ import annotations

import configparser
import os
from pathlib import Path
from typing import Any, Mapping

#: The golden dir when no configuration names one.
DEFAULT_GOLDEN_DIR = "golden"


def default_golden_dir(start: Path | None = None) -> Path:
    """The golden dir pytest would use from this folder: its ini option, else 'golden'."""
    start = start or Path.cwd()
    for folder in (start, *start.parents):
        pyproject = folder / "pyproject.toml"
        if pyproject.is_file():
            ini = _pyproject_ini(pyproject)
            if ini is not None:
                return folder / str(ini.get("trainguard_golden_dir", DEFAULT_GOLDEN_DIR))
        for name, section in (("pytest.ini", "pytest"), ("tox.ini", "pytest"), ("setup.cfg", "tool:pytest")):
            path = folder / name
            if path.is_file():
                parser = configparser.ConfigParser()
                try:
                    parser.read(path, encoding="utf-8")
                except configparser.Error:
                    continue
                if parser.has_section(section):
                    return folder / parser.get(section, "trainguard_golden_dir", fallback=DEFAULT_GOLDEN_DIR)
    return start / DEFAULT_GOLDEN_DIR


def _pyproject_ini(path: Path) -> Mapping[str, Any] | None:
    try:
        import tomllib
    except ImportError:  # Python 3.10: no TOML reader in the standard library
        return None
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except (ValueError, OSError):
        return None
    ini = data.get("tool", {}).get("pytest", {}).get("ini_options")
    return ini if isinstance(ini, dict) else None


def ci_enabled(environ: Mapping[str, str] | None = None) -> bool:
    """True in CI: the CI environment variable is set, non-empty and not "0" or "false"."""
    value = (os.environ if environ is None else environ).get("CI", "")
    return value.strip().lower() not in ("", "0", "false")


def ci_value(environ: Mapping[str, str] | None = None) -> str:
    """The CI variable's value, for messages that explain why trainguard is stricter."""
    return (os.environ if environ is None else environ).get("CI", "")
