"""Start worker processes for the multi-rank tests and wait for them, bounded in time.

The parent polls its children, fails the test past ``timeout_s`` and always kills its own
children (by handle, never by name), so a stuck collective cannot hang the suite.
"""

from __future__ import annotations

import time

import pytest
import torch.multiprocessing as mp


def run_ranks(worker, args: tuple, nprocs: int, *, start_method: str, timeout_s: float) -> None:
    """mp.start_processes(worker, args, nprocs) and wait at most ``timeout_s`` seconds for all of them."""
    ctx = mp.start_processes(worker, args=args, nprocs=nprocs, join=False, start_method=start_method)
    deadline = time.monotonic() + timeout_s
    try:
        while not ctx.join(timeout=0.5):
            if time.monotonic() > deadline:
                pytest.fail(f"{nprocs} distributed workers did not finish within {timeout_s} s")
    finally:
        for p in ctx.processes:  # only our own children, by handle
            if p.is_alive():
                p.kill()
                p.join(5)
