"""Install the CPU build of torch, never a CUDA build (run by the Makefile; standard library only).

Decision, in order:

1. Ask pip which wheel it would install for the spec, without installing anything:
   ``pip install --dry-run --no-deps --ignore-installed --only-binary=:all: --report FILE SPEC``
   (pip's own resolution, with every index and --find-links of the environment, so a local
   CPU wheel on disk is seen).
2. That wheel is a CPU build when its version carries the local label ``+cpu``, or when it
   has no local label and none of its requirements that apply here (markers evaluated in the
   report's environment) is a CUDA runtime (``nvidia-*``, ``cuda-*``, ``triton``): the
   PyPI wheels for macOS and Windows are CPU builds without a label.
3. A CPU build: install the spec as it is. Otherwise (the Linux PyPI wheel, which pulls in
   several GB of CUDA libraries): install ``torch==<version>+cpu`` with the PyTorch project's
   CPU wheel index as an extra index. The pinned ``+cpu`` version exists only there, so pip
   cannot fall back to the CUDA wheel, and the normal index still serves torch's own
   dependencies.

Usage:
    python tools/cpu_torch.py "torch==2.13.0"              # decide and install
    python tools/cpu_torch.py "torch==2.13.0" --dry-run    # decide and print, install nothing
    python tools/cpu_torch.py "torch==2.13.0" --dry-run --report saved.json   # decide from a saved report

The last line of the dry run is the pip command that would run.
"""

from __future__ import annotations

import argparse
import json
import os
import re
import shlex
import subprocess
import sys
import tempfile

CPU_INDEX = "https://download.pytorch.org/whl/cpu"
_CUDA_NAMES = re.compile(r"^(nvidia[-_].*|cuda[-_].*|triton)$", re.IGNORECASE)


def _requirement_applies(line: str, environment: dict) -> tuple[str, bool]:
    """(project name, whether the requirement applies in ``environment``) for a Requires-Dist line."""
    try:
        from pip._vendor.packaging.requirements import Requirement  # pip's own copy of packaging
    except ImportError:  # pragma: no cover - pip always vendors it
        name = re.split(r"[\s;\[<>=!~(]", line.strip(), 1)[0]
        return name, "extra ==" not in line
    req = Requirement(line)
    if req.marker is None:
        return req.name, True
    env = dict(environment)
    env["extra"] = ""
    try:
        return req.name, bool(req.marker.evaluate(env))
    except Exception:  # an unknown marker variable: count the requirement, to be safe
        return req.name, True


def decide(report: dict, spec: str) -> dict:
    """From a pip installation report, the build it resolves to and the install arguments.

    Returns a dict with ``version``, ``url``, ``cpu`` (bool), ``reason`` and ``pip_args`` (the
    arguments after ``pip install``).
    """
    items = [i for i in report.get("install", []) if i.get("metadata", {}).get("name", "").lower() == "torch"]
    if not items:
        raise SystemExit(f"cpu_torch: pip's report resolves no torch wheel for {spec!r}")
    item = items[0]
    meta = item["metadata"]
    version = meta["version"]
    url = item.get("download_info", {}).get("url", "")
    local = version.split("+", 1)[1] if "+" in version else ""
    environment = report.get("environment", {})
    cuda = []
    for line in meta.get("requires_dist") or []:
        name, applies = _requirement_applies(line, environment)
        if applies and _CUDA_NAMES.match(name):
            cuda.append(name)
    if local.startswith("cpu"):
        cpu, reason = True, f"the resolved wheel {version} carries the local label +{local}"
    elif local:
        cpu, reason = False, f"the resolved wheel {version} is a +{local} build"
    elif cuda:
        cpu, reason = False, f"the resolved wheel {version} requires CUDA runtime packages ({', '.join(cuda[:4])})"
    else:
        cpu, reason = True, f"the resolved wheel {version} has no local label and requires no CUDA package"
    if cpu:
        args = ["--only-binary=torch", spec]
    else:
        public = version.split("+", 1)[0]
        args = ["--only-binary=torch", "--extra-index-url", CPU_INDEX, f"torch=={public}+cpu"]
    return {"version": version, "url": url, "cpu": cpu, "reason": reason, "pip_args": args}


def resolve(python: str, spec: str) -> dict:
    """Run pip's dry run for ``spec`` and return its installation report."""
    with tempfile.TemporaryDirectory() as tmp:
        path = os.path.join(tmp, "report.json")
        cmd = [python, "-m", "pip", "install", "--dry-run", "--quiet", "--no-deps", "--ignore-installed",
               "--only-binary=:all:", "--report", path, spec]
        done = subprocess.run(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        if done.returncode != 0 or not os.path.exists(path):
            sys.stderr.write(done.stderr[-4000:])
            raise SystemExit(f"cpu_torch: pip could not resolve {spec!r} (dry run exited {done.returncode})")
        with open(path) as fh:
            return json.load(fh)


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("spec", help='torch requirement, e.g. "torch==2.13.0"')
    parser.add_argument("--dry-run", action="store_true", help="print the decision and the command; install nothing")
    parser.add_argument("--report", help="decide from this saved pip installation report instead of running pip")
    parser.add_argument("--python", default=sys.executable, help="the interpreter whose pip installs (default: this one)")
    args = parser.parse_args(argv)
    if args.report:
        with open(args.report) as fh:
            report = json.load(fh)
    else:
        report = resolve(args.python, args.spec)
    plan = decide(report, args.spec)
    command = [args.python, "-m", "pip", "install", "--quiet"] + plan["pip_args"]
    print(f"cpu_torch: {plan['reason']}: {'installing it as is' if plan['cpu'] else 'using the CPU wheel index'}")
    if args.dry_run:
        print("cpu_torch: would run: " + " ".join(shlex.quote(c) for c in command))
        return 0
    return subprocess.call(command)


if __name__ == "__main__":
    sys.exit(main())
