"""phasorgraph: graph layers for PyTorch that keep edge direction and high-frequency structure."""

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
