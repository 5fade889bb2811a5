"""phasorgraph: graph layers for PyTorch that keep edge direction and high-frequency structure."""

import os as _os

# Large CPU tensors on transparent huge pages. Every sparse product returns a fresh (N, F)
# tensor, and on 4 KiB pages the kernel's first touch of it page-faults: a fresh 128 MB output
# took 52 ms to fill against 14 ms on huge pages (measured here, 2 cores, 2026-12-02), so on
# a 500x500 grid the product spent more time faulting than computing. torch's CPU allocator
# asks for huge pages (madvise, allocations of 2 MB and more) when THP_MEM_ALLOC_ENABLE is
# set; it reads the variable when it allocates. Set THP_MEM_ALLOC_ENABLE=0 before importing
# phasorgraph to keep torch's default.
_os.environ.setdefault("THP_MEM_ALLOC_ENABLE", "1")

from .errors import GraphInputError
from .graph import DirectedGraph
from .sparse import SparseOperator, general_matmul, hermitian_matmul, values_matmul
from . import clustering, data, learned_charge, nn, operators, spectral, tables
from .clustering import adjusted_rand_index, cluster_nodes
from .learned_charge import magnetic_matmul, magnetic_product
from .operators import *  # noqa: F401,F403  (every construction; listed once, in operators.__all__)
from .scan import ChargeScan, scan_charges
from .responses import filter_response, plot_filter_response

__version__ = "0.1.0"

__all__ = [
    "GraphInputError",
    "DirectedGraph",
    "SparseOperator",
    "hermitian_matmul",
    "general_matmul",
    "values_matmul",
    "operators",
    "learned_charge",
    "spectral",
    "nn",
    "data",
    "tables",
    "magnetic_matmul",
    "magnetic_product",
    "scan_charges",
    "ChargeScan",
    "filter_response",
    "plot_filter_response",
    "cluster_nodes",
    "adjusted_rand_index",
    "__version__",
] + list(operators.__all__)
