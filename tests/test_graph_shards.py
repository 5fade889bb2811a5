"""One graph across 2 and 3 gloo ranks (phasorgraph.distributed), checked against one process.

References: the single-process operators and layers of this package on the whole graph (their
own dense references live in test_operators.py and the layer tests); the sharded results
must equal their owned rows, and the parameter gradients summed over ranks must equal the
single-process gradient (the gradient of a sum of per-rank losses is the sum of the ranks'
gradients: linearity of differentiation). DistributedDataParallel averages gradients over
ranks (PyTorch DDP documentation), so DDP steps on per-rank losses L_r must match one process
stepping on (sum_r L_r) / world. Custom autograd functions are checked with
torch.autograd.gradcheck in float64 on a replicated function (every rank evaluates the same
x -> y, so every rank perturbs the same entry at the same time).

All the checks of one world size run in ONE start of the ranks (forked where the platform
allows, else spawned): file:// rendezvous in a temporary directory (no network), a 60 s process-group
timeout, the parent waits at most 240 s and kills its own children on any failure.
"""

from __future__ import annotations

import contextlib
import datetime
import io
import os
import runpy
import sys
from pathlib import Path

import numpy as np
import pytest
import torch
import torch.distributed as dist
import torch.multiprocessing as mp
from hypothesis import given
from hypothesis import strategies as st

from phasorgraph import DirectedGraph, GraphInputError
from ranks import run_ranks
from phasorgraph import operators as O
from phasorgraph.distributed import GraphShard, NodePartition, partition_nodes
from phasorgraph.nn import (ChebyshevFilter, DiffusionScattering, DiffusionWavelets, LearnedCharge, MagneticFilter,
                            RenormalizedFilter, SpectralMultiplier)

from strategies import directed_graphs

ROOT = Path(__file__).resolve().parents[1]
# fork (Linux) starts the ranks in a fraction of a second: they inherit the imported torch and
# phasorgraph; a fresh interpreter per rank ("spawn") took 15-20 s on the loaded 2-core machine.
# The ranks are single-threaded, and this process keeps one torch thread (conftest.py).
START_METHOD = "fork" if "fork" in mp.get_all_start_methods() else "spawn"
F64, C128 = torch.float64, torch.complex128
STEPS, LR = 3, 0.3
FUSED = {"alpha": 0.7, "shift": -0.3, "beta": -1.2}

BUILDERS = [
    ("normalized_laplacian", O.normalized_laplacian, {"dtype": F64}),
    ("combinatorial_laplacian", O.combinatorial_laplacian, {"dtype": F64}),
    ("random_walk_laplacian", O.random_walk_laplacian, {"dtype": F64}),
    ("renormalized_adjacency", O.renormalized_adjacency, {"dtype": F64}),
    ("magnetic_adjacency", O.magnetic_adjacency, {"charge": 0.2, "dtype": C128}),
    ("magnetic_laplacian", O.magnetic_laplacian, {"charge": 0.2, "dtype": C128}),
    ("magnetic_laplacian_unnormalized", O.magnetic_laplacian, {"charge": 0.3, "normalized": False, "dtype": C128}),
    ("diffusion", O.diffusion, {"dtype": F64}),
    ("magnetic_diffusion", O.diffusion, {"charge": 0.1, "dtype": C128}),
    ("random_walk", O.random_walk, {"dtype": F64}),
]


# ---------------------------------------------------------------------- shared data (every process)
def shared_graph() -> DirectedGraph:
    """30 connected-ish nodes with weights in (0.05, 1], reciprocal edges, self-loops and
    duplicates, and 4 isolated nodes (30..33); seeded, identical in every process."""
    rng = np.random.default_rng(7)
    s = rng.integers(0, 30, 90)
    t = (s + rng.integers(1, 6, 90)) % 30
    s = np.concatenate([s, t[:20], [3, 3, 11]])
    t = np.concatenate([t, s[:20], [3, 4, 11]])
    w = rng.uniform(0.05, 1.0, s.size)
    return DirectedGraph(s, t, w, 34)


