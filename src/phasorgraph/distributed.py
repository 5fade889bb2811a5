r"""One graph across several processes: node partitions, graph shards and halo-exchange products.

Each rank of a ``torch.distributed`` process group owns a block of nodes (a part of a
:class:`NodePartition`). A :class:`GraphShard` holds only what that rank needs: every edge with
an endpoint it owns, expressed on a local numbering of its owned nodes followed by its *halo*
(the nodes of other parts adjacent to its own), and an exchange plan saying which owned rows
each other rank needs. Its operators are the owned rows of the whole graph's operator:

.. math:: (A x)_u = \sum_v A_{uv} x_v \quad (u \text{ owned}),

where the sum runs over owned and halo columns, so one product is: send the rows of x other
ranks need, receive the halo rows (one ``all_to_all_single``), multiply locally. The backward
of that exchange is the reverse exchange (gradients of halo rows are sent to their owners and
summed there). For a Hermitian operator :math:`A^H = A`, so the backward of the whole sharded
product is the same sharded product applied to the gradient, on the same plan.

Why the owned rows come out exact: row u of every operator in :data:`LOCAL_BUILDERS` depends
only on the edges at u (both directions), on :math:`d_u` and on the degrees :math:`d_v` of u's
neighbours, with :math:`d = A_s \mathbf 1`, :math:`A_s = (A + A^T)/2`. A shard's local graph has
every edge at each owned node; each halo node v also gets a self-loop of weight
:math:`d_v - d_v^{local}` (its true degree, fetched from its owner, minus what the local edges
give), which changes only row and column v at the diagonal, a halo row that no owned row reads.
Every builder applied to that local graph therefore returns the owned rows of the builder
applied to the whole graph (to rounding), and the rest of the local rows are dropped.

Collectives: every product, every :meth:`GraphShard.operator` call (it agrees on the spectrum
interval) and the constructors are collective, so every rank must make the same calls in the
same order, including ranks that own no node (an empty part still exchanges). Without an
initialized process group everything runs as a single part with no communication.

Works on the CPU with the ``gloo`` backend and on GPUs with ``nccl`` (features on the GPU; the
exchange moves real tensors, complex ones as their real and imaginary parts).
"""

from __future__ import annotations

import math
import numbers
from typing import Any, Callable, Optional, Sequence

import numpy as np
import torch
import torch.distributed as dist
from torch.autograd.function import once_differentiable

from . import operators as _ops
from .errors import GraphInputError
from .graph import DirectedGraph, as_index_tensor, as_weight_tensor
from .learned_charge import magnetic_product
from .sparse import SparseOperator, csr_matrix, general_matmul

__all__ = ["NodePartition", "partition_nodes", "GraphShard", "ShardedOperator", "LOCAL_BUILDERS"]

#: operator builders whose row u depends only on the edges at u and the degrees of u and its
#: neighbours; :meth:`GraphShard.operator` accepts these (others need the whole graph)
LOCAL_BUILDERS = (
    _ops.combinatorial_laplacian,
    _ops.normalized_laplacian,
    _ops.random_walk_laplacian,
    _ops.renormalized_adjacency,
    _ops.magnetic_adjacency,
    _ops.magnetic_laplacian,
    _ops.diffusion,
    _ops.random_walk,
)

_ORDERS = ("locality", "given")


# ---------------------------------------------------------------------- the process group
def _group_info(group) -> tuple:
    """(rank, world size) in ``group``; (0, 1) without an initialized process group."""
    if not (dist.is_available() and dist.is_initialized()):
        if group is not None:
            raise GraphInputError("group was given but torch.distributed is not initialized; "
                                  "call torch.distributed.init_process_group first or pass group=None")
        return 0, 1
    return dist.get_rank(group), dist.get_world_size(group)


def _agree(problem: Optional[str], group, world: int) -> None:
    """Raise GraphInputError on every rank if any rank found a problem (so no rank is left
    waiting in a collective that the others never enter)."""
    if world == 1:
        if problem is not None:
            raise GraphInputError(problem)
        return
    flag = torch.tensor([0 if problem is None else 1], dtype=torch.int64)
    dist.all_reduce(flag, op=dist.ReduceOp.MAX, group=group)
    if problem is not None:
        raise GraphInputError(problem)
    if int(flag) > 0:
        raise GraphInputError("another rank refused its input to this collective call (its own "
                              "GraphInputError names the argument); every rank stops here")


def _all_to_all(send: torch.Tensor, send_counts: Sequence[int], recv_counts: Sequence[int], group) -> torch.Tensor:
    """Rows ``send`` split by ``send_counts`` go to ranks 0..P-1; returns the rows received."""
    recv = send.new_empty((int(sum(recv_counts)),) + tuple(send.shape[1:]))
    dist.all_to_all_single(recv, send.contiguous(), list(map(int, recv_counts)), list(map(int, send_counts)),
                           group=group)
    return recv


def _exchange_counts(counts: torch.Tensor, group) -> torch.Tensor:
    """counts[p] rows go to rank p; returns how many rows arrive from each rank."""
    out = torch.empty_like(counts)
    dist.all_to_all_single(out, counts.contiguous(), group=group)
    return out


