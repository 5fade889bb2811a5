"""Every benchmark script runs end to end with ``--quick`` (small sizes; no timing is asserted).

What it checks: the script exits 0 (quick results go to bench/results/*_quick.json, which git
ignores), so `make bench` cannot silently rot. Timings themselves are only ever
reported by the scripts (bench/README.md), never tested.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

BENCH = Path(__file__).resolve().parent.parent / "bench"
SCRIPTS = sorted(p.name for p in BENCH.glob("*.py") if not p.name.startswith("_"))


def test_every_script_is_listed():
    assert SCRIPTS, "no bench scripts found"


@pytest.mark.parametrize("script", SCRIPTS)
def test_bench_script_runs_quick(script):
    env = dict(os.environ, PYTHONHASHSEED="0")
    res = subprocess.run([sys.executable, str(BENCH / script), "--quick", "--threads", "1"] if script in
                         ("kernels.py", "layers.py", "scan.py") else [sys.executable, str(BENCH / script), "--quick"],
                         cwd=BENCH.parent, env=env, capture_output=True, text=True, timeout=300)
    assert res.returncode == 0, res.stdout[-2000:] + res.stderr[-4000:]