def small_graph() -> DirectedGraph:
    """9 nodes for gradcheck (one isolated)."""
    return DirectedGraph([0, 1, 2, 3, 4, 5, 6, 2, 7], [1, 2, 3, 4, 5, 6, 0, 0, 7],
                         [0.5, 1.0, 0.3, 0.8, 0.9, 0.2, 0.7, 0.4, 1.0], 9)


def partition_for(graph: DirectedGraph, world: int):
    """World 2: locality blocks. World 3: an owner array leaving part 1 EMPTY (its rank owns
    nothing but takes part in every exchange)."""
    if world == 2:
        return partition_nodes(graph, 2)
    owner = torch.tensor([0 if i % 3 else 2 for i in range(graph.num_nodes)])
    return partition_nodes(graph, num_parts=3, owner=owner)


def features(n: int, width: int = 3, seed: int = 0) -> torch.Tensor:
    return torch.randn(n, width, dtype=F64, generator=torch.Generator().manual_seed(seed))


def node_weights(n: int) -> torch.Tensor:
    return torch.rand(n, dtype=F64, generator=torch.Generator().manual_seed(11)) + 0.5


def layer_cases():
    """name -> (make_layer, input kind): "graph" passes the graph-like (DirectedGraph or shard),
    otherwise the name of the operator in BUILDERS."""
    return {
        "chebyshev": (lambda: ChebyshevFilter(3, 4, order=3, max_eigenvalue=2.0, dtype=F64), "normalized_laplacian"),
        "chebyshev_magnetic": (lambda: ChebyshevFilter(3, 4, order=2, max_eigenvalue=2.0, complex_weights=True, dtype=F64),
                               "magnetic_laplacian"),
        # no max_eigenvalue: computed (one process: numpy eigvalsh; shards: collective Lanczos)
        "chebyshev_eigenvalue": (lambda: ChebyshevFilter(3, 4, order=2, dtype=F64), "combinatorial_laplacian"),
        "magnetic_fixed": (lambda: MagneticFilter(3, 4, order=2, charge=0.2, dtype=F64), "graph"),
        "magnetic_bank": (lambda: MagneticFilter(3, 4, order=2, charge=[0.0, 0.25], dtype=F64), "graph"),
        "magnetic_learned": (lambda: MagneticFilter(3, 4, order=2, charge=LearnedCharge(0.1), dtype=F64), "graph"),
        "renormalized_graph": (lambda: RenormalizedFilter(3, 4, dtype=F64), "graph"),
        "renormalized_op": (lambda: RenormalizedFilter(3, 2, dtype=F64), "renormalized_adjacency"),
        "wavelets": (lambda: DiffusionWavelets(2), "diffusion"),
        "wavelets_walk": (lambda: DiffusionWavelets(2), "random_walk"),
        "wavelets_magnetic": (lambda: DiffusionWavelets(2), "magnetic_diffusion"),
        "scattering": (lambda: DiffusionScattering(3, scales=2, order=2, out_channels=4, dtype=F64), "diffusion"),
    }


def _operator_of(graph_like, name):
    _, builder, kwargs = next(b for b in BUILDERS if b[0] == name)
    if isinstance(graph_like, DirectedGraph):
        return builder(graph_like, **kwargs)
    return graph_like.operator(builder, **kwargs)


def run_layer(name, graph_like, x):
    """(output, loss) of one layer case; the loss weights each node's squared modulus."""
    torch.manual_seed(3)
    make, kind = layer_cases()[name]
    layer = make()
    arg = graph_like if kind == "graph" else _operator_of(graph_like, kind)
    out = layer(x, arg)
    return layer, out


class DDPModel(torch.nn.Module):
    """A learned-charge MagneticFilter, modulus, then a ChebyshevFilter on the normalized Laplacian."""

    def __init__(self):
        super().__init__()
        self.magnetic = MagneticFilter(3, 4, order=2, charge=LearnedCharge(0.1), dtype=F64)
        self.chebyshev = ChebyshevFilter(4, 1, order=2, max_eigenvalue=2.0, dtype=F64)

    def forward(self, x, graph_like):
        h = self.magnetic(x, graph_like).abs()
        return self.chebyshev(h, _operator_of(graph_like, "normalized_laplacian")).squeeze(-1)