# ---------------------------------------------------------------------- partitions
class NodePartition:
    r"""An assignment of the nodes 0..N-1 to ``num_parts`` parts, with each part's local order.

    Built by :func:`partition_nodes`. Either contiguous blocks of an order (the node ids as
    given, or a locality order), described by ``num_parts + 1`` boundaries (plus the order when
    it is not the identity), or an explicit owner array.

    Attributes:
        num_nodes (int): N.
        num_parts (int): P (parts may be empty).
        part_sizes (list of int): nodes per part.
        edge_cut (int or None): edges u -> v (canonical, self-loops never cut) whose endpoints
            lie in different parts; None when built without a graph.
        halo_sizes (list of int or None): per part, the nodes of other parts adjacent (either
            direction) to one of its nodes: the rows it receives in every product.
        kind (str): "given", "locality" or "owner".

    Example:
        >>> from phasorgraph import DirectedGraph
        >>> g = DirectedGraph.from_edges([[0, 1, 2, 3], [1, 2, 3, 0]])
        >>> p = partition_nodes(g, 2, order="given")
        >>> p.part_sizes, p.edge_cut, p.halo_sizes
        ([2, 2], 2, [2, 2])
    """

    def __init__(self, num_nodes: int, num_parts: int, *, bounds: Optional[torch.Tensor] = None,
                 order: Optional[torch.Tensor] = None, owner: Optional[torch.Tensor] = None, kind: str = "given"):
        self.num_nodes = int(num_nodes)
        self.num_parts = int(num_parts)
        self.kind = kind
        self._bounds = bounds      # (P + 1,) boundaries into ``order`` (or into 0..N-1)
        self._order = order        # (N,) global ids in part order, or None (identity)
        self._owner = owner        # (N,) owner of each node, or None (derived from bounds)
        if owner is not None:
            self._sizes = torch.bincount(owner, minlength=self.num_parts)
        else:
            self._sizes = bounds.diff()
        self.edge_cut: Optional[int] = None
        self.halo_sizes: Optional[list] = None

    @property
    def part_sizes(self) -> list:
        return [int(s) for s in self._sizes]

    @property
    def owner(self) -> torch.Tensor:
        """(N,) int64 owner of every node (materialized for block partitions: O(N) memory)."""
        return self.owner_of(torch.arange(self.num_nodes))

    def owner_of(self, ids: torch.Tensor) -> torch.Tensor:
        """The part owning each of the global node ids (int64 tensor in, int64 tensor out)."""
        if self._owner is not None:
            return self._owner[ids]
        if self._order is None:
            return torch.searchsorted(self._bounds[1:], ids, right=True)
        return self._position_owner()[ids]

    def _position_owner(self) -> torch.Tensor:
        cached = getattr(self, "_owner_cache", None)
        if cached is None:
            cached = torch.empty(self.num_nodes, dtype=torch.int64)
            cached[self._order] = torch.repeat_interleave(torch.arange(self.num_parts), self._sizes)
            self._owner_cache = cached
        return cached

    def nodes(self, part: int) -> torch.Tensor:
        """Global ids of the nodes of ``part`` in their local order (int64, ascending for an owner
        array or given order, locality order otherwise)."""
        if isinstance(part, bool) or not isinstance(part, numbers.Integral) or not 0 <= int(part) < self.num_parts:
            raise GraphInputError(f"part must be an integer in [0, {self.num_parts}); got {part!r}")
        part = int(part)
        if self._owner is not None:
            return torch.nonzero(self._owner == part).reshape(-1)
        lo, hi = int(self._bounds[part]), int(self._bounds[part + 1])
        if self._order is None:
            return torch.arange(lo, hi)
        return self._order[lo:hi].clone()

    @property
    def cut_fraction(self) -> Optional[float]:
        """edge_cut / number of edges (None without a graph; 0 for a graph without edges)."""
        if self.edge_cut is None:
            return None
        return self.edge_cut / self._num_edges if self._num_edges else 0.0

    def _measure(self, graph: DirectedGraph) -> None:
        s, t = graph.source, graph.target
        self._num_edges = int(s.numel())
        if s.numel() == 0:
            self.edge_cut, self.halo_sizes = 0, [0] * self.num_parts
            return
        os_, ot = self.owner_of(s), self.owner_of(t)
        cut = os_ != ot
        self.edge_cut = int(cut.sum())
        n = max(self.num_nodes, 1)
        # (part, foreign neighbour) pairs from both directions of every cut edge, counted once
        keys = torch.cat([os_[cut] * n + t[cut], ot[cut] * n + s[cut]])
        parts = torch.unique(keys) // n
        self.halo_sizes = [int(c) for c in torch.bincount(parts, minlength=self.num_parts)]

    def __repr__(self) -> str:
        extra = "" if self.edge_cut is None else f", edge_cut={self.edge_cut}, halo_sizes={self.halo_sizes}"
        return (f"NodePartition(kind={self.kind!r}, num_nodes={self.num_nodes}, num_parts={self.num_parts}, "
                f"part_sizes={self.part_sizes}{extra})")


def _check_parts(num_parts) -> int:
    if isinstance(num_parts, bool) or not isinstance(num_parts, numbers.Integral) or int(num_parts) < 1:
        raise GraphInputError(f"num_parts must be an integer >= 1; got {num_parts!r}")
    return int(num_parts)


def _check_owner(owner, num_nodes: int, num_parts: Optional[int]) -> tuple:
    """Validate an owner array: one integer part id in [0, num_parts) per node."""
    o = as_index_tensor("owner", owner)
    if o.numel() != num_nodes:
        raise GraphInputError(f"owner must have one entry per node (length {num_nodes}); got length {o.numel()}")
    if num_parts is None:
        num_parts = int(o.max()) + 1 if o.numel() else 1
    num_parts = _check_parts(num_parts)
    if o.numel():
        lo, hi = int(o.min()), int(o.max())
        if lo < 0 or hi >= num_parts:
            bad = lo if lo < 0 else hi
            k = int(torch.nonzero(o == bad)[0])
            raise GraphInputError(f"owner must hold part ids in [0, {num_parts}); node {k} has owner {bad}")
    return o, num_parts


