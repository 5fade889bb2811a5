"""Catalogue of bad inputs: each raises GraphInputError (a ValueError) with a message that names
the argument, what was wrong and what is accepted (DESIGN.md, "Errors").

One case per row; the table is the catalogue, so adding a case is adding a row.
"""

import networkx as nx
import numpy as np
import pytest
import scipy.sparse as sp
import torch

from phasorgraph import (
    DirectedGraph,
    combinatorial_laplacian,
    GraphInputError,
    SparseOperator,
    diffusion,
    hermitian_matmul,
    magnetic_adjacency,
    magnetic_laplacian,
    normalized_laplacian,
    pagerank_laplacian,
    random_walk,
    renormalized_adjacency,
)
from phasorgraph.data import directed_block_model, directed_cycle, split_links
from phasorgraph.spectral import dirichlet_energy, fourier_basis, frame_bounds, largest_eigenvalue



def _g():
    return DirectedGraph.from_edges([[0, 1, 2], [1, 2, 0]])


CASES = [
    # --- node ids
    ("index out of range (source)", lambda: DirectedGraph([0, 5], [1, 2], num_nodes=3),
     r"source holds node 5 but num_nodes is 3"),
    ("index out of range (target)", lambda: DirectedGraph([0, 1], [1, 7], num_nodes=3),
     r"target holds node 7 but num_nodes is 3"),
    ("negative index", lambda: DirectedGraph([0, -1], [1, 2]),
     r"source holds node -1 at position 1; node ids must be integers >= 0"),
    ("negative index in target (torch)", lambda: DirectedGraph(torch.tensor([0, 1]), torch.tensor([1, -4])),
     r"target holds node -4 at position 1"),
    ("non-integer index (numpy)", lambda: DirectedGraph([0, 1.5], [1, 2]),
     r"source must hold integer node ids; got the non-integer value 1\.5 at position 1"),
    ("non-integer index (torch)", lambda: DirectedGraph([0, 1], torch.tensor([1.0, 2.25])),
     r"target must hold integer node ids; got the non-integer value 2\.25 at position 1"),
    ("NaN index", lambda: DirectedGraph([0, float("nan")], [1, 2]),
     r"source must hold integer node ids; got the non-integer value nan"),
    ("string index", lambda: DirectedGraph(["a"], [1]),
     r"source must hold integer node ids; got an array of dtype <U1"),
    ("boolean index", lambda: DirectedGraph(torch.tensor([True]), [1]),
     r"source must hold integer node ids; got a tensor of dtype torch\.bool"),
    ("2-D source", lambda: DirectedGraph(np.zeros((2, 2), dtype=np.int64), [0, 1]),
     r"source must be 1-D; got shape \(2, 2\)"),
    # --- weights
    ("NaN weight", lambda: DirectedGraph([0, 1], [1, 2], [1.0, float("nan")]),
     r"weight must be finite; edge 1 has weight nan"),
    ("inf weight", lambda: DirectedGraph([0], [1], [float("inf")]),
     r"weight must be finite; edge 0 has weight inf"),
    ("complex weight", lambda: DirectedGraph([0], [1], torch.tensor([1j])),
     r"weight must be real; got a tensor of dtype torch\.complex64"),
    ("negative weight refused by a Laplacian", lambda: normalized_laplacian(DirectedGraph([0, 1], [1, 2], [1.0, -2.0])),
     r"graph has negative weight -2\.0 on edge 1 -> 2; these operators need non-negative weights"),
    ("negative weight refused by the magnetic Laplacian",
     lambda: magnetic_laplacian(DirectedGraph([0], [1], [-0.5]), 0.25),
     r"negative weight -0\.5 on edge 0 -> 1"),
    ("negative weight refused by the renormalized adjacency",
     lambda: renormalized_adjacency(DirectedGraph([0], [1], [-0.5])), r"need non-negative weights"),
    # --- lengths and shapes
    ("source/target length mismatch", lambda: DirectedGraph([0, 1], [1]),
     r"source and target must have the same length; got 2 and 1"),
    ("weight length mismatch", lambda: DirectedGraph([0, 1], [1, 2], [1.0, 2.0, 3.0]),
     r"weight must have one entry per edge \(2\); got shape \(3,\)"),
    ("(E, 2) instead of (2, E)", lambda: DirectedGraph.from_edges(np.array([[0, 1], [1, 2], [2, 0]])),
     r"edges_or_source must have shape \(2, E\) when target is not given; got \(3, 2\) \(did you pass \(E, 2\)\? transpose it\)"),
    ("(E, 2) torch tensor", lambda: DirectedGraph.from_edges(torch.tensor([[0, 1], [1, 2], [2, 0]])),
     r"did you pass \(E, 2\)\? transpose it"),
    ("1-D edges without target", lambda: DirectedGraph.from_edges([0, 1, 2]),
     r"edges_or_source must have shape \(2, E\) when target is not given; got \(3,\)"),
    ("non-square sparse matrix", lambda: DirectedGraph.from_scipy(sp.csr_matrix(np.ones((2, 3)))),
     r"matrix must be square; got shape \(2, 3\)"),
    ("non-square dense matrix", lambda: DirectedGraph.from_scipy(np.ones((3, 2))),
     r"matrix must be square; got shape \(3, 2\)"),
    ("1-D dense matrix", lambda: DirectedGraph.from_scipy(np.ones(4)),
     r"matrix must be 2-D \(square\); got shape \(4,\)"),
    ("complex sparse matrix", lambda: DirectedGraph.from_scipy(sp.csr_matrix(np.array([[0, 1j], [0, 0]]))),
     r"matrix must be real; got dtype complex128"),
    ("NaN in a sparse matrix", lambda: DirectedGraph.from_scipy(sp.csr_matrix(np.array([[0, np.nan], [0, 0]]))),
     r"matrix must be finite; entry \(0, 1\) is nan"),
    ("string dense matrix", lambda: DirectedGraph.from_scipy(np.array([["a", "b"], ["c", "d"]])),
     r"matrix must hold real numbers; got dtype <U1"),
    ("not a networkx graph", lambda: DirectedGraph.from_networkx({0: [1]}),
     r"G must be a networkx graph; got dict"),
    ("non-numeric networkx weight", lambda: DirectedGraph.from_networkx(nx.DiGraph([(0, 1, {"weight": "heavy"})])),
     r"edge attribute 'weight' must be a real number on every edge"),
    ("NaN networkx weight", lambda: DirectedGraph.from_networkx(nx.DiGraph([("a", "b", {"w": float("nan")})]), weight="w"),
     r"edge attribute 'w' must be finite; edge \('a', 'b'\) has nan"),
    # --- num_nodes
    ("negative num_nodes", lambda: DirectedGraph([], [], num_nodes=-1),
     r"num_nodes must be a non-negative integer; got -1"),
    ("non-integer num_nodes", lambda: DirectedGraph([], [], num_nodes=2.5),
     r"num_nodes must be a non-negative integer; got 2\.5"),
    ("boolean num_nodes", lambda: DirectedGraph([], [], num_nodes=True),
     r"num_nodes must be a non-negative integer; got True"),
    # --- graph helpers
    ("perm with a repeated node", lambda: _g().permute([0, 0, 1]),
     r"perm must be a permutation of 0\.\.2: every node exactly once"),
    ("perm of the wrong length", lambda: _g().permute([1, 0]),
     r"perm must be a permutation of 0\.\.2 \(length 3\); got length 2"),
    ("edge mask of the wrong length", lambda: _g().subgraph_edges(torch.tensor([True])),
     r"keep must be a boolean mask of shape \(3,\); got \(1,\)"),
    # --- charge and phase
    ("charge below 0", lambda: magnetic_laplacian(_g(), -0.1), r"charge must lie in \[0, 0\.5\]; got -0\.1"),
    ("charge above 0.5", lambda: magnetic_adjacency(_g(), 0.75), r"charge must lie in \[0, 0\.5\]; got 0\.75"),
    ("charge NaN", lambda: diffusion(_g(), float("nan")), r"charge must lie in \[0, 0\.5\]; got nan"),
    ("charge as text", lambda: magnetic_laplacian(_g(), "0.25"),
     r"charge must be a real number in \[0, 0\.5\]; got str"),
    ("charge tensor that requires grad", lambda: magnetic_laplacian(_g(), torch.tensor(0.2, requires_grad=True)),
     r"charge must be one real number in \[0, 0\.5\] for a fixed operator; got a tensor .* requires_grad=True \(for a learned charge use magnetic_matmul\)"),
    ("charge tensor with several values", lambda: magnetic_laplacian(_g(), torch.tensor([0.1, 0.2])),
     r"got a tensor of shape \(2,\)"),
    ("unknown phase", lambda: magnetic_laplacian(_g(), 0.25, phase="angle"),
     r"phase must be one of \('difference', 'sign'\); got 'angle'"),
    # --- dtypes
    ("complex dtype for a real operator", lambda: normalized_laplacian(_g(), dtype=torch.complex64),
     r"dtype must be torch\.float32 or torch\.float64 for this real operator; got torch\.complex64"),
    ("half precision", lambda: random_walk(_g(), dtype=torch.float16),
     r"dtype must be torch\.float32 or torch\.float64 for this real operator; got torch\.float16"),
    ("integer dtype for a magnetic operator", lambda: magnetic_laplacian(_g(), dtype=torch.int64),
     r"dtype must be torch\.complex64 or torch\.complex128 .* for a magnetic operator; got torch\.int64"),
    ("complex operator cast to real", lambda: magnetic_laplacian(_g()).to(torch.float32),
     r"dtype torch\.float32 would drop the imaginary part of a complex operator"),
    # --- features into op @ x
    ("features with the wrong row count", lambda: normalized_laplacian(_g()) @ torch.ones(4, 2),
     r"x must have num_nodes = 3 rows \(shape \(N, \.\.\.\)\); got shape \(4, 2\)"),
    ("features of another precision", lambda: normalized_laplacian(_g()) @ torch.ones(3, 2, dtype=torch.float64),
     r"x has dtype torch\.float64 but the operator is torch\.float32; use the same precision"),
    ("complex features of another precision", lambda: magnetic_laplacian(_g()) @ torch.ones(3, 1, dtype=torch.complex128),
     r"x has dtype torch\.complex128 but the operator is torch\.complex64"),
    ("integer features", lambda: normalized_laplacian(_g()) @ torch.ones(3, 2, dtype=torch.int64),
     r"x dtype must be one of .*; got torch\.int64"),
    ("numpy features", lambda: normalized_laplacian(_g()) @ np.ones((3, 2)),
     r"x must be a torch\.Tensor; got ndarray"),
    ("0-dim features", lambda: normalized_laplacian(_g()) @ torch.tensor(1.0),
     r"x must have num_nodes = 3 rows"),
    # --- operator functions given the wrong thing
    ("scipy matrix instead of a graph", lambda: normalized_laplacian(_g().to_scipy()),
     r"graph must be a DirectedGraph \(build one with DirectedGraph\.from_edges, from_scipy or from_networkx\); got csr_matrix"),
    ("teleport out of range", lambda: pagerank_laplacian(_g(), teleport=1.0),
     r"teleport must be a probability in \(0, 1\); got 1\.0"),
    ("pagerank on an empty graph", lambda: pagerank_laplacian(DirectedGraph([], [])),
     r"graph must have at least one node for pagerank_laplacian; got num_nodes = 0"),
    ("dense tensor as an operator", lambda: SparseOperator(torch.eye(3), hermitian=True),
     r"matrix must be a torch sparse CSR tensor; got torch\.strided"),
    ("non-square operator", lambda: SparseOperator(torch.ones(2, 3).to_sparse_csr(), hermitian=False),
     r"matrix must be square \(N, N\); got shape \(2, 3\)"),
    ("hermitian kernel on a walk", lambda: hermitian_matmul(random_walk(_g()), torch.ones(3, 1)),
     r"op must be Hermitian for hermitian_matmul; got kind 'lazy_random_walk'"),
    # --- spectral tools
    ("largest_eigenvalue of an array", lambda: largest_eigenvalue(np.eye(3)),
     r"op must be a SparseOperator; got ndarray"),
    ("fourier_basis of a large graph", lambda: fourier_basis(normalized_laplacian(_g()), max_nodes=2),
     r"op has 3 nodes but this small-graph utility builds a dense N x N matrix and accepts at most max_nodes = 2"),
    ("fourier_basis of a non-Hermitian operator", lambda: fourier_basis(random_walk(_g())),
     r"op must be Hermitian for fourier_basis; got kind 'lazy_random_walk'"),
    ("empty filter bank", lambda: frame_bounds([]), r"bank must hold at least one filter"),
    ("non-positive frame weight", lambda: frame_bounds([np.eye(3)], weight=torch.tensor([1.0, -1.0, 1.0])),
     r"weight must be a positive vector of shape \(3,\); got shape \(3,\) with smallest entry -1\.0"),
    ("callable bank without op", lambda: frame_bounds(lambda eye: eye[:, None, :]),
     r"op is needed to size the identity when bank is a callable"),
    ("Dirichlet energy of a walk", lambda: dirichlet_energy(torch.ones(3, 1), random_walk(_g())),
     r"op must be a Hermitian Laplacian for dirichlet_energy; got kind 'lazy_random_walk'"),
    ("Dirichlet energy with the wrong row count", lambda: dirichlet_energy(torch.ones(4, 1), normalized_laplacian(_g())),
     r"x must have num_nodes = 3 rows"),
    # --- issue 12: silent wrong answers, foreign exceptions and misleading messages
    ("integer index tensor as an edge mask", lambda: _g().subgraph_edges(torch.tensor([0, 2, 1])),
     r"keep must be a boolean mask of shape \(3,\); got dtype torch\.int64 \(to keep edges by index"),
    ("duplicate edges summing past the float range", lambda: DirectedGraph([0, 0], [1, 1], [1e308, 1e308]),
     r"weight: the duplicate entries of edge 0 -> 1 sum to inf \(beyond the float64 range"),
    ("duplicate edges summing to inf on a sparse id range",
     lambda: DirectedGraph([0, 0], [10 ** 6, 10 ** 6], [1e308, 1e308]), r"edge 0 -> 1000000 sum to inf"),
    ("degree past the float range", lambda: normalized_laplacian(DirectedGraph([0] * 4, [1, 2, 3, 4], [1e308] * 4)),
     r"graph: the degree of node 0 \(sum of its symmetrized edge weights\) is inf"),
    ("float32 combinatorial Laplacian of huge weights", lambda: combinatorial_laplacian(DirectedGraph([0], [1], [1e39])),
     r"graph has a node of degree 5e\+38, so combinatorial_laplacian would hold values beyond the torch\.float32 range"),
    ("complex networkx weight", lambda: DirectedGraph.from_networkx(nx.DiGraph([(0, 1, {"weight": np.complex128(1 + 2j)})])),
     r"edge attribute 'weight' must be a real number on every edge; edge \(0, 1\) has np\.complex128\(1\+2j\)|"
     r"edge \(0, 1\) has \(1\+2j\)"),
    ("None networkx weight", lambda: DirectedGraph.from_networkx(nx.DiGraph([("a", "b", {"weight": None})])),
     r"edge attribute 'weight' must be a real number on every edge; edge \('a', 'b'\) has None"),
    ("text networkx weight", lambda: DirectedGraph.from_networkx(nx.DiGraph([(0, 1, {"weight": "1.5"})])),
     r"edge \(0, 1\) has '1\.5'"),
    ("None in a weight list", lambda: DirectedGraph([0, 1], [1, 2], [1.0, None]),
     r"weight must hold real numbers, one per edge; got None at position 1"),
    ("ragged edge list", lambda: DirectedGraph.from_edges([[0, 1], [1]]),
     r"edges_or_source must be a \(2, E\) array of \(source, target\) rows; got a list that numpy cannot read"),
    ("ragged source", lambda: DirectedGraph([[0, 1], [1]], [0, 1]),
     r"source must be a 1-D array of integer node ids; got a list that numpy cannot read"),
    ("edges on the meta device", lambda: DirectedGraph(torch.tensor([0], device="meta"), torch.tensor([1], device="meta")),
     r"source is on the meta device, which holds shapes but no values"),
    ("weights on the meta device", lambda: DirectedGraph([0], [1], torch.ones(1, device="meta")),
     r"weight is on the meta device"),
    ("matrix on the meta device", lambda: DirectedGraph.from_scipy(torch.eye(2, device="meta")),
     r"matrix is on the meta device"),
    ("uint64 id of 2**63", lambda: DirectedGraph(np.array([2 ** 63], dtype=np.uint64), np.array([0], dtype=np.uint64)),
     r"source holds node 9223372036854775808 at position 0; node ids must be integers in \[0, 2\*\*63\)"),
    ("float id beyond int64", lambda: DirectedGraph([0.0, 1e20], [1, 2]),
     r"source holds node 100000000000000000000 at position 1; node ids must be integers in \[0, 2\*\*63\)"),
    ("Python int id beyond int64", lambda: DirectedGraph([0, 2 ** 70], [1, 2]),
     r"source must hold integer node ids in \[0, 2\*\*63\); got 1180591620717411303424 at position 1"),
    ("astronomically large node id", lambda: normalized_laplacian(DirectedGraph([0], [2 ** 40])),
     r"graph has num_nodes = 1099511627777 \(node ids up to 1099511627776\); normalized_laplacian needs per-node "
     r"arrays of at least .* GiB but this machine has"),
    ("astronomically large num_nodes for a magnetic operator",
     lambda: magnetic_laplacian(DirectedGraph([0], [1], num_nodes=2 ** 45), 0.25), r"magnetic_laplacian needs per-node"),
    ("astronomically large graph to scipy", lambda: DirectedGraph([0], [2 ** 40]).to_scipy(),
     r"to_scipy\('csr'\) needs per-node arrays"),
    ("unknown scipy format", lambda: _g().to_scipy("dense"),
     r"format must be one of \('csr', 'csc', 'coo', 'lil', 'dok', 'bsr', 'dia'\) \(scipy sparse formats\); got 'dense'"),
    ("pagerank tol below 0", lambda: pagerank_laplacian(_g(), tol=-1),
     r"tol must be a finite number > 0 \(an L1 change of the stationary vector\); got -1"),
    ("pagerank non-integer max_iter", lambda: pagerank_laplacian(_g(), max_iter=10.5),
     r"max_iter must be an integer >= 1; got 10\.5"),
    ("pagerank text max_iter", lambda: pagerank_laplacian(_g(), max_iter="10"), r"max_iter must be an integer >= 1; got '10'"),
    ("pagerank that does not converge", lambda: pagerank_laplacian(DirectedGraph([0, 0, 1], [1, 2, 2]), max_iter=1),
     r"did not converge to tol=1e-13 in max_iter=1 iterations; raise teleport, tol or max_iter"),
    ("charge as text shows the text", lambda: magnetic_laplacian(_g(), "0.1"), r"got str '0\.1'"),
    ("unknown phase with charge=None", lambda: diffusion(_g(), None, phase="angle"),
     r"phase must be one of \('difference', 'sign'\); got 'angle'"),
    ("ragged block densities", lambda: directed_block_model([2, 2], [[0.1, 0.2], [0.1]], 0.5),
     r"density must be a probability or a \(2, 2\) matrix of probabilities, one entry per block pair; got "
     r"\[\[0\.1, 0\.2\], \[0\.1\]\] \(rows of different lengths\?\)"),
    ("text block density", lambda: directed_block_model([2, 2], "0.1", 0.5),
     r"density must be .* \(real numbers\); got '0\.1'"),
    ("None block density", lambda: directed_block_model([2, 2], None, 0.5), r"density must be .*; got None"),
    ("text block flow matrix", lambda: directed_block_model([2, 2], 0.1, [["a", "b"], ["c", "d"]]),
     r"flow must be .* \(real numbers\); got \[\['a', 'b'\], \['c', 'd'\]\]"),
    ("astronomically large block", lambda: directed_block_model([2 ** 40], 0.0, 0.5),
     r"sizes adds up to 1099511627776 nodes; the generators accept fewer than 2\*\*31 nodes in all"),
    ("astronomically large cycle", lambda: directed_cycle(2 ** 40), r"n has num_nodes = 1099511627776"),
    ("direction split of reciprocal links only", lambda: split_links(DirectedGraph([0, 1], [1, 0]), "direction"),
     r"graph has no one-way link, so the direction question has nothing to split: 1 reciprocal links"),
    ("split fraction too small for one link", lambda: split_links(_g(), "direction", 0.1, 0.4),
     r"val_fraction = 0\.1 of the 3 eligible links rounds to 0 links; raise val_fraction to at least 0\.167"),
]


@pytest.mark.parametrize("call,match", [c[1:] for c in CASES], ids=[c[0] for c in CASES])
def test_bad_input_is_refused_with_a_clear_message(call, match):
    with pytest.raises(GraphInputError, match=match) as info:
        call()
    assert isinstance(info.value, ValueError)  # GraphInputError subclasses ValueError


def test_catalogue_is_large_and_distinct():
    assert len(CASES) >= 15
    assert len({c[0] for c in CASES}) == len(CASES)


def test_graph_error_is_a_value_error():
    with pytest.raises(ValueError):
        DirectedGraph([0], [1], [float("nan")])