def ddp_targets(n: int) -> torch.Tensor:
    return torch.randn(n, dtype=F64, generator=torch.Generator().manual_seed(21))


# ---------------------------------------------------------------------- replicated wrappers for gradcheck
class _TakeRows(torch.autograd.Function):
    """Replicated x -> the owned rows; backward: scatter into N rows and sum over ranks."""

    @staticmethod
    def forward(ctx, x, nodes):
        ctx.nodes, ctx.n = nodes, x.shape[0]
        return x[nodes].clone()

    @staticmethod
    def backward(ctx, g):
        full = g.new_zeros((ctx.n,) + tuple(g.shape[1:]))
        full[ctx.nodes] = g
        r = torch.view_as_real(full).contiguous() if full.is_complex() else full.contiguous()
        dist.all_reduce(r)
        return (torch.view_as_complex(r) if full.is_complex() else r), None


class _GatherRows(torch.autograd.Function):
    """Owned rows -> the replicated (N, ...) result; backward: this rank's rows of the gradient."""

    @staticmethod
    def forward(ctx, y, nodes, n):
        ctx.nodes = nodes
        full = y.new_zeros((n,) + tuple(y.shape[1:]))
        full[nodes] = y
        r = torch.view_as_real(full).contiguous() if full.is_complex() else full.contiguous()
        dist.all_reduce(r)
        return torch.view_as_complex(r) if full.is_complex() else r

    @staticmethod
    def backward(ctx, g):
        return g[ctx.nodes].contiguous(), None, None


class _Shared(torch.autograd.Function):
    """A replicated parameter; backward sums its gradient over ranks."""

    @staticmethod
    def forward(ctx, q):
        return q.clone()

    @staticmethod
    def backward(ctx, g):
        g = g.clone()
        dist.all_reduce(g)
        return g


def _gradchecks(world: int) -> dict:
    g = small_graph()
    part = partition_nodes(g, world, order="given") if world == 2 else partition_nodes(
        g, num_parts=3, owner=torch.tensor([0, 0, 2, 2, 0, 2, 0, 2, 0]))
    shard = GraphShard.from_graph(g, part)
    nodes, n = shard.nodes, g.num_nodes
    x = features(n, 2, seed=4).requires_grad_()
    out = {}

    def replicated(op):
        return lambda x: _GatherRows.apply(op @ _TakeRows.apply(x, nodes), nodes, n)

    # the Hermitian product (complex operator, real x) and the general one (exchange + local adjoint)
    for name, kind in (("hermitian", "magnetic_laplacian"), ("general", "random_walk")):
        op = _operator_of(shard, kind)
        torch.manual_seed(0)  # fast mode draws its random directions: the same on every rank
        out[name] = torch.autograd.gradcheck(replicated(op), (x,), atol=1e-8, fast_mode=True)
    op = _operator_of(shard, "magnetic_laplacian")

    def fused(x):  # alpha A x + shift x + beta z, one autograd function (z depends on x too)
        xl = _TakeRows.apply(x, nodes)
        return _GatherRows.apply(op.matmul_add(xl, 2 * xl, alpha=0.7, shift=-0.3, beta=-1.0), nodes, n)

    torch.manual_seed(0)
    out["hermitian_fused"] = torch.autograd.gradcheck(fused, (x,), atol=1e-8, fast_mode=True)
    general = _operator_of(shard, "random_walk")

    def general_fused(x):  # the same on a non-Hermitian operator: exchange + local fused product
        xl = _TakeRows.apply(x, nodes)
        return _GatherRows.apply(general.matmul_add(xl, 2 * xl, alpha=0.7, shift=-0.3, beta=-1.0), nodes, n)

    torch.manual_seed(0)
    out["general_fused"] = torch.autograd.gradcheck(general_fused, (x,), atol=1e-8, fast_mode=True)
    q = torch.tensor(0.15, dtype=F64, requires_grad=True)

    def learned(x, q):
        apply = shard.magnetic_product(_Shared.apply(q))
        return _GatherRows.apply(apply(apply(_TakeRows.apply(x, nodes))), nodes, n)

    torch.manual_seed(0)
    out["learned_charge"] = torch.autograd.gradcheck(learned, (x, q), atol=1e-8, fast_mode=True)
    return out


