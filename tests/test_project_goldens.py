"""This project's own goldens (guarded/golden/, blessed in portable mode) hold on other machines.

The guarded suite in guarded/ is a pytest project of its own (guarded/pytest.ini turns portable
mode on, which pins a whole process), so it runs here in fresh processes: once as it is, and once
under the dispatch settings of another CPU, imitated as oneMKL's and torch's documentation
describe. Every test must come out bit-identical to its golden, with no tolerance to hide in.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
OTHER_CPU = {"MKL_ENABLE_INSTRUCTIONS": "SSE4_2", "ATEN_CPU_CAPABILITY": "avx2", "MKL_CBWR": "AUTO",
             "OMP_NUM_THREADS": "2"}


@pytest.mark.parametrize("imitated", [{}, OTHER_CPU], ids=["this machine", "another CPU's dispatch"])
def test_project_goldens_are_identical_in_portable_mode(imitated):
    env = {k: v for k, v in os.environ.items() if not k.startswith(("MKL_", "OMP_", "ATEN_", "ONEDNN_", "DNNL_"))}
    env.update(imitated)
    done = subprocess.run([sys.executable, "-m", "pytest", "guarded", "-q", "-p", "no:xdist"], cwd=ROOT, env=env,
                          capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stdout[-3000:] + done.stderr[-2000:]
    assert "guarded tests checked: 9 (9 identical)" in done.stdout, done.stdout[-3000:]