def _block_bounds(n: int, parts: int) -> torch.Tensor:
    """Near-equal contiguous blocks: boundaries floor(p N / P)."""
    return torch.tensor([(p * n) // parts for p in range(parts + 1)], dtype=torch.int64)


def partition_nodes(graph, num_parts: Optional[int] = None, order: Optional[str] = None, *,
                    owner: Any = None) -> NodePartition:
    r"""Split the nodes of a graph into ``num_parts`` parts, reporting edge cut and halo sizes.

    ``order="locality"`` (default) cuts the reverse Cuthill-McKee order of
    :meth:`DirectedGraph.locality_order` into contiguous blocks of near-equal node counts
    (:math:`\lfloor pN/P \rfloor` boundaries): that order keeps neighbours close, so few
    edges cross between blocks. ``order="given"`` cuts the node ids 0..N-1 as they are, which
    needs no graph (pass ``graph`` as the integer N) and costs O(P) memory on every rank. A
    precomputed assignment is passed as ``owner`` (one part id per node, e.g. from an external
    partitioner); each part then keeps its nodes in ascending id order.

    Args:
        graph: a DirectedGraph, or the node count N (then ``order="given"`` or ``owner``;
            no cut statistics).
        num_parts: P >= 1 (parts may come out empty when P > N). With ``owner`` it defaults
            to ``max(owner) + 1``.
        order: "locality" (default) or "given"; not allowed together with ``owner``.
        owner: optional (N,) integer array of part ids in [0, P).

    Returns:
        :class:`NodePartition` with ``edge_cut`` and ``halo_sizes`` filled in when a graph
        was given.

    Raises:
        GraphInputError: num_parts not a positive integer; unknown order; an owner array of the
            wrong length, with non-integers, or with a part id outside [0, num_parts).

    Notes:
        Balancing is by node count, not by edges; a graph with very uneven degrees may want an
        owner array from a partitioner that balances edges. Computing the locality order needs
        the whole graph on one process (O(N + E)); the result can be reused as an owner array.

    Example:
        >>> from phasorgraph import DirectedGraph
        >>> g = DirectedGraph.from_edges([[0, 2, 1, 3], [2, 0, 3, 1]])  # two 2-cycles, interleaved ids
        >>> partition_nodes(g, 2, order="given").edge_cut, partition_nodes(g, 2).edge_cut
        (4, 0)
    """
    if isinstance(graph, DirectedGraph):
        n = graph.num_nodes
    elif isinstance(graph, numbers.Integral) and not isinstance(graph, bool) and int(graph) >= 0:
        n, graph = int(graph), None
    else:
        raise GraphInputError(f"graph must be a DirectedGraph or a node count (integer >= 0); got {graph!r}")
    if owner is not None:
        if order is not None:
            raise GraphInputError(f"order must be None when owner is given (the owner array fixes the parts); "
                                  f"got order={order!r}")
        o, num_parts = _check_owner(owner, n, None if num_parts is None else _check_parts(num_parts))
        part = NodePartition(n, num_parts, owner=o, kind="owner")
    else:
        if num_parts is None:
            raise GraphInputError("num_parts must be given (an integer >= 1) unless owner is; got None")
        num_parts = _check_parts(num_parts)
        order = "locality" if order is None else order
        if order not in _ORDERS:
            raise GraphInputError(f"order must be one of {_ORDERS}; got {order!r}")
        bounds = _block_bounds(n, num_parts)
        if order == "given":
            part = NodePartition(n, num_parts, bounds=bounds, kind="given")
        else:
            if graph is None:
                raise GraphInputError("order='locality' needs the graph (a DirectedGraph); got a node count "
                                      "(use order='given' or an owner array)")
            _, perm = graph.locality_order()
            part = NodePartition(n, num_parts, bounds=bounds, order=perm, kind="locality")
    if graph is not None:
        part._measure(graph)
    return part


def _check_partition(partition, num_nodes: int, world: int) -> NodePartition:
    if isinstance(partition, NodePartition):
        if partition.num_nodes != num_nodes:
            raise GraphInputError(f"partition covers {partition.num_nodes} nodes but num_nodes is {num_nodes}")
    elif partition is None or isinstance(partition, (str, bool, numbers.Number)):
        raise GraphInputError(f"partition must be a NodePartition (from partition_nodes) or an owner array "
                              f"of length {num_nodes}; got {partition!r}")
    else:
        o, _ = _check_owner(partition, num_nodes, world)
        partition = NodePartition(num_nodes, world, owner=o, kind="owner")
    if partition.num_parts != world:
        raise GraphInputError(f"partition has {partition.num_parts} parts but the process group has {world} "
                              f"ranks; use one part per rank")
    return partition


# ---------------------------------------------------------------------- halo exchange
class _HaloPlan:
    """Who sends which owned rows to whom; built once per shard, used by every product.

    ``send_index`` lists local owned rows, grouped by destination rank (``send_counts``);
    the halo rows arrive grouped by source rank (``recv_counts``), in the shard's halo order.
    ``active`` is False when no rank has a halo (then nothing is ever exchanged).
    """

    __slots__ = ("group", "rank", "world", "num_owned", "num_halo", "send_index", "send_counts",
                 "recv_counts", "active", "rows_sent", "exchanges")

    def __init__(self, group, rank, world, num_owned, num_halo, send_index, send_counts, recv_counts, active):
        self.group, self.rank, self.world = group, rank, world
        self.num_owned, self.num_halo = num_owned, num_halo
        self.send_index = send_index
        self.send_counts = [int(c) for c in send_counts]
        self.recv_counts = [int(c) for c in recv_counts]
        self.active = active
        self.rows_sent = 0       # counters for benchmarks: rows sent by this rank, exchanges made
        self.exchanges = 0

    def forward_rows(self, x2d: torch.Tensor) -> torch.Tensor:
        """(num_owned, W) real -> (num_halo, W): the halo rows, from their owners."""
        if not self.active:
            return x2d.new_zeros((self.num_halo, x2d.shape[1]))
        send = x2d.index_select(0, self.send_index.to(x2d.device))
        self.rows_sent += int(send.shape[0])
        self.exchanges += 1
        return _all_to_all(send, self.send_counts, self.recv_counts, self.group)

    def reverse_rows(self, g_halo: torch.Tensor) -> torch.Tensor:
        """(num_halo, W) -> (num_owned, W): halo gradients sent back and summed at the owners."""
        out = g_halo.new_zeros((self.num_owned, g_halo.shape[1]))
        if not self.active:
            return out
        back = _all_to_all(g_halo, self.recv_counts, self.send_counts, self.group)
        self.rows_sent += int(g_halo.shape[0])
        self.exchanges += 1
        return out.index_add_(0, self.send_index.to(out.device), back)


def _as_real_2d(x: torch.Tensor) -> tuple:
    """(N, ...) real or complex as a real contiguous (N, W') block and how to undo it."""
    n, width = x.shape[0], math.prod(x.shape[1:])
    if x.is_complex():
        r = torch.view_as_real(x.resolve_conj().resolve_neg().contiguous()).reshape(n, 2 * width)
        return r, True
    return x.reshape(n, width), False


def _from_real_2d(r: torch.Tensor, is_complex: bool, tail: tuple) -> torch.Tensor:
    n = r.shape[0]
    if is_complex:
        return torch.view_as_complex(r.reshape((n,) + tail + (2,)).contiguous())
    return r.reshape((n,) + tail)


def _halo_rows(plan: _HaloPlan, x: torch.Tensor) -> torch.Tensor:
    r2, cplx = _as_real_2d(x)
    return _from_real_2d(plan.forward_rows(r2), cplx, tuple(x.shape[1:]))


def _reverse_halo(plan: _HaloPlan, g: torch.Tensor) -> torch.Tensor:
    r2, cplx = _as_real_2d(g)
    return _from_real_2d(plan.reverse_rows(r2), cplx, tuple(g.shape[1:]))


class _HaloExchange(torch.autograd.Function):
    """x (owned rows) -> halo rows; backward: the reverse exchange, summed at the owners."""

    @staticmethod
    def forward(ctx, x, plan):
        ctx.plan = plan
        return _halo_rows(plan, x)

    @staticmethod
    def backward(ctx, grad):
        return _reverse_halo(ctx.plan, grad.contiguous()), None


def halo_exchange(plan: _HaloPlan, x: torch.Tensor) -> torch.Tensor:
    """The halo rows of ``x`` (autograd-aware; backward is the reverse exchange)."""
    return _HaloExchange.apply(x, plan)


# ---------------------------------------------------------------------- sharded operators
def _owned_rows(matrix: torch.Tensor, num_owned: int) -> torch.Tensor:
    """The square local CSR with every row from ``num_owned`` on emptied (O(rows) work)."""
    crow, col, val = matrix.crow_indices(), matrix.col_indices(), matrix.values()
    n = matrix.shape[0]
    end = int(crow[num_owned])
    new_crow = torch.cat([crow[:num_owned + 1], crow.new_full((n - num_owned,), end)])
    return csr_matrix(new_crow, col[:end], val[:end], (n, n))


def _padded(z: Optional[torch.Tensor], rows: int) -> Optional[torch.Tensor]:
    """z (owned rows) with zero rows appended up to ``rows`` (the local block's owned + halo
    rows), so that it can be the fused addend of a local product; z itself without a halo."""
    if z is None or z.shape[0] == rows:
        return z
    return torch.cat([z, z.new_zeros((rows - z.shape[0],) + tuple(z.shape[1:]))], dim=0)


class _ShardedHermitianProduct(torch.autograd.Function):
    """y = alpha A x + shift x + beta z on the owned rows (exchange, then one fused local pass);
    backward: alpha A g + shift g for x (the same sharded product: A^H = A) and beta g for z."""

    @staticmethod
    def forward(ctx, x, z, op, alpha, shift, beta):
        ctx.op, ctx.alpha, ctx.shift, ctx.beta = op, alpha, shift, beta
        ctx.x_is_complex = x.is_complex()
        ctx.z_is_complex = z is not None and z.is_complex()
        return op._product(x, alpha, shift, z, beta)

    @staticmethod
    @once_differentiable
    def backward(ctx, grad):
        grad = grad.contiguous()
        gx = gz = None
        if ctx.needs_input_grad[0]:
            gx = ctx.op._product(grad, ctx.alpha, ctx.shift)
            if gx.is_complex() and not ctx.x_is_complex:
                gx = gx.real
        if ctx.needs_input_grad[1]:
            gz = grad * ctx.beta
            if gz.is_complex() and not ctx.z_is_complex:
                gz = gz.real
        return gx, gz, None, None, None, None


def _no_rows(ext: torch.Tensor, dtype: torch.dtype) -> torch.Tensor:
    """The (0, ...) result of a rank without rows, still attached to ``ext`` (its halo exchange
    must run in the backward like everyone else's)."""
    return torch.zeros(ext.shape, dtype=dtype, device=ext.device) + ext.sum() * 0


class ShardedOperator(SparseOperator):
    r"""The owned rows of an operator of the whole graph, multiplied with a halo exchange.

    Made by :meth:`GraphShard.operator`; a :class:`~phasorgraph.SparseOperator` whose products
    take and return the owned rows only: :math:`y_u = \sum_v A_{uv} x_v` for the owned u, the
    halo rows of x fetched from their owners first (one ``all_to_all_single``). Hermitian
    operators use one autograd function whose backward is the same sharded product applied
    to the gradient; other operators chain the exchange (backward: reverse exchange) with the
    local product (backward: the local conjugate transpose).

    Attributes:
        matrix: the local CSR (L, L), L = owned + halo nodes, rows from ``num_rows`` on empty.
        num_rows (int): owned rows; ``x`` has this many rows.
        num_nodes (int): N, the node count of the whole graph.
        shape: (num_rows, N), the block of rows this rank holds.
        hermitian, spectrum, kind, similar: as for the whole graph's operator (the spectrum
            interval agreed over ranks; ``similar`` holds a sharded base and the owned scale).
        max_eigenvalue: largest eigenvalue if known; :func:`phasorgraph.spectral.largest_eigenvalue`
            computes it collectively (:meth:`collective_max_eigenvalue`) when a layer needs it.

    Example:
        >>> import torch
        >>> from phasorgraph import DirectedGraph, normalized_laplacian
        >>> g = DirectedGraph.from_edges([[0, 1, 2], [1, 2, 0]])
        >>> shard = GraphShard.from_graph(g, partition_nodes(g, 1))  # one process: one part
        >>> op = shard.operator(normalized_laplacian, dtype=torch.float64)
        >>> torch.allclose(op @ torch.eye(3, dtype=torch.float64), normalized_laplacian(g, dtype=torch.float64).to_dense())
        True
    """

    def __init__(self, local: SparseOperator, shard: "GraphShard", *, spectrum, similar=None,
                 max_eigenvalue: Optional[float] = None):
        n_own = shard.num_rows
        self.matrix = _owned_rows(local.matrix, n_own)
        # plain Python facts (as SparseOperator keeps them): reading them never touches the sparse
        # matrix, which torch.compile cannot trace
        self._dtype, self._device = local.dtype, local.device
        self.hermitian = local.hermitian
        self.spectrum = spectrum
        self.kind = local.kind
        self.low_rank = None
        self.similar = similar
        self.max_eigenvalue = max_eigenvalue
        self._adjoint = None
        self._shard = shard
        self._local = SparseOperator(self.matrix, hermitian=False, kind=local.kind + "_owned_rows")

    # ------------------------------------------------------------------ facts
    @property
    def num_rows(self) -> int:
        return self._shard.num_rows

    @property
    def num_nodes(self) -> int:
        return self._shard.num_nodes

    @property
    def shape(self) -> torch.Size:
        return torch.Size((self.num_rows, self.num_nodes))

    @property
    def shard(self) -> "GraphShard":
        return self._shard

    @property
    def nnz(self) -> int:
        """Stored non-zeros of the owned rows."""
        return self._local.nnz

    def __repr__(self) -> str:
        s = self._shard
        return (f"ShardedOperator(kind={self.kind!r}, rank={s.rank}/{s.world_size}, rows={self.num_rows} of "
                f"{self.num_nodes}, halo={s.num_halo}, nnz={self.nnz}, dtype={self.dtype}, "
                f"hermitian={self.hermitian}, spectrum={self.spectrum})")

    def __getstate__(self):
        raise GraphInputError("a ShardedOperator belongs to a live process group and cannot be pickled; "
                              "rebuild it on each rank with shard.operator(...)")

    # ------------------------------------------------------------------ products
    def _check_x(self, x) -> None:
        if not isinstance(x, torch.Tensor):
            raise GraphInputError(f"x must be a torch.Tensor; got {type(x).__name__}")
        if x.dim() < 1 or x.shape[0] != self.num_rows:
            raise GraphInputError(f"x must have the {self.num_rows} owned rows of this shard (shape (N_own, ...)); "
                                  f"got shape {tuple(x.shape)}")
        precision = torch.float64 if x.dtype in (torch.float64, torch.complex128) else torch.float32
        own = torch.float64 if self.dtype in (torch.float64, torch.complex128) else torch.float32
        if x.dtype not in (torch.float32, torch.float64, torch.complex64, torch.complex128) or precision != own:
            raise GraphInputError(f"x has dtype {x.dtype} but the operator is {self.dtype}; use the same precision")

    def _extended(self, x: torch.Tensor, halo: torch.Tensor) -> torch.Tensor:
        return torch.cat([x, halo.to(x.dtype)], dim=0)

    def _product(self, x: torch.Tensor, alpha: float = 1.0, shift: float = 0.0, z: Optional[torch.Tensor] = None,
                 beta: float = 0.0) -> torch.Tensor:
        """Owned rows of ``alpha A x + shift x + beta z`` without autograd bookkeeping (inside
        autograd functions): the exchange, then one fused pass of the local kernel."""
        ext = self._extended(x, _halo_rows(self._shard._plan, x))
        if ext.shape[0] == 0:  # nothing local at all: a zero-row result of the right dtype
            dtype = torch.promote_types(x.dtype, self.dtype)
            if z is not None:
                dtype = torch.promote_types(dtype, z.dtype)
            return x.new_zeros(x.shape, dtype=dtype)
        with torch.no_grad():
            y = self._local.matmul_add(ext, _padded(z, ext.shape[0]), alpha=alpha, beta=beta, shift=shift)
        return y[: self.num_rows]

    def matmul(self, x: torch.Tensor) -> torch.Tensor:
        """Owned rows of ``A x`` for x (num_rows, ...), differentiable in x. Collective."""
        self._check_x(x)
        if self.hermitian:
            return _ShardedHermitianProduct.apply(x, None, self, 1.0, 0.0, 0.0)
        ext = self._extended(x, halo_exchange(self._shard._plan, x))
        if ext.shape[0] == 0:  # an empty part: no rows, but the exchange stays in the backward
            return _no_rows(ext, torch.promote_types(x.dtype, self.dtype))
        return general_matmul(self._local, ext)[: self.num_rows]

    __matmul__ = matmul

    def matmul_add(self, x: torch.Tensor, z: Optional[torch.Tensor] = None, *, alpha: float = 1.0,
                   beta: float = 1.0, shift: float = 0.0) -> torch.Tensor:
        """``alpha A x + shift x + beta z`` on the owned rows: one exchange and one fused pass of
        the local block's :meth:`SparseOperator.matmul_add` (z gets zero halo rows appended when
        the shard has a halo). Collective.

        Hermitian operators run in one autograd function whose backward is the same fused
        sharded product; others chain the exchange (backward: the reverse exchange) with the
        local fused product (backward: its conjugate transpose, alpha A^H g + shift g, and beta g).
        """
        self._check_x(x)
        if z is not None and (not isinstance(z, torch.Tensor) or tuple(z.shape) != tuple(x.shape)):
            raise GraphInputError(f"z must be None or a tensor of x's shape {tuple(x.shape)} (the owned rows); "
                                  f"got {tuple(z.shape) if isinstance(z, torch.Tensor) else type(z).__name__}")
        for name, value in (("alpha", alpha), ("shift", shift), ("beta", beta)):
            # (comparisons rather than math.isfinite, which torch.compile cannot trace on constants)
            if isinstance(value, bool) or not isinstance(value, numbers.Real) or not -math.inf < value < math.inf:
                raise GraphInputError(f"{name} must be a finite real number; got {value!r}")
        alpha, shift, beta = float(alpha), float(shift), float(beta)
        if self.hermitian:
            return _ShardedHermitianProduct.apply(x, z, self, alpha, shift, beta)
        ext = self._extended(x, halo_exchange(self._shard._plan, x))
        if ext.shape[0] == 0:  # an empty part: no rows, but the exchange stays in the backward
            y = _no_rows(ext, torch.promote_types(x.dtype, self.dtype))
            return y if z is None else y + beta * z
        return self._local.matmul_add(ext, _padded(z, ext.shape[0]), alpha=alpha, beta=beta,
                                      shift=shift)[: self.num_rows]

    def collective_max_eigenvalue(self, *, tol: float = 1e-8, max_steps: int = 300) -> float:
        r"""Collective: the largest eigenvalue, by Lanczos on the distributed vectors.

        Every rank keeps only its rows of the Lanczos vectors; inner products are summed over
        ranks (``all_reduce``) and each step re-orthogonalizes against all earlier vectors (twice,
        classical Gram-Schmidt), so in exact arithmetic N steps give the exact top eigenvalue.
        It stops when the top Ritz value changes by less than ``tol`` times its size over 3
        steps, when the Krylov space is exhausted, or after ``max_steps``. The start vector is a
        fixed function of the global node ids, so the result does not depend on the partition.
        :func:`phasorgraph.spectral.largest_eigenvalue` calls this for a sharded operator (and
        stores the value in ``max_eigenvalue``). A non-Hermitian operator uses its Hermitian
        ``similar`` base (same eigenvalues).
        """
        if not self.hermitian:
            if self.similar is None:
                raise GraphInputError(f"op (kind {self.kind!r}) is neither Hermitian nor similar to a Hermitian "
                                      f"operator; its largest eigenvalue is not computed on shards")
            return self.similar[0].collective_max_eigenvalue(tol=tol, max_steps=max_steps)
        shard = self._shard
        n = self.num_nodes
        if n == 0:
            return 0.0
        dtype = torch.complex128 if self.is_complex else torch.float64
        op = self.to(dtype)

        def total(t: torch.Tensor) -> torch.Tensor:
            if shard.world_size > 1:
                r = torch.view_as_real(t).contiguous() if t.is_complex() else t.contiguous()
                dist.all_reduce(r, group=shard.group)
                t = torch.view_as_complex(r) if t.is_complex() else r
            return t

        ids = shard.nodes.to(torch.float64)
        v = torch.frac(torch.sin(ids * 12.9898 + 1.0) * 43758.5453) - 0.5  # a fixed pseudo-random start
        if self.is_complex:
            v = torch.complex(v, torch.frac(torch.cos(ids * 78.233 + 2.0) * 24634.6345) - 0.5)
        v = v.to(dtype).reshape(-1, 1)
        v = v / total((v.conj() * v).real.sum()).sqrt()
        basis = v
        alphas, betas, history = [], [], []
        with torch.no_grad():
            for step in range(min(n, max_steps)):
                w = op.matmul(v)
                a = total((v.conj() * w).sum()).real
                alphas.append(float(a))
                for _ in range(2):  # full re-orthogonalization
                    w = w - basis @ total(basis.conj().T @ w)
                b = float(total((w.conj() * w).real.sum()).sqrt())
                T = np.diag(alphas) + np.diag(betas, 1) + np.diag(betas, -1)
                top = float(np.linalg.eigvalsh(T)[-1])
                history.append(top)
                done = len(history) > 3 and abs(history[-1] - history[-4]) <= tol * max(abs(top), 1e-300)
                if done or b <= 1e-13 * max(abs(top), 1.0) or step == min(n, max_steps) - 1:
                    return top
                betas.append(b)
                v = w / b
                basis = torch.cat([basis, v], dim=1)
        return history[-1]  # pragma: no cover - the loop always returns

    def transpose_conj(self) -> "ShardedOperator":
        if self.hermitian:
            return self
        raise GraphInputError(f"transpose_conj of a non-Hermitian sharded operator (kind {self.kind!r}) is not "
                              f"available; its products already carry their adjoint in the backward")

    # ------------------------------------------------------------------ conversions
    def to(self, dtype: Optional[torch.dtype] = None, device=None) -> "ShardedOperator":
        """A copy with another dtype and/or device (same shard and plan)."""
        local = SparseOperator(self.matrix, hermitian=self.hermitian, kind=self.kind).to(dtype, device)
        similar = None
        if self.similar is not None:
            base, scale = self.similar
            real = local.matrix.real.dtype if local.is_complex else local.dtype
            similar = (base.to(dtype, device), scale.to(device=local.device, dtype=real))
        return ShardedOperator(local, self._shard, spectrum=self.spectrum, similar=similar,
                               max_eigenvalue=self.max_eigenvalue)

    def to_dense(self) -> torch.Tensor:
        """The owned rows as a dense (num_rows, N) block. Small graphs only (N columns)."""
        s = self._shard
        local = self.matrix.to_dense()[: s.num_rows]
        out = local.new_zeros((s.num_rows, s.num_nodes))
        out[:, s.local_to_global] = local
        return out


# ---------------------------------------------------------------------- shards
class GraphShard:
    r"""The part of one directed graph that one rank of a process group owns, and its halo.

    Holds every edge with an endpoint among this rank's nodes (``nodes``, in local order),
    numbered locally as owned nodes ``0 .. num_rows - 1`` followed by the halo nodes
    (``halo_nodes``: adjacent nodes owned by other ranks, grouped by owner), the true degrees
    of the halo nodes (fetched from their owners) and the exchange plan. Features on a shard
    are the owned rows only: ``x_local = x[shard.nodes]``.

    It offers what layers ask of a graph: ``operator(builder, **kwargs)`` (cached) and
    ``magnetic_product(charge, phase=...)`` for a learned charge, so every layer that takes a
    graph takes a shard, with the owned rows of the single-process result.

    Build with the collective :meth:`from_local_edges` (each rank passes a disjoint slice of
    the edge list) or :meth:`from_graph` (the whole graph is at hand on every rank).

    Attributes:
        rank, world_size (int): this rank and the group size (0 and 1 without a process group).
        group: the process group (None: the default group).
        partition (NodePartition): the node partition, one part per rank.
        num_nodes (int): N of the whole graph.
        num_rows (int): owned nodes (rows of x here; may be 0).
        num_halo (int): halo nodes.
        nodes (Tensor): (num_rows,) int64 global ids of the owned nodes, in local order.
        halo_nodes (Tensor): (num_halo,) int64 global ids of the halo nodes, in local order.
        local_graph (DirectedGraph): the local graph on num_rows + num_halo nodes (owned edges,
            plus one degree-completing self-loop per halo node).

    Example:
        >>> import torch
        >>> from phasorgraph import DirectedGraph, operators
        >>> g = DirectedGraph.from_edges([[0, 1, 2], [1, 2, 0]])
        >>> shard = GraphShard.from_graph(g, partition_nodes(g, 1))
        >>> sorted(shard.nodes.tolist()), shard.num_halo
        ([0, 1, 2], 0)
    """

    def __init__(self, *, partition: NodePartition, group, rank: int, world: int, nodes: torch.Tensor,
                 halo: torch.Tensor, local_graph: DirectedGraph, plan: _HaloPlan, num_local_edges: int):
        self.partition = partition
        self.group = group
        self.rank, self.world_size = rank, world
        self.num_nodes = partition.num_nodes
        self.nodes = nodes
        self.halo_nodes = halo
        self.local_graph = local_graph
        self._plan = plan
        self.num_local_edges = num_local_edges
        self._operators: dict = {}

    # ------------------------------------------------------------------ facts
    @property
    def num_rows(self) -> int:
        return int(self.nodes.numel())

    @property
    def num_halo(self) -> int:
        return int(self.halo_nodes.numel())

    @property
    def local_to_global(self) -> torch.Tensor:
        """(num_rows + num_halo,) global id of every local node."""
        return torch.cat([self.nodes, self.halo_nodes])

    def exchange_counts(self) -> dict:
        """Rows sent per exchange and counters: ``{"rows_per_exchange", "rows_sent", "exchanges"}``."""
        p = self._plan
        return {"rows_per_exchange": int(sum(p.send_counts)), "rows_received_per_exchange": int(sum(p.recv_counts)),
                "rows_sent": p.rows_sent, "exchanges": p.exchanges}

    def __repr__(self) -> str:
        return (f"GraphShard(rank={self.rank}/{self.world_size}, rows={self.num_rows} of {self.num_nodes}, "
                f"halo={self.num_halo}, local_edges={self.num_local_edges})")

    def __getstate__(self):
        raise GraphInputError("a GraphShard belongs to a live process group and cannot be pickled; "
                              "build it on each rank with GraphShard.from_local_edges or from_graph")

    # ------------------------------------------------------------------ constructors
    @classmethod
    def from_local_edges(cls, source: Any, target: Any, weight: Any, num_nodes: int, partition,
                         group=None) -> "GraphShard":
        r"""Collective: build every rank's shard from a disjoint slice of the edge list per rank.

        Each rank passes any slice of the edges (as a loader reading its own part of a file
        would); slices must not overlap (a repeated edge is summed, as in
        :class:`DirectedGraph`). Each edge u -> v goes to the owners of u and of v (once when
        they coincide) in one ``all_to_all_single``; each rank then holds the edges at its own
        nodes, asks the owners of its halo nodes for their degrees, and builds its exchange
        plan. No rank holds more than its rows and halo (plus the partition: O(P) for block
        partitions, O(N) ids for an owner array).

        Args:
            source, target: (E_r,) integer node ids of this rank's slice (any array-like).
            weight: (E_r,) real weights, a scalar, or None (all 1).
            num_nodes: N of the whole graph (the same on every rank).
            partition: a :class:`NodePartition` with one part per rank, or an owner array.
            group: a process group (default None: the default group).

        Raises:
            GraphInputError on every rank when any rank's input is bad (node ids outside
            [0, N), mismatched lengths, non-finite weights, a partition of the wrong length
            or with a part outside [0, world size)), so no rank is left waiting.

        Example:
            >>> import torch
            >>> shard = GraphShard.from_local_edges([0, 1], [1, 2], None, 3, partition_nodes(3, 1, order="given"))
            >>> shard.num_rows, shard.local_graph.num_edges
            (3, 2)
        """
        rank, world = _group_info(group)
        problem = None
        try:
            if isinstance(num_nodes, bool) or not isinstance(num_nodes, numbers.Integral) or int(num_nodes) < 0:
                raise GraphInputError(f"num_nodes must be an integer >= 0; got {num_nodes!r}")
            n = int(num_nodes)
            partition = _check_partition(partition, n, world)
            src = as_index_tensor("source", source)
            dst = as_index_tensor("target", target)
            if src.numel() != dst.numel():
                raise GraphInputError(f"source and target must have the same length; got {src.numel()} and {dst.numel()}")
            w = as_weight_tensor(weight, src.numel())
            for name, ids in (("source", src), ("target", dst)):
                if ids.numel() and (int(ids.min()) < 0 or int(ids.max()) >= n):
                    bad = int(ids.min()) if int(ids.min()) < 0 else int(ids.max())
                    raise GraphInputError(f"{name} holds node {bad} but node ids must lie in [0, num_nodes = {n})")
        except GraphInputError as exc:
            problem = f"rank {rank}: {exc}"
        _agree(problem, group, world)
        return cls._build(src, dst, w, n, partition, group, rank, world)

    @classmethod
    def from_graph(cls, graph: DirectedGraph, partition, group=None) -> "GraphShard":
        """Collective: the shard of this rank when every rank has the whole graph.

        Each rank takes an equal slice of the canonical edge list and the shards are built as
        in :meth:`from_local_edges`.

        Example:
            >>> from phasorgraph import DirectedGraph
            >>> g = DirectedGraph.from_edges([[0, 1], [1, 2]])
            >>> GraphShard.from_graph(g, partition_nodes(g, 1)).num_rows
            3
        """
        rank, world = _group_info(group)
        problem = None
        if not isinstance(graph, DirectedGraph):
            problem = f"rank {rank}: graph must be a DirectedGraph; got {type(graph).__name__}"
        _agree(problem, group, world)
        e = graph.num_edges
        lo, hi = (rank * e) // world, ((rank + 1) * e) // world
        return cls.from_local_edges(graph.source[lo:hi], graph.target[lo:hi], graph.weight[lo:hi], graph.num_nodes,
                                    partition, group)

    @classmethod
    def _build(cls, src, dst, w, n, partition: NodePartition, group, rank, world) -> "GraphShard":
        # 1. send each edge to the owners of its endpoints
        ou, ov = partition.owner_of(src), partition.owner_of(dst)
        other = ov != ou
        dest = torch.cat([ou, ov[other]])
        es = torch.cat([src, src[other]])
        et = torch.cat([dst, dst[other]])
        ew = torch.cat([w, w[other]])
        if world > 1:
            order = torch.argsort(dest, stable=True)
            counts = torch.bincount(dest, minlength=world)
            incoming = _exchange_counts(counts, group)
            ids = torch.stack([es[order], et[order]], dim=1)
            ids = _all_to_all(ids, counts.tolist(), incoming.tolist(), group)
            ew = _all_to_all(ew[order], counts.tolist(), incoming.tolist(), group)
            es, et = ids[:, 0].contiguous(), ids[:, 1].contiguous()
        # 2. local numbering: owned nodes (local order), then halo nodes grouped by owner
        nodes = partition.nodes(rank)
        mine_sorted, mine_perm = torch.sort(nodes)
        ends = torch.cat([es, et])
        owned_mask = partition.owner_of(ends) == rank
        halo = torch.unique(ends[~owned_mask])                          # ascending ids
        halo_owner = partition.owner_of(halo)
        by_owner = torch.argsort(halo_owner, stable=True)
        halo, halo_owner = halo[by_owner], halo_owner[by_owner]
        n_own, n_halo = int(nodes.numel()), int(halo.numel())
        halo_sorted, halo_perm = torch.sort(halo)

        def local_index(ids: torch.Tensor) -> torch.Tensor:
            out = torch.empty_like(ids)
            mine = partition.owner_of(ids) == rank
            out[mine] = mine_perm[torch.searchsorted(mine_sorted, ids[mine])]
            out[~mine] = n_own + halo_perm[torch.searchsorted(halo_sorted, ids[~mine])]
            return out

        ls, lt = local_index(es), local_index(et)
        # 3. the plan: ask each owner for the halo rows it owns
        recv_counts = torch.bincount(halo_owner, minlength=world)
        if world > 1:
            send_counts = _exchange_counts(recv_counts, group)
            requested = _all_to_all(halo, recv_counts.tolist(), send_counts.tolist(), group)
            sizes = torch.tensor([n_halo], dtype=torch.int64)
            dist.all_reduce(sizes, op=dist.ReduceOp.MAX, group=group)
            active = int(sizes) > 0
        else:
            send_counts, requested, active = torch.zeros(1, dtype=torch.int64), halo, False
        send_index = mine_perm[torch.searchsorted(mine_sorted, requested)] if requested.numel() else \
            torch.zeros(0, dtype=torch.int64)
        plan = _HaloPlan(group, rank, world, n_own, n_halo, send_index, send_counts.tolist(),
                         recv_counts.tolist(), active)
        # 4. degrees d = As 1 of owned nodes are complete here; halo nodes get theirs from the owners
        base = DirectedGraph(ls, lt, ew, n_own + n_halo)
        bw = base.weight
        local_degree = (torch.bincount(base.source, weights=bw, minlength=n_own + n_halo)
                        + torch.bincount(base.target, weights=bw, minlength=n_own + n_halo)) * 0.5
        own_degree = local_degree[:n_own].reshape(-1, 1).contiguous()
        halo_degree = plan.forward_rows(own_degree).reshape(-1) if active else torch.zeros(n_halo, dtype=torch.float64)
        missing = halo_degree - local_degree[n_own:]
        pad = missing > 0
        if bool(pad.any()):
            loops = torch.nonzero(pad).reshape(-1) + n_own
            local_graph = DirectedGraph(torch.cat([base.source, loops]), torch.cat([base.target, loops]),
                                        torch.cat([bw, missing[pad]]), n_own + n_halo)
        else:
            local_graph = base
        plan.rows_sent = plan.exchanges = 0
        return cls(partition=partition, group=group, rank=rank, world=world, nodes=nodes, halo=halo,
                   local_graph=local_graph, plan=plan, num_local_edges=base.num_edges)

    # ------------------------------------------------------------------ graph-like protocol
    def operator(self, builder: Callable, *, device: Any = None, **options) -> ShardedOperator:
        r"""Collective, cached: the owned rows of ``builder(whole_graph, **options)``, on ``device``.

        ``builder`` is one of :data:`LOCAL_BUILDERS` (``operators.normalized_laplacian``,
        ``magnetic_laplacian``, ``diffusion``, ``renormalized_adjacency``, ``random_walk``, ...).
        The spectrum interval is agreed over ranks (min of the lows, max of the highs), which
        matters for intervals that depend on the largest degree. Operators that need the
        whole graph (``pagerank_laplacian``, ``proximity_operators``) are refused.

        Example:
            >>> import torch
            >>> from phasorgraph import DirectedGraph, operators
            >>> g = DirectedGraph.from_edges([[0, 1], [1, 2]])
            >>> op = GraphShard.from_graph(g, partition_nodes(g, 1)).operator(operators.diffusion)
            >>> op.num_rows, op.spectrum
            (3, (0.0, 1.0))
        """
        if builder not in LOCAL_BUILDERS:
            names = ", ".join(f.__name__ for f in LOCAL_BUILDERS)
            raise GraphInputError(
                f"builder must be one of the operators whose rows depend only on the edges and degrees "
                f"around each node ({names}); got {getattr(builder, '__name__', builder)!r} "
                f"(pagerank_laplacian and proximity_operators need the whole graph)")
        where = None if device is None else str(torch.device(device))
        key = (builder.__name__, where) + tuple(sorted((k, repr(v)) for k, v in options.items()))
        cached = self._operators.get(key)
        if cached is not None:
            return cached
        op = self._shard_operator(builder(self.local_graph, **options))
        if where is not None and str(op.device) != where:
            op = op.to(device=where)
        self._operators[key] = op
        return op

    def _shard_operator(self, local: SparseOperator) -> ShardedOperator:
        if local.low_rank is not None:  # pragma: no cover - no local builder has one
            raise GraphInputError(f"operator {local.kind!r} has a dense low-rank part; it cannot be sharded")
        spectrum = local.spectrum
        if spectrum is not None and self.world_size > 1:
            bounds = torch.tensor([-spectrum[0], spectrum[1]], dtype=torch.float64)
            dist.all_reduce(bounds, op=dist.ReduceOp.MAX, group=self.group)
            spectrum = (float(-bounds[0]), float(bounds[1]))
        similar = None
        if local.similar is not None:
            base, scale = local.similar
            similar = (self._shard_operator(base), scale[: self.num_rows].clone())
        return ShardedOperator(local, self, spectrum=spectrum, similar=similar)

    def magnetic_product(self, charge: torch.Tensor, *, phase: str = "difference") -> Callable:
        r"""The map :math:`x \mapsto L_{norm}(q)\, x` on the owned rows at a tensor charge.

        As :func:`phasorgraph.learned_charge.magnetic_product` (values built once from ``charge``,
        differentiable in q and x), with the halo rows of x exchanged first. The gradient of
        q on each rank is the part from its own rows; summed over ranks it is the gradient of
        the whole graph (DistributedDataParallel averages it like any other parameter).
        Collective in every call of the returned map.

        Example:
            >>> import torch
            >>> from phasorgraph import DirectedGraph
            >>> g = DirectedGraph.from_edges([[0, 1, 2], [1, 2, 0]])
            >>> shard = GraphShard.from_graph(g, partition_nodes(g, 1))
            >>> q = torch.tensor(0.1, requires_grad=True)
            >>> y = shard.magnetic_product(q)(torch.ones(shard.num_rows, 2))
            >>> y.abs().sum().backward(); y.shape, q.grad is not None
            (torch.Size([3, 2]), True)
        """
        local_apply = magnetic_product(self.local_graph, charge, phase=phase)
        n_own = self.num_rows
        plan = self._plan

        def apply(x: torch.Tensor) -> torch.Tensor:
            if not isinstance(x, torch.Tensor) or x.dim() < 1 or x.shape[0] != n_own:
                raise GraphInputError(f"x must have the {n_own} owned rows of this shard (shape (N_own, ...)); "
                                      f"got shape {tuple(getattr(x, 'shape', ()))}")
            ext = torch.cat([x, halo_exchange(plan, x)], dim=0)
            if ext.shape[0] == 0:  # an empty part: no rows, but the exchange stays in the backward
                cdt = torch.complex128 if charge.dtype == torch.float64 else torch.complex64
                return _no_rows(ext, cdt) + charge * 0
            return local_apply(ext)[:n_own]

        return apply

    def halo(self, x: torch.Tensor) -> torch.Tensor:
        """Collective: the halo rows of x (num_rows, ...) -> (num_halo, ...); differentiable.

        The backward sends the gradient of each halo row back to its owner, where the gradients
        from all ranks are summed.

        Example:
            >>> import torch
            >>> from phasorgraph import DirectedGraph
            >>> g = DirectedGraph.from_edges([[0, 1], [1, 2]])
            >>> shard = GraphShard.from_graph(g, partition_nodes(g, 1))  # one part: no halo
            >>> shard.halo(torch.ones(3, 4)).shape
            torch.Size([0, 4])
        """
        if not isinstance(x, torch.Tensor) or x.dim() < 1 or x.shape[0] != self.num_rows:
            raise GraphInputError(f"x must have the {self.num_rows} owned rows of this shard; "
                                  f"got shape {tuple(getattr(x, 'shape', ()))}")
        return halo_exchange(self._plan, x)