# ---------------------------------------------------------------------- the worker
def _checks(rank: int, world: int) -> dict:
    g = shared_graph()
    part = partition_for(g, world)
    shard = GraphShard.from_graph(g, part)
    nodes = shard.nodes
    res = {"nodes": nodes, "halo": shard.halo_nodes, "part_sizes": part.part_sizes}
    # operators: dense owned rows, products and input gradients
    x = features(g.num_nodes)
    c = node_weights(g.num_nodes)[nodes]
    ops = {}
    for name, builder, kwargs in BUILDERS:
        op = shard.operator(builder, **kwargs)
        xl = x[nodes].clone().requires_grad_()
        y = op @ xl
        (y.abs() ** 2 * c[:, None]).sum().backward()
        ops[name] = {"dense": op.to_dense(), "y": y.detach(), "grad": xl.grad, "spectrum": op.spectrum,
                     "nnz": op.nnz, "repr": repr(op)}
        # the fused Chebyshev step alpha A x + shift x + beta z (one exchange, one local pass)
        xl = x[nodes].clone().requires_grad_()
        zl = (2 * x[nodes] + 1).requires_grad_()
        y = op.matmul_add(xl, zl, **FUSED)
        (y.abs() ** 2 * c[:, None]).sum().backward()
        ops[name].update(fused=y.detach(), fused_x_grad=xl.grad, fused_z_grad=zl.grad)
    res["operators"] = ops
    # shards built from disjoint local slices (every third edge on each rank, a different split)
    sl = slice(rank, None, world)
    other = GraphShard.from_local_edges(g.source[sl], g.target[sl], g.weight[sl], g.num_nodes, part)
    res["local_edges_dense"] = other.operator(O.magnetic_laplacian, charge=0.2, dtype=C128).to_dense()
    # layers
    layers = {}
    for name in layer_cases():
        xl = x[nodes].clone().requires_grad_()
        layer, out = run_layer(name, shard, xl)
        loss = (out.abs() ** 2 * c.reshape((-1,) + (1,) * (out.dim() - 1))).sum()
        loss.backward()
        layers[name] = {"out": out.detach(), "x_grad": xl.grad,
                        "param_grads": {k: p.grad.clone() for k, p in layer.named_parameters()}}
    res["layers"] = layers
    # gradcheck of the custom autograd functions on a replicated function
    res["gradcheck"] = _gradchecks(world)
    # DDP: a few SGD steps on per-rank losses
    torch.manual_seed(5)
    model = DDPModel()
    ddp = torch.nn.parallel.DistributedDataParallel(model)
    opt = torch.optim.SGD(ddp.parameters(), lr=LR)
    y = ddp_targets(g.num_nodes)[nodes]
    for _ in range(STEPS):
        opt.zero_grad()
        loss = ((ddp(x[nodes], shard) - y) ** 2).sum() / g.num_nodes
        loss.backward()
        opt.step()
    res["ddp_final"] = {k: v.detach().clone() for k, v in model.state_dict().items()}
    # bad partitions and bad input on one rank only: every rank gets a GraphInputError
    errors = {}
    for key, bad in (("wrong_length", torch.zeros(g.num_nodes - 1, dtype=torch.int64)),
                     ("out_of_range", torch.full((g.num_nodes,), world, dtype=torch.int64)),
                     ("wrong_parts", partition_nodes(g, world + 1))):
        try:
            GraphShard.from_graph(g, bad)
            errors[key] = None
        except GraphInputError as exc:
            errors[key] = str(exc)
    try:
        src = g.source.clone()
        if rank == 0:
            src[0] = g.num_nodes + 5  # only rank 0's slice is bad
        GraphShard.from_local_edges(src, g.target, g.weight, g.num_nodes, part)
        errors["one_rank_bad"] = None
    except GraphInputError as exc:
        errors["one_rank_bad"] = str(exc)
    try:  # a dense eigenbasis needs the whole operator
        SpectralMultiplier(3, 2, knots=[0.0, 1.0, 2.0], dtype=F64)(x[nodes], shard.operator(O.normalized_laplacian, dtype=F64))
        errors["spectral_multiplier"] = None
    except GraphInputError as exc:
        errors["spectral_multiplier"] = str(exc)
    res["errors"] = errors
    if world == 2:  # the tutorial, as torchrun would run it (the process group is already up)
        argv = sys.argv
        sys.argv = ["07_one_graph_many_ranks.py", "--quick"]
        sys.path.insert(0, str(ROOT / "tutorials"))
        out = io.StringIO()
        try:
            with contextlib.redirect_stdout(out):
                runpy.run_path(str(ROOT / "tutorials" / "07_one_graph_many_ranks.py"), run_name="__main__")
            res["tutorial"] = out.getvalue()
        finally:
            sys.argv = argv
    return res


