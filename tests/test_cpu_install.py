"""The Makefile's CPU-only torch install: the decision logic of tools/cpu_torch.py, without installing.

Sources: pip's installation report format (pip documentation, "Installation Report", version
"1": ``install[].metadata`` holds the wheel's core metadata, ``environment`` the marker
values). The two saved reports in tests/data/ are real ``pip install --dry-run --report``
outputs for ``torch==2.13.0`` made on the project machine (trimmed to the fields read):
one resolved to the local CPU wheel on disk, one (``pip --isolated``, PyPI only) to the
Linux PyPI wheel, whose requirements name the CUDA runtime packages.
"""

import copy
import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "tools"))

import cpu_torch  # noqa: E402

DATA = Path(__file__).resolve().parent / "data"
SPEC = "torch==2.13.0"


def _report(name):
    return json.loads((DATA / name).read_text())


def test_local_cpu_wheel_is_installed_as_is():
    plan = cpu_torch.decide(_report("pip_report_torch_local_cpu.json"), SPEC)
    assert plan["cpu"] and plan["version"] == "2.13.0+cpu"
    assert plan["pip_args"] == ["--only-binary=torch", SPEC]
    assert "download.pytorch.org" not in " ".join(plan["pip_args"])


def test_linux_pypi_wheel_switches_to_the_cpu_index():
    plan = cpu_torch.decide(_report("pip_report_torch_pypi_linux.json"), SPEC)
    assert not plan["cpu"] and "nvidia-cudnn-cu13" in plan["reason"]
    # the pinned +cpu version exists only on the CPU index, so pip cannot fall back to CUDA
    assert plan["pip_args"] == ["--only-binary=torch", "--extra-index-url", "https://download.pytorch.org/whl/cpu",
                                "torch==2.13.0+cpu"]


def test_markers_are_evaluated_in_the_reports_environment():
    # the same metadata on macOS: every CUDA requirement has `platform_system == "Linux"`,
    # so none applies, and PyPI's unlabelled macOS wheel is a CPU build
    mac = copy.deepcopy(_report("pip_report_torch_pypi_linux.json"))
    mac["environment"]["platform_system"] = "Darwin"
    mac["environment"]["sys_platform"] = "darwin"
    plan = cpu_torch.decide(mac, SPEC)
    assert plan["cpu"] and plan["pip_args"] == ["--only-binary=torch", SPEC]


def test_other_local_labels_are_not_cpu():
    rocm = copy.deepcopy(_report("pip_report_torch_local_cpu.json"))
    rocm["install"][0]["metadata"]["version"] = "2.13.0+rocm6.4"
    plan = cpu_torch.decide(rocm, "torch>=2.3")
    assert not plan["cpu"] and plan["pip_args"][-1] == "torch==2.13.0+cpu"
    with pytest.raises(SystemExit, match="resolves no torch wheel"):
        cpu_torch.decide({"install": []}, SPEC)


def test_dry_run_from_a_saved_report_prints_the_command(capsys):
    assert cpu_torch.main([SPEC, "--dry-run", "--report", str(DATA / "pip_report_torch_pypi_linux.json"),
                           "--python", "py"]) == 0
    out = capsys.readouterr().out.strip().splitlines()
    assert out[0].startswith("cpu_torch: the resolved wheel 2.13.0 requires CUDA runtime packages")
    assert out[-1] == ("cpu_torch: would run: py -m pip install --quiet --only-binary=torch "
                       "--extra-index-url https://download.pytorch.org/whl/cpu torch==2.13.0+cpu")


def test_makefile_installs_torch_through_the_decision_first():
    if shutil.which("make") is None:
        pytest.fail("make is needed for `make test`; it is missing")
    # `make -n` prints the recipe without running it (GNU make manual, "Instead of Executing
    # Recipes"); a fresh STAMP path makes the install recipe due
    out = subprocess.run(["make", "-n", "-B", "venv", "VENV=/nonexistent-venv"], cwd=ROOT, capture_output=True,
                         text=True, timeout=60).stdout.splitlines()
    torch_line = next(i for i, line in enumerate(out) if "tools/cpu_torch.py" in line)
    package_line = next(i for i, line in enumerate(out) if "pip install" in line and "-e" in line)
    assert torch_line < package_line and '"torch==2.13.0"' in out[torch_line]
    assert not any("pip install" in line and "torch" in line for line in out)  # never a bare torch install
    assert ".[test,tutorials,tables,opendata]" in out[package_line]


def test_real_dry_run_here_resolves_and_decides():
    """pip's real dry run in this environment (whatever indexes it sees), nothing installed."""
    done = subprocess.run([sys.executable, str(ROOT / "tools" / "cpu_torch.py"), SPEC, "--dry-run"],
                          capture_output=True, text=True, timeout=300, env=dict(os.environ))
    assert done.returncode == 0, done.stderr[-2000:]
    lines = done.stdout.strip().splitlines()
    assert lines[-1].startswith("cpu_torch: would run: ")
    if "installing it as is" in lines[0]:
        assert "download.pytorch.org" not in lines[-1]
    else:
        assert "--extra-index-url https://download.pytorch.org/whl/cpu" in lines[-1] and "+cpu" in lines[-1]
