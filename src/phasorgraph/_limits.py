"""Refuse, before allocating, a node count whose per-node arrays this machine cannot hold.

A graph stores only its edges, so ``DirectedGraph([0], [2**40])`` is cheap; but every operator,
split or adapter that builds a row pointer, a degree vector or a label per node needs memory
proportional to ``num_nodes``. Without this check such a call dies deep inside numpy with a
``MemoryError`` (or thrashes the machine) instead of saying that the node ids are the problem.
"""

from __future__ import annotations

import os

from .errors import GraphInputError

__all__ = ["check_node_count", "physical_memory"]


def _read_physical_memory() -> int:
    try:
        return int(os.sysconf("SC_PAGE_SIZE")) * int(os.sysconf("SC_PHYS_PAGES"))
    except (AttributeError, ValueError, OSError):  # pragma: no cover - non-POSIX
        return 2 ** 40


# read once at import: a constant is also what torch.compile can trace through (os.sysconf is
# a C builtin it cannot, so calling it on every forward broke the compiled graph)
_PHYSICAL_MEMORY = _read_physical_memory()


def physical_memory() -> int:
    """Bytes of physical memory of this machine (``os.sysconf``, read once), or 2**40 if it cannot be read."""
    return _PHYSICAL_MEMORY


def _gib(nbytes: float) -> str:
    return f"{nbytes / 2 ** 30:.3g} GiB"


def check_node_count(n: int, *, what: str, bytes_per_node: int = 48, name: str = "graph") -> int:
    """Return ``n`` if ``(n + 1) * bytes_per_node`` bytes fit in physical memory, else raise.

    Args:
        n: the number of nodes about to get per-node arrays.
        what: the work that needs them, for the message ("normalized_laplacian", ...).
        bytes_per_node: a lower bound of the bytes that work allocates per node (default 48:
            a row pointer, a degree and a diagonal in int64 / float64, with temporaries).
        name: the argument the node count comes from.

    Raises:
        GraphInputError: naming n, the memory needed and the memory of the machine.
    """
    need = (int(n) + 1) * int(bytes_per_node)
    have = physical_memory()
    if need > have:
        raise GraphInputError(
            f"{name} has num_nodes = {int(n)} (node ids up to {int(n) - 1}); {what} needs per-node arrays "
            f"of at least {_gib(need)} but this machine has {_gib(have)} of memory; number the nodes "
            f"0 .. N-1 without gaps (for example with numpy.unique(ids, return_inverse=True)) or pass "
            f"a smaller num_nodes"
        )
    return int(n)