def _worker(rank: int, world: int, init_file: str, out_dir: str) -> None:
    torch.set_num_threads(1)
    dist.init_process_group("gloo", init_method=f"file://{init_file}", rank=rank, world_size=world,
                            timeout=datetime.timedelta(seconds=60))
    try:
        torch.save(_checks(rank, world), os.path.join(out_dir, f"rank{rank}.pt"))
    finally:
        dist.destroy_process_group()


def run_world(world: int, tmp_path, timeout_s: float = 240.0) -> list:
    # DistributedDataParallel and gradcheck import torch._dynamo (and sympy) on first use: about
    # 10 s of CPU. Imported once here, before the fork, instead of once in every rank at once.
    import torch._dynamo  # noqa: F401

    # likewise the native kernels: compile (or load from numba's cache) the products the ranks
    # use, once, so that the forked ranks inherit them
    g = small_graph()
    for name, builder, kwargs in BUILDERS:
        x = features(g.num_nodes).requires_grad_()
        op = builder(g, **kwargs)
        op.matmul_add(x, x, alpha=0.5, shift=0.25).abs().sum().backward()
    q = torch.tensor(0.1, dtype=F64, requires_grad=True)
    g.magnetic_product(q)(features(g.num_nodes)).abs().sum().backward()

    run_ranks(_worker, (world, str(tmp_path / "rendezvous"), str(tmp_path)), world, start_method=START_METHOD,
              timeout_s=timeout_s)
    return [torch.load(tmp_path / f"rank{r}.pt", weights_only=False) for r in range(world)]


_RESULTS: dict = {}


@pytest.fixture(scope="module")
def spawned(tmp_path_factory):
    """world -> per-rank results; each world size is spawned once, on first use."""
    def get(world: int) -> list:
        if world not in _RESULTS:
            _RESULTS[world] = run_world(world, tmp_path_factory.mktemp(f"world{world}"))
        return _RESULTS[world]
    return get


WORLDS = pytest.mark.parametrize("world", [2, 3])


# ---------------------------------------------------------------------- single-process references
def close(a, b):
    torch.testing.assert_close(a, b, rtol=1e-9, atol=1e-9)


@WORLDS
def test_every_node_owned_once_and_an_empty_part_exists(spawned, world):
    ranks = spawned(world)
    nodes = torch.cat([r["nodes"] for r in ranks])
    assert sorted(nodes.tolist()) == list(range(shared_graph().num_nodes))
    if world == 3:
        assert ranks[1]["nodes"].numel() == 0 and ranks[1]["halo"].numel() == 0


