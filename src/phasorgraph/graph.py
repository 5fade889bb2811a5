"""DirectedGraph: validated, canonical directed weighted edges, and adapters in and out."""

from __future__ import annotations

import numbers
from typing import Any, Callable, NamedTuple

import numpy as np
import scipy.sparse as sp
import torch

from ._limits import check_node_count
from .errors import GraphInputError, value_text

__all__ = ["DirectedGraph", "GraphStructure"]


_ID_LIMIT = 2 ** 63  # node ids are stored as int64


def _check_has_values(name: str, t: torch.Tensor) -> None:
    """Refuse tensors whose values cannot be read (the meta device)."""
    if t.device.type == "meta":
        raise GraphInputError(
            f"{name} is on the meta device, which holds shapes but no values; pass a tensor with "
            f"values (on cpu or an accelerator)"
        )


def _check_tensor_storage(name: str, t: torch.Tensor) -> None:
    """Refuse tensors whose values cannot be read: meta device, sparse layouts."""
    _check_has_values(name, t)
    if t.layout != torch.strided:
        raise GraphInputError(f"{name} must be a dense tensor; got layout {t.layout}")


def _as_array(name: str, value: Any, what: str) -> np.ndarray:
    """``np.asarray(value)``, turning numpy's errors on ragged or odd input into GraphInputError."""
    try:
        return np.asarray(value)
    except (ValueError, TypeError, OverflowError) as exc:
        raise GraphInputError(
            f"{name} must be {what}; got a {type(value).__name__} that numpy cannot read as one "
            f"array (rows of different lengths?): {value_text(value)}"
        ) from exc


def _first_bad_object(arr: np.ndarray, ok) -> tuple[int, Any]:
    """Position and value of the first entry of an object array for which ``ok`` is false."""
    flat = arr.reshape(-1)
    for k, v in enumerate(flat):  # error path only
        if not ok(v):
            return k, v
    return -1, None


def _is_node_id(v: Any) -> bool:
    return isinstance(v, numbers.Integral) and not isinstance(v, (bool, np.bool_)) and 0 <= int(v) < _ID_LIMIT


def as_index_tensor(name: str, value: Any) -> torch.Tensor:
    """Turn a 1-D array-like of node ids into an int64 CPU tensor, rejecting non-integers.

    Ids must be integers in [0, 2**63) (int64); floats are accepted when they hold integers.
    Negative ids are reported by the caller (with the graph context); ids that int64 cannot
    hold, from uint64 arrays, huge floats or Python ints, are reported here with the value given.
    """
    if isinstance(value, torch.Tensor):
        t = value.detach()
        _check_tensor_storage(name, t)
        if t.is_complex() or t.dtype == torch.bool:
            raise GraphInputError(f"{name} must hold integer node ids; got a tensor of dtype {t.dtype}")
        if t.is_floating_point():
            arr = t.to(device="cpu", dtype=torch.float64).numpy()
        elif t.dtype == torch.uint64:  # may hold ids that int64 cannot
            arr = t.to(device="cpu").numpy()
        else:
            t = t.to(device="cpu", dtype=torch.int64)
            if t.dim() != 1:
                raise GraphInputError(f"{name} must be 1-D; got shape {tuple(t.shape)}")
            return t.contiguous()
    else:
        arr = _as_array(name, value, "a 1-D array of integer node ids")
    if arr.dtype == object:
        k, v = _first_bad_object(arr, _is_node_id)
        if k >= 0:
            raise GraphInputError(
                f"{name} must hold integer node ids in [0, 2**63); got {value_text(v)} at position {k}"
            )
        arr = arr.astype(np.int64)
    if arr.dtype.kind not in "iuf" and arr.size > 0:
        raise GraphInputError(f"{name} must hold integer node ids; got an array of dtype {arr.dtype}")
    if arr.dtype.kind == "f":
        bad = ~np.isfinite(arr) | (arr != np.round(arr))
        if bad.any():
            k = int(np.flatnonzero(bad)[0])
            raise GraphInputError(
                f"{name} must hold integer node ids; got the non-integer value "
                f"{arr.reshape(-1)[k]} at position {k} (dtype {arr.dtype})"
            )
    if arr.size and arr.dtype.kind in "uf":
        big = arr >= _ID_LIMIT
        if big.any():
            k = int(np.flatnonzero(big.reshape(-1))[0])
            raise GraphInputError(
                f"{name} holds node {int(arr.reshape(-1)[k])} at position {k}; node ids must be "
                f"integers in [0, 2**63) (int64)"
            )
    if arr.ndim != 1:
        raise GraphInputError(f"{name} must be 1-D; got shape {tuple(arr.shape)}")
    # floats below -2**63 would wrap; they are negative anyway, so clip to keep the sign
    if arr.dtype.kind == "f":
        arr = np.clip(arr, -float(_ID_LIMIT), None)
    return torch.as_tensor(arr.astype(np.int64, copy=False)).contiguous()


