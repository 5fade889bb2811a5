"""Data-parallel training: 2 processes, gloo on CPU, DistributedDataParallel over GraphBatch
mini-batches, with a learned charge.

Reference: the single-process gradient of the averaged loss over both shards, computed here in
the parent. DistributedDataParallel averages gradients over ranks (PyTorch DDP documentation),
so every rank's gradient must equal the gradient of (loss_0 + loss_1) / 2, and the parameters
after each SGD step must equal those of one process stepping on that averaged loss.

Rendezvous is a file:// in a temporary directory (no network), the process group has a 60 s
timeout, the parent waits at most 120 s and kills its children on any failure.
"""

import datetime
import os

import pytest
import torch
import torch.distributed as dist
from torch import nn

from phasorgraph import DirectedGraph
from ranks import run_ranks
from phasorgraph.data import GraphBatch, directed_block_model, random_out_graph
from phasorgraph.nn import LearnedCharge, MagneticFilter
from phasorgraph.learned_charge import magnetic_matmul

WORLD = 2
STEPS = 3
BATCH = 2
CHANNELS = 3
LR = 0.2


class ChargeRegressor(nn.Module):
    """y_i = mean over graph i of Linear(|L_norm(q) x|): a graph-level model with a learned charge q."""

    def __init__(self, channels: int = CHANNELS):
        super().__init__()
        self.charge = nn.Parameter(torch.tensor(0.1, dtype=torch.float64))
        self.linear = nn.Linear(channels, 1, dtype=torch.float64)

    def forward(self, batch: GraphBatch, x: torch.Tensor) -> torch.Tensor:
        h = magnetic_matmul(batch.graph, self.charge, x).abs()
        return batch.readout(self.linear(h), "mean").squeeze(-1)


class FilterRegressor(nn.Module):
    """The library's layers: a MagneticFilter with a learned charge beside one with a fixed
    charge (its operator cached per graph, never a buffer), modulus, Linear, mean readout."""

    def __init__(self, channels: int = CHANNELS):
        super().__init__()
        self.learned = MagneticFilter(channels, 4, order=2, charge=LearnedCharge(start=0.1), dtype=torch.float64)
        self.fixed = MagneticFilter(channels, 2, order=1, charge=0.25, dtype=torch.float64)
        self.linear = nn.Linear(6, 1, dtype=torch.float64)

    def forward(self, batch: GraphBatch, x: torch.Tensor) -> torch.Tensor:
        h = torch.cat([self.learned(x, batch.graph), self.fixed(x, batch.graph)], dim=1).abs()
        return batch.readout(self.linear(h), "mean").squeeze(-1)


MODELS = {"charge_regressor": ChargeRegressor, "filter_regressor": FilterRegressor}


def dataset():
    """12 small directed graphs with node features and a target each (seeded, identical in every process)."""
    graphs = []
    for i in range(12):
        if i % 2:
            graphs.append(random_out_graph(5 + i % 4, 2, seed=i))
        else:
            g, _ = directed_block_model([3, 4], 0.5, [[0.5, 0.9], [0.1, 0.5]], seed=i)
            graphs.append(g)
    graphs[4] = DirectedGraph.from_edges(torch.empty(2, 0, dtype=torch.int64), num_nodes=0)  # an empty graph
    gen = torch.Generator().manual_seed(0)
    features = [torch.randn(g.num_nodes, CHANNELS, dtype=torch.float64, generator=gen) for g in graphs]
    targets = torch.randn(len(graphs), dtype=torch.float64, generator=gen)
    return graphs, features, targets


def shard_batches(rank: int):
    """Rank r trains on graphs r, r + 2, ...; step s uses the s-th mini-batch of that shard."""
    graphs, features, targets = dataset()
    mine = list(range(rank, len(graphs), WORLD))
    out = []
    for s in range(STEPS):
        idx = mine[s * BATCH:(s + 1) * BATCH]
        out.append((GraphBatch.from_graphs([graphs[i] for i in idx]), torch.cat([features[i] for i in idx]), targets[idx]))
    return out