@WORLDS
def test_sharded_operators_are_the_owned_rows(spawned, world):
    ranks = spawned(world)
    g = shared_graph()
    x, c = features(g.num_nodes), node_weights(g.num_nodes)
    for name, builder, kwargs in BUILDERS:
        full = builder(g, **kwargs)
        xr = x.clone().requires_grad_()
        y = full @ xr
        (y.abs() ** 2 * c[:, None]).sum().backward()
        dense = full.to_dense()
        for r in ranks:
            got = r["operators"][name]
            close(got["dense"], dense[r["nodes"]])         # the rows of builder(whole graph)
            close(got["y"], y.detach()[r["nodes"]])
            close(got["grad"], xr.grad[r["nodes"]])         # backward across the exchange
            assert got["spectrum"] == pytest.approx(full.spectrum, rel=1e-12), name  # agreed over ranks
            # fused step against the dense formula alpha A x + shift x + beta z (numpy, owned rows),
            # and its gradients against the whole-graph fused product
            xn, zn = x.numpy(), 2 * x.numpy() + 1
            want = FUSED["alpha"] * dense.numpy() @ xn + FUSED["shift"] * xn + FUSED["beta"] * zn
            np.testing.assert_allclose(got["fused"].numpy(), want[r["nodes"].numpy()], rtol=1e-10, atol=1e-10)
            xf, zf = x.clone().requires_grad_(), torch.from_numpy(zn).requires_grad_()
            (full.matmul_add(xf, zf, **FUSED).abs() ** 2 * c[:, None]).sum().backward()
            close(got["fused_x_grad"], xf.grad[r["nodes"]])
            close(got["fused_z_grad"], zf.grad[r["nodes"]])
            assert got["nnz"] == int((dense[r["nodes"]] != 0).sum()) and f"of 34" in got["repr"]
        dense_local = torch.cat([r["local_edges_dense"] for r in ranks])
    close(dense_local, O.magnetic_laplacian(g, 0.2, dtype=C128).to_dense()[torch.cat([r["nodes"] for r in ranks])])


@WORLDS
@pytest.mark.parametrize("name", sorted(layer_cases()))
def test_layers_on_shards_match_one_process(spawned, world, name):
    ranks = spawned(world)
    g = shared_graph()
    x = features(g.num_nodes).requires_grad_()
    c = node_weights(g.num_nodes)
    layer, out = run_layer(name, g, x)
    (out.abs() ** 2 * c.reshape((-1,) + (1,) * (out.dim() - 1))).sum().backward()
    for r in ranks:
        got = r["layers"][name]
        close(got["out"], out.detach()[r["nodes"]])
        close(got["x_grad"], x.grad[r["nodes"]])
    for k, p in layer.named_parameters():  # the gradient of a sum of losses: the sum over ranks
        close(sum(r["layers"][name]["param_grads"][k] for r in ranks), p.grad)


@WORLDS
def test_custom_autograd_functions_pass_gradcheck(spawned, world):
    ranks = spawned(world)
    for r in ranks:
        assert r["gradcheck"] and all(r["gradcheck"].values()), r["gradcheck"]


@WORLDS
def test_ddp_steps_match_one_process(spawned, world):
    ranks = spawned(world)
    g = shared_graph()
    torch.manual_seed(5)
    model = DDPModel()
    opt = torch.optim.SGD(model.parameters(), lr=LR)
    x, y = features(g.num_nodes), ddp_targets(g.num_nodes)
    start = {k: v.clone() for k, v in model.state_dict().items()}
    for _ in range(STEPS):
        opt.zero_grad()
        (((model(x, g) - y) ** 2).sum() / g.num_nodes / world).backward()  # DDP averages over ranks
        opt.step()
    final = model.state_dict()
    assert not torch.equal(final["magnetic.charge_logit"], start["magnetic.charge_logit"])  # q is learned
    for r in ranks:
        for k in final:
            close(r["ddp_final"][k], final[k])


@WORLDS
def test_bad_partitions_raise_on_every_rank(spawned, world):
    ranks = spawned(world)
    for r in ranks:
        e = r["errors"]
        assert "owner must have one entry per node (length 34); got length 33" in e["wrong_length"]
        assert f"owner must hold part ids in [0, {world}); node 0 has owner {world}" in e["out_of_range"]
        assert f"partition has {world + 1} parts but the process group has {world} ranks" in e["wrong_parts"]
        assert e["one_rank_bad"] is not None
    assert "source holds node 39" in ranks[0]["errors"]["one_rank_bad"]
    # rank 0 owns 17 rows at world 2 and 23 at world 3
    assert f"holds {ranks[0]['nodes'].numel()} of the 34 rows of its operator" in ranks[0]["errors"]["spectral_multiplier"]
    assert "another rank refused its input" in ranks[1]["errors"]["one_rank_bad"]


def test_tutorial_runs_under_two_ranks(spawned):
    ranks = spawned(2)
    text = ranks[0]["tutorial"]
    for line in ("Partitions into 2 block(s)", "rank 0:", "Tier classification, trained on 2 rank(s)"):
        assert line in text, text
    assert "rank 1:" in ranks[1]["tutorial"]  # each rank prints its own line
    err = float(text.split("max |sharded - whole graph| over the owned depots, all ranks: ")[1].split()[0])
    assert err < 1e-5  # float32 rounding (common practice, no source: a few ulps of O(1) values)