def as_weight_tensor(value: Any, num_edges: int) -> torch.Tensor:
    if value is None:
        return torch.ones(num_edges, dtype=torch.float64)
    if isinstance(value, torch.Tensor):
        _check_tensor_storage("weight", value)
        if value.is_complex():
            raise GraphInputError(f"weight must be real; got a tensor of dtype {value.dtype}")
        w = value.detach().to(device="cpu", dtype=torch.float64)
    else:
        arr = _as_array("weight", value, "real numbers, one per edge")
        if arr.dtype == object:
            k, v = _first_bad_object(
                arr, lambda v: isinstance(v, numbers.Real) and not isinstance(v, (bool, np.bool_)))
            raise GraphInputError(
                f"weight must hold real numbers, one per edge; got {value_text(v)} at position {k}"
            )
        if arr.dtype.kind == "c":
            raise GraphInputError(f"weight must be real; got an array of dtype {arr.dtype}")
        if arr.dtype.kind not in "iufb" and arr.size > 0:
            raise GraphInputError(f"weight must hold real numbers; got an array of dtype {arr.dtype}")
        w = torch.as_tensor(arr.astype(np.float64, copy=False))
    if w.dim() == 0:
        w = w.expand(num_edges)
    if w.dim() != 1 or w.numel() != num_edges:
        raise GraphInputError(
            f"weight must have one entry per edge ({num_edges}); got shape {tuple(w.shape)}"
        )
    if not bool(torch.all(torch.isfinite(w))):
        bad = int(torch.nonzero(~torch.isfinite(w))[0])
        raise GraphInputError(f"weight must be finite; edge {bad} has weight {float(w[bad])}")
    return w.contiguous()


def _check_node_names(names: Any, num_nodes: int):
    """None, or a read-only 1-D numpy array of num_nodes distinct ids (delegates to tables)."""
    if names is None:
        return None
    from .tables import as_node_names

    return as_node_names("node_names", names, num_nodes)


def _same_names(a, b) -> bool:
    if a is None or b is None:
        return a is b
    return a.shape == b.shape and bool(np.all(a == b))


def inverse_power(d: Any, power: float = 1.0):
    """``d ** -power`` where ``d > 0`` and 0 where ``d == 0``: the one zero-degree rule.

    Every :math:`D^{-1/2}` or :math:`D^{-1}` of the package goes through here, so an isolated
    node never gives NaN or inf. Takes and returns a float64 tensor or numpy array (numpy inside:
    single-threaded compiled loops, no per-call thread start-up).
    """
    is_tensor = isinstance(d, torch.Tensor)
    arr = d.numpy() if is_tensor else np.asarray(d, dtype=np.float64)
    out = np.zeros_like(arr)
    pos = arr > 0
    if power == 0.5:
        np.divide(1.0, np.sqrt(arr, where=pos, out=np.zeros_like(arr)), out=out, where=pos)
    elif power == 1.0:
        np.divide(1.0, arr, out=out, where=pos)
    else:
        np.power(arr, -power, out=out, where=pos)
    return torch.from_numpy(out) if is_tensor else out


class GraphStructure(NamedTuple):
    r"""What every operator is built from: computed once per graph, then only read.

    All arrays live on the union pattern of A and :math:`A^T` (the non-zeros of
    :math:`A + A^T`), sorted by row, then column, so it is also a CSR pattern. Float arrays are
    float64, index arrays int64, all on the CPU.

    Attributes:
        crow: (N + 1,) CSR row pointer of the pattern.
        rows, cols: (nnz,) row and column of each non-zero.
        symmetric: (nnz,) :math:`A_s = (A + A^T) / 2`.
        antisymmetric: (nnz,) :math:`A - A^T` (exactly 0 on reciprocal edges of equal weight).
        degree: (N,) :math:`d = A_s \mathbf{1}` (self-loops counted once).
        inv_sqrt_degree, inv_degree: (N,) :math:`d^{-1/2}` and :math:`d^{-1}`, 0 where d = 0.
        normalized: (nnz,) :math:`(A_s)_{uv} / \sqrt{d_u d_v}`, the values of
            :math:`D^{-1/2} A_s D^{-1/2}`.
    """

    crow: torch.Tensor
    rows: torch.Tensor
    cols: torch.Tensor
    symmetric: torch.Tensor
    antisymmetric: torch.Tensor
    degree: torch.Tensor
    inv_sqrt_degree: torch.Tensor
    inv_degree: torch.Tensor
    normalized: torch.Tensor


