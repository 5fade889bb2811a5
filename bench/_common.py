"""Shared helpers for the benchmark scripts: timing, a text table, JSON results with machine info.

Every bench script runs in one process, builds its inputs (seeded) outside the timed body and
reports medians over repeats. Typical use::

    from _common import median_time, print_table, write_results, machine_info

    t = median_time(lambda: op @ x, repeats=5, warmup=1)
    rows = [{"case": "forward", "seconds": t}]
    print_table(rows, ["case", "seconds"])
    write_results("kernels", {"rows": rows}, argv=sys.argv)

Run a script from the repository root (``.venv/bin/python bench/kernels.py``) or from bench/;
it imports this file as ``_common`` because its own folder is first on ``sys.path``.
"""

from __future__ import annotations

import datetime as _dt
import gc
import json
import os
import platform
import statistics
import sys
import time
from typing import Callable, Iterable, Mapping, Optional, Sequence

__all__ = [
    "median_time",
    "time_stats",
    "interleaved_times",
    "print_table",
    "write_results",
    "machine_info",
    "copy_bandwidth",
    "RESULTS_DIR",
]

RESULTS_DIR = os.path.join(os.path.dirname(os.path.abspath(__file__)), "results")


def time_stats(fn: Callable[[], object], repeats: int = 5, warmup: int = 1,
               max_seconds: Optional[float] = None) -> dict:
    """Run ``fn`` ``warmup`` times untimed, then ``repeats`` times timed (perf_counter).

    Returns a dict with ``median``, ``min``, ``max`` (seconds) and ``repeats`` (how many timed
    runs happened). If ``max_seconds`` is given, timing stops early (after at least one timed
    run) once the timed runs have used that much wall time, so slow baselines stay affordable.
    The garbage collector is paused during the timed runs.
    """
    return interleaved_times({"fn": fn}, repeats=repeats, warmup=warmup, max_seconds=max_seconds)["fn"]


def median_time(fn: Callable[[], object], repeats: int = 5, warmup: int = 1,
                max_seconds: Optional[float] = None) -> float:
    """Median wall time of ``fn()`` in seconds over ``repeats`` timed runs after ``warmup`` runs."""
    return time_stats(fn, repeats=repeats, warmup=warmup, max_seconds=max_seconds)["median"]


def interleaved_times(fns: Mapping[str, Callable[[], object]], repeats: int = 5, warmup: int = 1,
                      max_seconds: Optional[float] = None) -> dict:
    """Median seconds of each callable, timed round-robin (a, b, c, a, b, c, ...).

    On a shared, noisy machine interleaving makes the ratios between the callables robust:
    a burst of load from another process hits every variant alike. ``max_seconds`` bounds the
    total timed wall time (at least one round always runs). Returns ``{name: stats}`` with the
    same keys as :func:`time_stats`.
    """
    for _ in range(max(0, warmup)):
        for fn in fns.values():
            fn()
    times = {name: [] for name in fns}
    enabled = gc.isenabled()
    gc.disable()
    try:
        spent = 0.0
        for _ in range(max(1, repeats)):
            for name, fn in fns.items():
                t0 = time.perf_counter()
                fn()
                dt = time.perf_counter() - t0
                times[name].append(dt)
                spent += dt
            if max_seconds is not None and spent >= max_seconds:
                break
    finally:
        if enabled:
            gc.enable()
    return {name: {"median": statistics.median(ts), "min": min(ts), "max": max(ts), "repeats": len(ts)}
            for name, ts in times.items()}


def _fmt(value) -> str:
    if value is None:
        return "-"
    if isinstance(value, bool):
        return str(value)
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if value != value:  # NaN
            return "nan"
        a = abs(value)
        if a == 0:
            return "0"
        if a >= 1e5 or a < 1e-3:
            return f"{value:.3g}"
        if a >= 100:
            return f"{value:.0f}"
        if a >= 10:
            return f"{value:.1f}"
        return f"{value:.3g}"
    return str(value)


def print_table(rows: Sequence[Mapping], columns: Optional[Sequence[str]] = None, *,
                title: Optional[str] = None, file=None) -> str:
    """Print ``rows`` (dicts) as an aligned text table (Markdown pipe style) and return it."""
    file = sys.stdout if file is None else file
    if columns is None:
        columns = []
        for r in rows:
            for k in r:
                if k not in columns:
                    columns.append(k)
    cells = [[_fmt(r.get(c)) for c in columns] for r in rows]
    widths = [max([len(c)] + [len(row[i]) for row in cells]) for i, c in enumerate(columns)]
    lines = []
    if title:
        lines.append(f"### {title}")
        lines.append("")
    lines.append("| " + " | ".join(c.ljust(w) for c, w in zip(columns, widths)) + " |")
    lines.append("|" + "|".join("-" * (w + 2) for w in widths) + "|")
    for row in cells:
        lines.append("| " + " | ".join(v.rjust(w) for v, w in zip(row, widths)) + " |")
    text = "\n".join(lines)
    print(text, file=file)
    print("", file=file)
    file.flush()
    return text


def _cpu_model() -> str:
    try:
        with open("/proc/cpuinfo") as fh:
            for line in fh:
                if line.startswith("model name"):
                    return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or "unknown"


def machine_info() -> dict:
    """Torch/numpy versions, thread counts, CPU model (/proc/cpuinfo), cores, load, UTC date."""
    import torch

    info = {
        "date_utc": _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ"),
        "python": platform.python_version(),
        "torch": torch.__version__,
        "torch_threads": torch.get_num_threads(),
        "cpu_model": _cpu_model(),
        "cpu_count": os.cpu_count(),
        "platform": platform.platform(),
    }
    try:
        import numpy

        info["numpy"] = numpy.__version__
    except ImportError:  # pragma: no cover
        pass
    try:
        info["load_average_1m"] = os.getloadavg()[0]
    except OSError:  # pragma: no cover
        pass
    return info


def write_results(name: str, payload: Mapping, *, argv: Optional[Iterable[str]] = None) -> str:
    """Write ``payload`` plus machine info and the command line to bench/results/<name>.json.

    Under ``--quick`` the name gets a ``_quick`` suffix, so quick runs (the test suite's) never
    touch the recorded results.
    """
    os.makedirs(RESULTS_DIR, exist_ok=True)
    if "--quick" in sys.argv[1:] and not name.endswith("_quick"):
        name += "_quick"  # a quick run never overwrites the recorded results (git ignores *_quick.json)
    doc = {"benchmark": name, "machine": machine_info()}
    if argv is not None:
        doc["command"] = " ".join(["python"] + list(argv))
    doc.update(payload)
    path = os.path.join(RESULTS_DIR, f"{name}.json")
    with open(path, "w") as fh:
        json.dump(doc, fh, indent=2, sort_keys=False, default=str)
        fh.write("\n")
    print(f"wrote {path}")
    return path


def copy_bandwidth(num_bytes: int = 1 << 28, repeats: int = 5) -> float:
    """Memory copy bandwidth in bytes/s: (bytes read + bytes written) / median time of a copy_.

    A torch ``copy_`` between two float32 buffers of ``num_bytes`` each; it counts both the
    read and the write, the same accounting the kernel benchmark uses for its products.
    """
    import torch

    n = max(1, num_bytes // 4)
    src = torch.rand(n)
    dst = torch.empty_like(src)
    t = median_time(lambda: dst.copy_(src), repeats=repeats, warmup=1)
    return 2.0 * n * 4 / t