# ---------------------------------------------------------------------- partitions (one process, no spawn)
@given(directed_graphs(max_nodes=12), st.integers(1, 5), st.sampled_from(["locality", "given"]))
def test_partition_covers_every_node_once_and_reports_cut_and_halo(graph, parts, order):
    import networkx as nx

    p = partition_nodes(graph, parts, order=order)
    members = [p.nodes(k) for k in range(parts)]
    assert sorted(torch.cat(members).tolist()) == list(range(graph.num_nodes))
    assert [m.numel() for m in members] == p.part_sizes
    for k, m in enumerate(members):
        assert bool((p.owner_of(m) == k).all())
    G = graph.to_networkx()
    U = G.to_undirected()
    # networkx edge_boundary (out-edges leaving a part, self-loops never) and node_boundary
    assert p.edge_cut == sum(len(list(nx.edge_boundary(G, m.tolist()))) for m in members)
    assert p.halo_sizes == [len(nx.node_boundary(U, m.tolist())) for m in members]


def test_locality_blocks_cut_a_shuffled_path_once_per_boundary():
    # a path 0 - 1 - ... - 11 (both directions) under shuffled ids: contiguous blocks of the given
    # ids cut many edges, blocks of the reverse Cuthill-McKee order cut one pair per boundary
    perm = torch.randperm(12, generator=torch.Generator().manual_seed(0))
    s, t = perm[:-1], perm[1:]
    g = DirectedGraph(torch.cat([s, t]), torch.cat([t, s]), None, 12)
    assert partition_nodes(g, 3).edge_cut == 2 * 2
    assert partition_nodes(g, 3, order="given").edge_cut > 4


def test_partition_from_a_node_count_and_from_an_owner_array():
    p = partition_nodes(10, 4, order="given")
    assert p.part_sizes == [2, 3, 2, 3] and p.edge_cut is None
    assert p.owner.tolist() == [0, 0, 1, 1, 1, 2, 2, 3, 3, 3]
    q = partition_nodes(DirectedGraph([0, 1], [1, 2], None, 4), num_parts=3, owner=[2, 0, 0, 2])
    assert q.part_sizes == [2, 0, 2] and q.nodes(2).tolist() == [0, 3] and q.edge_cut == 1 and q.halo_sizes == [1, 0, 1]


@pytest.mark.parametrize("call, match", [
    (lambda g: partition_nodes(g, 0), r"num_parts must be an integer >= 1; got 0"),
    (lambda g: partition_nodes(g, 2, order="random"), r"order must be one of \('locality', 'given'\); got 'random'"),
    (lambda g: partition_nodes(g, owner=[0, 1]), r"owner must have one entry per node \(length 4\); got length 2"),
    (lambda g: partition_nodes(g, 2, owner=[0, 1, 2, 0]), r"owner must hold part ids in \[0, 2\); node 2 has owner 2"),
    (lambda g: partition_nodes(g, 2, owner=[0, -1, 1, 0]), r"owner must hold part ids in \[0, 2\); node 1 has owner -1"),
    (lambda g: partition_nodes(g, 2, owner=[0, 0.5, 1, 0]), r"owner must hold integer node ids; got the non-integer value 0.5"),
    (lambda g: partition_nodes(g, 2, order="given", owner=[0, 0, 1, 1]), r"order must be None when owner is given"),
    (lambda g: partition_nodes(4, 2), r"order='locality' needs the graph"),
    (lambda g: partition_nodes("g", 2), r"graph must be a DirectedGraph or a node count"),
    (lambda g: partition_nodes(g, 2).nodes(2), r"part must be an integer in \[0, 2\); got 2"),
    (lambda g: GraphShard.from_graph(g, [0, 0, 0]), r"owner must have one entry per node \(length 4\); got length 3"),
    (lambda g: GraphShard.from_graph(g, partition_nodes(g, 2)), r"partition has 2 parts but the process group has 1 ranks"),
    (lambda g: GraphShard.from_local_edges([0], [4], None, 4, [0, 0, 0, 0]), r"target holds node 4 but node ids must lie in \[0, num_nodes = 4\)"),
    (lambda g: GraphShard.from_graph(g, [0] * 4).operator(O.pagerank_laplacian), r"builder must be one of the operators"),
])
def test_bad_partitions_and_inputs_raise_graph_input_error(call, match):
    g = DirectedGraph([0, 1], [1, 2], None, 4)
    with pytest.raises(GraphInputError, match=match):
        call(g)