def _structure(source: torch.Tensor, target: torch.Tensor, weight: torch.Tensor, n: int) -> GraphStructure:
    """Union pattern of A and A^T with As and A - A^T on it, degrees and their inverse roots.

    Built without a sort: the canonical edges already form the CSR matrix of A, scipy transposes
    it by counting (O(nnz + N)) and one canonical merge, ``A + 1j A^T``, gives the union pattern
    with A's value in the real part and A^T's in the imaginary part, exactly (no arithmetic
    mixes the two, so reciprocal equal weights give an exact 0 in A - A^T).
    """
    if source.numel() == 0:
        empty_i = torch.zeros(0, dtype=torch.int64)
        empty_f = torch.zeros(0, dtype=torch.float64)
        zeros = torch.zeros(n, dtype=torch.float64)
        return GraphStructure(torch.zeros(n + 1, dtype=torch.int64), empty_i, empty_i, empty_f, empty_f, zeros,
                              zeros, zeros, empty_f)
    indptr = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(np.bincount(source.numpy(), minlength=n), out=indptr[1:])
    A = sp.csr_matrix((weight.numpy(), target.numpy(), indptr), shape=(n, n))  # canonical: sorted, unique
    AT = A.T.tocsr()
    AT.data = AT.data * 1j  # complex data in place of the real (no copy of the index arrays)
    A.data = A.data.astype(np.complex128)
    M = A + AT  # canonical merge of two canonical matrices
    del A, AT
    a, b = M.data.real, M.data.imag
    counts = np.diff(M.indptr)
    rows = np.repeat(np.arange(n, dtype=np.int64), counts)
    cols = M.indices.astype(np.int64)
    sym = a + b
    sym *= 0.5
    degree = np.bincount(rows, weights=sym, minlength=n)
    s = inverse_power(degree, 0.5)
    normalized = s[rows]  # As[u, v] / sqrt(d_u d_v), in numpy (one pass each)
    normalized *= s[cols]
    normalized *= sym
    return GraphStructure(torch.from_numpy(M.indptr.astype(np.int64)), torch.from_numpy(rows), torch.from_numpy(cols),
                          torch.from_numpy(sym), torch.from_numpy(a - b), torch.from_numpy(degree),
                          torch.from_numpy(s), torch.from_numpy(inverse_power(degree, 1.0)),
                          torch.from_numpy(normalized))


def _moved(graph: "DirectedGraph", inner: Callable[..., Any], device: str, options: tuple) -> Any:
    """``inner(graph, **options)`` (itself kept with the graph) moved to ``device``."""
    op = graph.cached(inner, **dict(options))
    return op if str(op.device) == device else op.to(device=device)


def _options_key(options: dict, where: str) -> tuple:
    """The options as a hashable, order-free key; an unhashable value is refused by name."""
    for name, value in options.items():
        try:
            hash(value)
        except TypeError:
            raise GraphInputError(
                f"option {name!r} of {where} must be hashable (a number, string, dtype or tuple); "
                f"got {type(value).__name__}"
            ) from None
    return tuple(sorted(options.items()))


def _torch_matrix_to_scipy(matrix: torch.Tensor):
    """A torch matrix (dense or sparse COO / CSR / CSC) as a scipy COO matrix or numpy array."""
    _check_has_values("matrix", matrix)
    m = matrix.detach().cpu()
    if m.dim() != 2:
        raise GraphInputError(f"matrix must be 2-D (square); got shape {tuple(m.shape)}")
    if m.layout == torch.strided:
        return m.resolve_conj().numpy() if m.dtype != torch.bfloat16 else m.double().numpy()
    if m.layout == torch.sparse_csr:
        return sp.csr_matrix((m.values().resolve_conj().numpy(), m.col_indices().numpy(), m.crow_indices().numpy()),
                             shape=tuple(m.shape)).tocoo()
    if m.layout == torch.sparse_csc:
        return sp.csc_matrix((m.values().resolve_conj().numpy(), m.row_indices().numpy(), m.ccol_indices().numpy()),
                             shape=tuple(m.shape)).tocoo()
    if m.layout in (torch.sparse_bsr, torch.sparse_bsc):
        m = m.to_sparse_coo()
    if m.layout != torch.sparse_coo:  # pragma: no cover - future layouts
        raise GraphInputError(f"matrix has layout {m.layout}; pass a dense or sparse COO / CSR / CSC tensor")
    m = m.coalesce()
    idx = m.indices().numpy()
    vals = m.values()
    if vals.dim() != 1:
        raise GraphInputError(f"matrix must be a 2-D sparse matrix of scalars; got values of shape {tuple(vals.shape)}")
    return sp.coo_matrix((vals.resolve_conj().numpy(), (idx[0], idx[1])), shape=tuple(m.shape))


@torch.compiler.disable
def _build_cached(graph, builder, options):
    """``builder(graph, **options)``, run eagerly even inside torch.compile.

    (What graphs cache is numpy/scipy work on constants; inside a compiled forward it costs
    one graph break, on the first call only: later calls find it cached.)
    """
    return builder(graph, **options)