def new_model(name: str) -> nn.Module:
    torch.manual_seed(0)
    return MODELS[name]()


def learned_charge_names(model: nn.Module) -> list:
    return [k for k, _ in model.named_parameters() if "charge" in k]


def _train_ddp(name: str, rank: int) -> dict:
    model = new_model(name)
    if rank == 1:  # DDP must broadcast rank 0's parameters at construction
        with torch.no_grad():
            for p in model.parameters():
                p.add_(1.0)
    ddp = nn.parallel.DistributedDataParallel(model)
    start = {k: v.detach().clone() for k, v in model.state_dict().items()}
    opt = torch.optim.SGD(ddp.parameters(), lr=LR)
    grads = []
    for batch, x, y in shard_batches(rank):
        opt.zero_grad()
        loss = torch.nn.functional.mse_loss(ddp(batch, x), y)
        loss.backward()
        grads.append({k: p.grad.detach().clone() for k, p in model.named_parameters()})
        opt.step()
    final = {k: v.detach().clone() for k, v in model.state_dict().items()}
    buffers = [k for k, b in model.named_buffers() if b.layout != torch.strided]
    return {"start": start, "grads": grads, "final": final, "sparse_buffers": buffers}


def _worker(rank: int, init_file: str, out_dir: str) -> None:
    torch.set_num_threads(1)
    dist.init_process_group("gloo", init_method=f"file://{init_file}", rank=rank, world_size=WORLD,
                            timeout=datetime.timedelta(seconds=60))
    try:
        out = {name: _train_ddp(name, rank) for name in MODELS}
        torch.save(out, os.path.join(out_dir, f"rank{rank}.pt"))
    finally:
        dist.destroy_process_group()


def reference(name: str):
    """One process: step on the averaged loss of both shards' mini-batches."""
    model = new_model(name)
    start = {k: v.detach().clone() for k, v in model.state_dict().items()}
    opt = torch.optim.SGD(model.parameters(), lr=LR)
    shards = [shard_batches(r) for r in range(WORLD)]
    grads = []
    for step in range(STEPS):
        opt.zero_grad()
        losses = [torch.nn.functional.mse_loss(model(b, x), y) for b, x, y in (s[step] for s in shards)]
        (sum(losses) / WORLD).backward()
        grads.append({k: p.grad.detach().clone() for k, p in model.named_parameters()})
        opt.step()
    return start, grads, {k: v.detach().clone() for k, v in model.state_dict().items()}, learned_charge_names(model)


def run_workers(tmp_path, timeout_s: float = 120.0):
    init_file = str(tmp_path / "rendezvous")
    run_ranks(_worker, (init_file, str(tmp_path)), WORLD, start_method="spawn", timeout_s=timeout_s)
    return [torch.load(tmp_path / f"rank{r}.pt") for r in range(WORLD)]


@pytest.fixture(scope="module")
def ddp_results(tmp_path_factory):
    return run_workers(tmp_path_factory.mktemp("ddp"))


@pytest.mark.parametrize("name", sorted(MODELS))
def test_ddp_gradients_agree_across_ranks_and_match_the_averaged_loss(ddp_results, name):
    ranks = [r[name] for r in ddp_results]
    start, grads, final, charges = reference(name)
    assert charges and all(grads[0][k].abs().max() > 0 for k in charges)  # the charge really is learned
    for out in ranks:
        assert out["sparse_buffers"] == []  # nothing sparse for DDP to broadcast
        for k in start:  # DDP broadcast rank 0's initial parameters (rank 1 started shifted)
            torch.testing.assert_close(out["start"][k], start[k], rtol=0, atol=0)
        for step in range(STEPS):
            for k in grads[step]:
                torch.testing.assert_close(out["grads"][step][k], ranks[0]["grads"][step][k], rtol=0, atol=0)
                torch.testing.assert_close(out["grads"][step][k], grads[step][k], rtol=1e-10, atol=1e-12)
        for k in final:
            torch.testing.assert_close(out["final"][k], final[k], rtol=1e-10, atol=1e-12)
    for k in charges:
        assert not torch.equal(final[k], start[k])