@given(directed_graphs(max_nodes=12, unit_weights=True))
def test_one_process_shard_operators_equal_the_whole_graph_operators(graph):
    # without a process group a shard is the whole graph (one part, no halo)
    shard = GraphShard.from_graph(graph, partition_nodes(graph, 1))
    assert shard.num_halo == 0 and sorted(shard.nodes.tolist()) == list(range(graph.num_nodes))
    for name, builder, kwargs in BUILDERS:
        close(shard.operator(builder, **kwargs).to_dense(), builder(graph, **kwargs).to_dense()[shard.nodes])


@pytest.mark.parametrize("name", ["magnetic_laplacian", "random_walk"])
def test_sharded_fused_step_is_one_local_pass(name):
    # without a process group (one part, no halo): alpha A x + shift x + beta z is ONE fused
    # product of the local block (one phasorgraph::csr_matmul, no separate adds) and equals the
    # dense formula (numpy); the backward too is one fused product per input
    from torch.utils._python_dispatch import TorchDispatchMode

    class Calls(TorchDispatchMode):
        def __init__(self):
            super().__init__()
            self.names = []

        def __torch_dispatch__(self, func, types, args=(), kwargs=None):
            self.names.append(str(func.overloadpacket))
            return func(*args, **(kwargs or {}))

    g = shared_graph()
    shard = GraphShard.from_graph(g, partition_nodes(g, 1))
    op = _operator_of(shard, name)
    nodes = shard.nodes.numpy()                      # the local order (locality blocks)
    x = features(g.num_nodes, 3)[nodes]
    z = features(g.num_nodes, 3, seed=1).to(op.dtype)[nodes]
    xr, zr = x.clone().requires_grad_(), z.clone().requires_grad_()
    with Calls() as calls:
        y = op.matmul_add(xr, zr, **FUSED)
    arithmetic = [c for c in calls.names if c.split(".")[-1] in ("add", "add_", "mul", "mul_", "sub")]
    assert calls.names.count("phasorgraph.csr_matmul") == 1 and not arithmetic, calls.names
    dense = _operator_of(g, name).to_dense().numpy()[nodes][:, nodes]
    xn, zn = x.numpy(), z.numpy()
    np.testing.assert_allclose(y.detach().numpy(), FUSED["alpha"] * dense @ xn + FUSED["shift"] * xn
                               + FUSED["beta"] * zn, rtol=1e-12, atol=1e-12)
    w = features(g.num_nodes, 3, seed=2).to(y.dtype)
    (w.conj() * y).real.sum().backward()
    # d/dx = Re(alpha A^H w + shift w), d/dz = beta w: the closed form of the adjoint
    gx = FUSED["alpha"] * dense.conj().T @ w.numpy() + FUSED["shift"] * w.numpy()
    np.testing.assert_allclose(xr.grad.numpy(), gx.real, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(zr.grad.numpy(), FUSED["beta"] * w.numpy(), rtol=1e-12, atol=1e-12)
    with pytest.raises(GraphInputError, match=r"z must be None or a tensor of x's shape \(34, 3\)"):
        op.matmul_add(x, z[:3])
    with pytest.raises(GraphInputError, match="beta must be a finite real number; got nan"):
        op.matmul_add(x, z, beta=float("nan"))


def test_shards_refuse_pickling():
    import pickle

    g = DirectedGraph([0, 1], [1, 2], None, 3)
    shard = GraphShard.from_graph(g, partition_nodes(g, 1))
    with pytest.raises(GraphInputError, match="cannot be pickled"):
        pickle.dumps(shard)
    with pytest.raises(GraphInputError, match="cannot be pickled"):
        pickle.dumps(shard.operator(O.diffusion))