class DirectedGraph:
    r"""A directed weighted graph on nodes ``0 .. num_nodes - 1``, stored as canonical edges.

    The weighted adjacency is :math:`A[u, v] = w` for an edge :math:`u \to v`. On construction
    duplicate edges are summed, zero-weight edges are dropped, self-loops are kept, and the
    edges are sorted by (source, target), so two graphs with the same adjacency are stored
    identically. The object is immutable: every helper returns a new graph.

    Args:
        source: int64 tensor (E,) of edge tails.
        target: int64 tensor (E,) of edge heads.
        weight: float tensor (E,), a scalar, or None (all ones). Any finite real number is
            accepted, negative ones included (a signed graph is a valid DirectedGraph); the
            Laplacians, walks and magnetic operators in :mod:`phasorgraph.operators` need
            non-negative weights and refuse a graph with a negative weight. NaN and inf are
            refused here.
        num_nodes: number of nodes N (>= every index + 1; default largest index + 1). Nodes
            without edges are isolated.
        node_names: keyword-only; None (default) or a sequence of N distinct hashable ids, the
            original id of each node in node order (set by :meth:`from_table`; see
            :meth:`index_of`). Every helper that returns a new graph carries them along.

    Raises:
        GraphInputError: indices that are negative, non-integer or >= num_nodes; source and
            target of different lengths; a weight that is not finite or of the wrong length;
            a negative or non-integer num_nodes.

    Attributes:
        source, target (Tensor): int64 (E,), sorted by (source, target).
        weight (Tensor): float64 (E,), non-zero.
        num_nodes (int), num_edges (int).
        node_names (numpy.ndarray or None): read-only (N,) array of the original node ids.

    Example:
        >>> g = DirectedGraph.from_edges([[0, 1, 1], [1, 2, 2]], weight=[1.0, 2.0, 3.0])
        >>> g.num_nodes, g.num_edges, g.weight.tolist()
        (3, 2, [1.0, 5.0])
    """

    __slots__ = ("_source", "_target", "_weight", "_num_nodes", "_cache", "_node_names", "_hash", "_structure", "__weakref__")

    def __init__(self, source: Any, target: Any, weight: Any = None, num_nodes: int | None = None, *,
                 node_names: Any = None):
        src = as_index_tensor("source", source)
        dst = as_index_tensor("target", target)
        if src.numel() != dst.numel():
            raise GraphInputError(
                f"source and target must have the same length; got {src.numel()} and {dst.numel()}"
            )
        w = as_weight_tensor(weight, src.numel())
        if src.numel() and (int(src.min()) < 0 or int(dst.min()) < 0):
            which, ids = ("source", src) if int(src.min()) < 0 else ("target", dst)
            k = int(torch.argmin(ids))
            raise GraphInputError(
                f"{which} holds node {int(ids[k])} at position {k}; node ids must be integers >= 0"
            )
        largest = int(torch.maximum(src.max(), dst.max())) if src.numel() else -1
        if num_nodes is None:
            num_nodes = largest + 1
        else:
            if isinstance(num_nodes, torch.Tensor) and num_nodes.dim() == 0 and not num_nodes.is_floating_point() \
                    and num_nodes.dtype != torch.bool and not num_nodes.is_complex():
                num_nodes = int(num_nodes)
            if isinstance(num_nodes, bool) or not isinstance(num_nodes, numbers.Integral):
                raise GraphInputError(f"num_nodes must be a non-negative integer; got {num_nodes!r}")
            num_nodes = int(num_nodes)
            if num_nodes < 0:
                raise GraphInputError(f"num_nodes must be a non-negative integer; got {num_nodes}")
            if largest >= num_nodes:
                which = "source" if src.numel() and int(src.max()) == largest else "target"
                raise GraphInputError(f"{which} holds node {largest} but num_nodes is {num_nodes}")
        self._num_nodes = num_nodes
        self._node_names = _check_node_names(node_names, num_nodes)
        self._source, self._target, self._weight = self._canonical(src, dst, w, num_nodes)
        self._cache: dict = {}
        self._hash: int | None = None
        self._structure: GraphStructure | None = None

    @staticmethod
    def _canonical(src, dst, w, n):
        """Sum duplicates, drop zeros, sort by (source, target); vectorized over edges.

        scipy's COO -> CSR conversion groups the edges by source with a counting pass and
        ``sum_duplicates`` sorts each (short) row and adds repeats, all in compiled code and
        without a global sort of the E keys.
        """
        if src.numel() == 0:
            return src, dst, w
        if n > 4 * src.numel() + 4096:
            # far more nodes than edges: a row pointer of n + 1 entries would dominate, so
            # sort the E pairs instead (O(E) memory; lexicographic, so source * n + target
            # can never overflow int64)
            s_, d_, w_ = src.numpy(), dst.numpy(), w.numpy()
            order = np.lexsort((d_, s_))
            s_, d_, w_ = s_[order], d_[order], w_[order]
            first = np.ones(s_.size, dtype=bool)
            first[1:] = (s_[1:] != s_[:-1]) | (d_[1:] != d_[:-1])
            with np.errstate(over="ignore", invalid="ignore"):
                summed = np.bincount(np.cumsum(first) - 1, weights=w_)
            keep = summed != 0
            s_, d_, summed = s_[first][keep], d_[first][keep], summed[keep]
            DirectedGraph._check_sums(s_, d_, summed)
            return torch.from_numpy(s_.copy()), torch.from_numpy(d_.copy()), torch.from_numpy(summed.astype(np.float64))
        m = sp.csr_matrix((w.numpy(), (src.numpy(), dst.numpy())), shape=(n, n))
        with np.errstate(over="ignore", invalid="ignore"):
            m.sum_duplicates()
        m.eliminate_zeros()
        rows = np.repeat(np.arange(n, dtype=np.int64), np.diff(m.indptr))
        DirectedGraph._check_sums(rows, m.indices, m.data)
        return (torch.from_numpy(rows), torch.from_numpy(m.indices.astype(np.int64)),
                torch.from_numpy(m.data.astype(np.float64, copy=False)))

    @staticmethod
    def _check_sums(rows: np.ndarray, cols: np.ndarray, summed: np.ndarray) -> None:
        """Refuse duplicate edges whose weights sum past the float64 range (inf) or to NaN."""
        bad = ~np.isfinite(summed)
        if bad.any():
            k = int(np.flatnonzero(bad)[0])
            raise GraphInputError(
                f"weight: the duplicate entries of edge {int(rows[k])} -> {int(cols[k])} sum to "
                f"{summed[k]} (beyond the float64 range, about 1.8e308); every summed weight must be "
                f"finite, so rescale the weights"
            )

    # ------------------------------------------------------------------ properties
    @property
    def source(self) -> torch.Tensor:
        return self._source

    @property
    def target(self) -> torch.Tensor:
        return self._target

    @property
    def weight(self) -> torch.Tensor:
        return self._weight

    @property
    def num_nodes(self) -> int:
        return self._num_nodes

    @property
    def num_edges(self) -> int:
        return int(self._source.numel())

    @property
    def node_names(self):
        """Original node ids (read-only numpy array (N,)), or None for a graph built from integers."""
        return self._node_names

    def index_of(self, names: Any) -> torch.Tensor:
        """Node numbers of the given original ids: int64 tensor, one per id (a scalar id gives 0-dim).

        Raises:
            GraphInputError: the graph has no node_names, or some ids are not nodes of the
                graph (the message names a few of them and how many are missing).

        Example:
            >>> g = DirectedGraph.from_table({"source": ["b", "a"], "target": ["a", "c"]})
            >>> g.node_names.tolist(), g.index_of(["c", "b"]).tolist()
            (['b', 'a', 'c'], [2, 0])
        """
        from .tables import index_of_names

        return index_of_names(self, names)

    def __repr__(self) -> str:
        return f"DirectedGraph(num_nodes={self.num_nodes}, num_edges={self.num_edges})"

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, DirectedGraph):
            return NotImplemented
        return (
            self.num_nodes == other.num_nodes
            and torch.equal(self.source, other.source)
            and torch.equal(self.target, other.target)
            and torch.equal(self.weight, other.weight)
            and _same_names(self._node_names, other._node_names)
        )

    def __hash__(self) -> int:
        # by value, like __eq__: equal graphs hash alike (computed once; the graph is immutable)
        if self._hash is None:
            self._hash = hash((self._num_nodes, self._source.numpy().tobytes(), self._target.numpy().tobytes(),
                               self._weight.numpy().tobytes()))
        return self._hash

    def __getstate__(self):
        return {"source": self._source, "target": self._target, "weight": self._weight, "num_nodes": self._num_nodes,
                "node_names": self._node_names}

    def __setstate__(self, state):
        self._source, self._target = state["source"], state["target"]
        self._weight, self._num_nodes = state["weight"], state["num_nodes"]
        self._node_names = state.get("node_names")
        if self._node_names is not None:
            self._node_names.flags.writeable = False
        self._cache = {}
        self._hash = None
        self._structure = None

    # ------------------------------------------------------------------ the graph-like protocol
    # What layers ask of the graph they are given: ``num_nodes``, ``num_rows``, ``operator`` and
    # ``magnetic_product``. Layers use nothing else, so another object that answers these (a
    # shard of a distributed graph, say) can stand in for a DirectedGraph.
    @property
    def num_rows(self) -> int:
        """Rows of the node features a layer takes with this graph: ``num_nodes``.

        (A shard of a distributed graph answers with the rows it owns.)
        """
        return self._num_nodes

    @property
    def structure(self) -> GraphStructure:
        """The frozen :class:`GraphStructure` every operator is built from (computed on first use).

        Example:
            >>> g = DirectedGraph.from_edges([[0], [1]])
            >>> g.structure.symmetric.tolist(), g.structure.degree.tolist()
            ([0.5, 0.5], [0.5, 0.5])
        """
        if self._structure is None:
            self._structure = _structure(self._source, self._target, self._weight, self._num_nodes)
        return self._structure

    def cached(self, builder: Callable[..., Any], **options: Any) -> Any:
        """``builder(self, **options)``, computed once per (builder, options) and kept with the graph.

        The one cache of things derived from a graph (operators through :meth:`operator`, the
        learned-charge pattern, ...): it goes when the graph goes, and :meth:`clear_cache` empties
        it. Pass a module-level function as ``builder`` (a new lambda each call never hits).

        Example:
            >>> g = DirectedGraph.from_edges([[0, 1], [1, 2]])
            >>> g.cached(lambda graph, k: graph.num_edges * k, k=3)
            6
        """
        if not callable(builder):
            raise GraphInputError(f"builder must be a function graph -> value; got {type(builder).__name__}")
        key = (builder, _options_key(options, "graph.cached"))
        hit = self._cache.get(key)
        if hit is None:
            hit = _build_cached(self, builder, options)
            self._cache[key] = hit
        return hit

    def operator(self, builder: Callable[..., Any], *, device: Any = None, **options: Any) -> Any:
        """``builder(self, **options)``, moved to ``device``; built once and kept with the graph.

        The operator is built on the first call for each (builder, options, device) and then
        returned as is (operators are never changed after they are built, so sharing one is
        safe). The cache lives on the graph: it goes when the graph goes, and
        :meth:`clear_cache` empties it. Pass a module-level function as ``builder`` (a new
        lambda each call would never hit the cache).

        Args:
            builder: a function ``graph -> SparseOperator``, e.g.
                :func:`phasorgraph.operators.magnetic_laplacian`.
            device: where the operator should live (default: where the builder puts it, the CPU).
            **options: keyword arguments for ``builder``; hashable values (numbers, strings,
                dtypes, tuples).

        Example:
            >>> import torch
            >>> from phasorgraph.operators import normalized_laplacian
            >>> g = DirectedGraph.from_edges([[0, 1], [1, 2]])
            >>> op = g.operator(normalized_laplacian, dtype=torch.float64)
            >>> op is g.operator(normalized_laplacian, dtype=torch.float64), op.shape
            (True, torch.Size([3, 3]))
        """
        if not callable(builder):
            raise GraphInputError(f"builder must be a function graph -> operator; got {type(builder).__name__}")
        key = _options_key(options, "graph.operator")
        if device is None:
            return self.cached(builder, **options)
        return self.cached(_moved, inner=builder, device=str(torch.device(device)), options=key)

    def magnetic_product(self, charge: torch.Tensor, *, phase: str = "difference") -> Callable[[torch.Tensor], torch.Tensor]:
        r"""The map :math:`x \mapsto L_{norm}(q)\, x` at a tensor charge, differentiable in the charge.

        The same as :func:`phasorgraph.learned_charge.magnetic_product` (see there); this is the
        form layers call, so that a graph-like object can supply its own.

        Example:
            >>> import torch
            >>> g = DirectedGraph.from_edges([[0, 1, 2], [1, 2, 0]])
            >>> apply = g.magnetic_product(torch.tensor(0.1))
            >>> apply(torch.ones(3, 1)).dtype
            torch.complex64
        """
        from .learned_charge import magnetic_product  # that module builds on this one

        return magnetic_product(self, charge, phase=phase)

    def clear_cache(self) -> None:
        """Drop every operator and derived value kept with this graph (rebuilt on next use).

        The :attr:`structure` stays: it is part of the graph.

        Example:
            >>> g = DirectedGraph.from_edges([[0], [1]])
            >>> g.clear_cache()
        """
        self._cache.clear()

    # ------------------------------------------------------------------ constructors
    @classmethod
    def from_edges(cls, edges_or_source: Any, target: Any = None, weight: Any = None,
                   num_nodes: int | None = None) -> "DirectedGraph":
        """Build from a (2, E) array/tensor of (source, target) rows, or two 1-D arrays.

        Example:
            >>> DirectedGraph.from_edges([0, 1], [1, 2], num_nodes=4)
            DirectedGraph(num_nodes=4, num_edges=2)
        """
        if target is None:
            edges = edges_or_source
            if isinstance(edges, torch.Tensor):
                shape = tuple(edges.shape)
            else:
                edges = _as_array("edges_or_source", edges, "a (2, E) array of (source, target) rows")
                shape = edges.shape
            if len(shape) != 2 or shape[0] != 2:
                hint = " (did you pass (E, 2)? transpose it)" if len(shape) == 2 and shape[1] == 2 else ""
                raise GraphInputError(
                    f"edges_or_source must have shape (2, E) when target is not given; got {shape}{hint}"
                )
            return cls(edges[0], edges[1], weight, num_nodes)
        return cls(edges_or_source, target, weight, num_nodes)

    @classmethod
    def from_scipy(cls, matrix: Any) -> "DirectedGraph":
        """Build from a square scipy sparse matrix or array (any format) or a dense 2-D array.

        Entry (u, v) is an edge u -> v of weight ``matrix[u, v]``. Repeated COO entries are
        summed and stored zeros dropped, as for every DirectedGraph. A torch tensor is accepted
        too: dense (strided) or sparse (COO, CSR, CSC), on any device but ``meta``.

        Example:
            >>> import numpy as np
            >>> DirectedGraph.from_scipy(np.array([[0.0, 2.0], [0.0, 1.0]])).weight.tolist()
            [2.0, 1.0]
        """
        if isinstance(matrix, torch.Tensor):
            matrix = _torch_matrix_to_scipy(matrix)
        if sp.issparse(matrix):
            coo = sp.coo_matrix(matrix)
        else:
            arr = _as_array("matrix", matrix, "a square 2-D array or scipy sparse matrix")
            if arr.ndim != 2:
                raise GraphInputError(f"matrix must be 2-D (square); got shape {arr.shape}")
            if arr.dtype == object or arr.dtype.kind not in "iufcb":
                raise GraphInputError(f"matrix must hold real numbers; got dtype {arr.dtype}")
            coo = sp.coo_matrix(arr)
        if coo.shape[0] != coo.shape[1]:
            raise GraphInputError(f"matrix must be square; got shape {coo.shape}")
        if np.iscomplexobj(coo.data):
            raise GraphInputError(f"matrix must be real; got dtype {coo.data.dtype}")
        if coo.data.dtype == object or coo.data.dtype.kind not in "iufb":
            raise GraphInputError(f"matrix must hold real numbers; got dtype {coo.data.dtype}")
        bad = ~np.isfinite(coo.data.astype(np.float64))
        if bad.any():
            k = int(np.flatnonzero(bad)[0])
            raise GraphInputError(
                f"matrix must be finite; entry ({int(coo.row[k])}, {int(coo.col[k])}) is {coo.data[k]}"
            )
        return cls(coo.row.astype(np.int64), coo.col.astype(np.int64), coo.data, coo.shape[0])

    @classmethod
    def from_networkx(cls, G: Any, weight: str | None = "weight") -> "DirectedGraph":
        """Build from a networkx graph; nodes are numbered in ``G.nodes`` order.

        A ``Graph`` becomes both directions of each edge; a ``DiGraph`` is taken as is; in a
        ``MultiDiGraph`` (or ``MultiGraph``) parallel edges are summed. Missing weights are 1;
        ``weight=None`` makes every edge 1. (A converter, not a hot path: it reads the edges
        once through networkx's Python API.)

        Example:
            >>> import networkx as nx
            >>> DirectedGraph.from_networkx(nx.Graph([("a", "b")])).num_edges  # both directions
            2
        """
        import networkx as nx

        if not isinstance(G, nx.Graph):
            raise GraphInputError(f"G must be a networkx graph; got {type(G).__name__}")
        try:
            hash(weight)
        except TypeError:
            raise GraphInputError(
                f"weight must be the name of an edge attribute (a string or other hashable key) or None; "
                f"got {value_text(weight)}"
            ) from None
        index = {node: i for i, node in enumerate(G.nodes)}
        rows, cols, vals = [], [], []
        for u, v, data in G.edges(data=True):
            w = 1.0 if weight is None else data.get(weight, 1.0)
            rows.append(index[u]); cols.append(index[v]); vals.append(w)
            if not G.is_directed() and u != v:
                rows.append(index[v]); cols.append(index[u]); vals.append(w)
        k = next((i for i, v in enumerate(vals) if not isinstance(v, numbers.Real)), None)
        if k is not None:  # complex, None, text, ...: refused, never cast
            u, v = list(G.nodes)[rows[k]], list(G.nodes)[cols[k]]
            raise GraphInputError(
                f"edge attribute {weight!r} must be a real number on every edge; edge ({u!r}, {v!r}) "
                f"has {value_text(vals[k])}"
            )
        vals_arr = np.asarray(vals, dtype=np.float64)
        bad = ~np.isfinite(vals_arr)
        if bad.any():
            k = int(np.flatnonzero(bad)[0])
            u, v = list(G.nodes)[rows[k]], list(G.nodes)[cols[k]]
            raise GraphInputError(
                f"edge attribute {weight!r} must be finite; edge ({u!r}, {v!r}) has {vals_arr[k]}"
            )
        return cls(np.asarray(rows, dtype=np.int64), np.asarray(cols, dtype=np.int64), vals_arr, len(index))

    @classmethod
    def from_table(cls, table: Any, source: str = "source", target: str = "target", weight: str | None = None, *,
                   weight_transform: Any = None, nodes: Any = None) -> "DirectedGraph":
        """Build from an edge table whose ids may be any hashable values; see :func:`phasorgraph.tables.graph_from_table`.

        Example:
            >>> g = DirectedGraph.from_table({"source": ["b", "a", "b"], "target": ["a", "c", "a"],
            ...                               "amount": [2.0, 5.0, 3.0]}, weight="amount")
            >>> g.node_names.tolist(), g.weight.tolist()
            (['b', 'a', 'c'], [5.0, 5.0])
        """
        from .tables import graph_from_table

        return graph_from_table(table, source, target, weight, weight_transform=weight_transform, nodes=nodes)

    # ------------------------------------------------------------------ adapters out
    def to_scipy(self, format: str = "csr") -> sp.spmatrix:
        """The weighted adjacency A (N, N) as a scipy sparse matrix, A[u, v] = w(u -> v)."""
        formats = ("csr", "csc", "coo", "lil", "dok", "bsr", "dia")
        if not isinstance(format, str) or format not in formats:
            raise GraphInputError(f"format must be one of {formats} (scipy sparse formats); got {value_text(format)}")
        if format != "coo":
            check_node_count(self.num_nodes, what=f"to_scipy({format!r})", bytes_per_node=16)
        coo = sp.coo_matrix(
            (self._weight.numpy(), (self._source.numpy(), self._target.numpy())),
            shape=(self.num_nodes, self.num_nodes),
        )
        return coo.asformat(format)

    def to_networkx(self):
        """A networkx ``DiGraph`` with nodes 0..N-1 and the ``weight`` edge attribute."""
        import networkx as nx

        check_node_count(self.num_nodes, what="to_networkx", bytes_per_node=512)
        G = nx.DiGraph()
        G.add_nodes_from(range(self.num_nodes))
        G.add_weighted_edges_from(zip(self._source.tolist(), self._target.tolist(), self._weight.tolist()))
        return G

    # ------------------------------------------------------------------ helpers
    def reverse(self) -> "DirectedGraph":
        """Every edge u -> v becomes v -> u (adjacency A^T)."""
        return DirectedGraph(self._target, self._source, self._weight, self.num_nodes, node_names=self._node_names)

    def symmetrized(self) -> "DirectedGraph":
        """The graph of As = (A + A^T) / 2: both directions, each with half the summed weight."""
        src = torch.cat([self._source, self._target])
        dst = torch.cat([self._target, self._source])
        return DirectedGraph(src, dst, torch.cat([self._weight, self._weight]) / 2, self.num_nodes,
                             node_names=self._node_names)

    def permute(self, perm: Any) -> "DirectedGraph":
        """Relabel nodes: node ``perm[i]`` of this graph becomes node ``i`` of the result.

        So ``A_new = A[perm][:, perm]``, and features follow with ``x[perm]``.
        """
        p = as_index_tensor("perm", perm)
        n = self.num_nodes
        if p.numel() != n:
            raise GraphInputError(f"perm must be a permutation of 0..{n - 1} (length {n}); got length {p.numel()}")
        if n and not torch.equal(torch.sort(p).values, torch.arange(n)):
            raise GraphInputError(
                f"perm must be a permutation of 0..{n - 1}: every node exactly once; got a repeated "
                f"or out-of-range value"
            )
        inverse = torch.empty_like(p)
        inverse[p] = torch.arange(n)
        names = None if self._node_names is None else self._node_names[p.numpy()]
        return DirectedGraph(inverse[self._source], inverse[self._target], self._weight, n, node_names=names)

    def locality_order(self) -> tuple["DirectedGraph", torch.Tensor]:
        """Reorder nodes for memory locality by reverse Cuthill-McKee on the pattern of A + A^T.

        The permutation comes from ``scipy.sparse.csgraph.reverse_cuthill_mckee`` applied to
        the symmetrized sparsity pattern; it usually shrinks the bandwidth of every operator
        built from the graph, so sparse products touch nearby rows. It follows the convention of
        :meth:`permute`: node ``perm[i]`` of this graph becomes node ``i`` of the result, and
        features follow with ``x[perm]`` (undo with ``y_new[torch.argsort(perm)]``).

        Returns:
            ``(permuted_graph, perm)`` with ``perm`` an int64 tensor (N,).

        Example:
            >>> g = DirectedGraph.from_edges([[0, 3], [3, 1]], num_nodes=4)
            >>> h, perm = g.locality_order()
            >>> h == g.permute(perm), sorted(perm.tolist())
            (True, [0, 1, 2, 3])
        """
        from scipy.sparse.csgraph import reverse_cuthill_mckee

        n = self.num_nodes
        if n == 0:
            return self, torch.zeros(0, dtype=torch.int64)
        check_node_count(n, what="locality_order")
        s, t = self._source.numpy(), self._target.numpy()
        ones = np.ones(2 * s.size, dtype=np.int8)
        pattern = sp.csr_matrix((ones, (np.concatenate([s, t]), np.concatenate([t, s]))), shape=(n, n))
        pattern.sum_duplicates()
        perm = torch.as_tensor(
            np.asarray(reverse_cuthill_mckee(pattern, symmetric_mode=True), dtype=np.int64)
        )
        return self.permute(perm), perm

    def subgraph_edges(self, keep: torch.Tensor) -> "DirectedGraph":
        """The graph with only the edges where the boolean mask ``keep`` (E,) is true.

        ``keep`` must have a boolean dtype (tensor, array or list of bools): an integer tensor
        is refused rather than guessed at (is ``[1, 0, 2]`` a mask or edge indices?). To keep
        edges by index ``idx``, pass ``mask = torch.zeros(E, dtype=torch.bool); mask[idx] = True``.

        Example:
            >>> g = DirectedGraph.from_edges([[0, 1, 2], [1, 2, 0]])
            >>> g.subgraph_edges([True, False, True]).target.tolist()
            [1, 0]
        """
        if isinstance(keep, torch.Tensor):
            _check_tensor_storage("keep", keep)
            keep = keep.detach().cpu()
            dtype = keep.dtype
        else:
            keep = _as_array("keep", keep, "a boolean mask, one entry per edge")
            dtype = keep.dtype
            if keep.dtype == np.bool_:
                keep = torch.from_numpy(np.ascontiguousarray(keep))
        if dtype not in (torch.bool, np.bool_):
            raise GraphInputError(
                f"keep must be a boolean mask of shape ({self.num_edges},); got dtype {dtype} (to keep "
                f"edges by index, set mask[index] = True in a torch.zeros({self.num_edges}, dtype=torch.bool))"
            )
        if keep.shape != (self.num_edges,):
            raise GraphInputError(f"keep must be a boolean mask of shape ({self.num_edges},); got {tuple(keep.shape)}")
        return DirectedGraph(self._source[keep], self._target[keep], self._weight[keep], self.num_nodes,
                             node_names=self._node_names)


# earlier private names, kept so code written against them still imports
_as_index_tensor, _as_weight_tensor = as_index_tensor, as_weight_tensor
