"""phasorgraph: graph layers for PyTorch that keep edge direction and high-frequency structure."""

from .errors import GraphInputError
from .graph import DirectedGraph
from .sparse import SparseOperator, general_matmul, hermitian_matmul, values_matmul
from . import data, nn, operators, spectral, tables
from .scan import ChargeScan, scan_charges
from .responses import filter_response, plot_filter_response
from .operators import (
    combinatorial_laplacian,
    diffusion,
    magnetic_adjacency,
    magnetic_laplacian,
    magnetic_matmul,
    magnetic_product,
    normalized_laplacian,
    pagerank_laplacian,
    proximity_operators,
    random_walk,
    random_walk_laplacian,
    renormalized_adjacency,
)

__version__ = "0.1.0"

__all__ = [
    "GraphInputError",
    "DirectedGraph",
    "SparseOperator",
    "hermitian_matmul",
    "general_matmul",
    "values_matmul",
    "operators",
    "spectral",
    "nn",
    "data",
    "tables",
    "combinatorial_laplacian",
    "normalized_laplacian",
    "random_walk_laplacian",
    "renormalized_adjacency",
    "magnetic_adjacency",
    "magnetic_laplacian",
    "diffusion",
    "random_walk",
    "pagerank_laplacian",
    "proximity_operators",
    "magnetic_matmul",
    "magnetic_product",
    "scan_charges",
    "ChargeScan",
    "filter_response",
    "plot_filter_response",
    "__version__",
]
