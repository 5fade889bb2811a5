"""One graph, many ranks: full-graph training with the depots split over processes.

Task. The tier classification of tutorials 01 and 05 on the generated freight network
(tutorials/freight.py), but as if the network were too large for one process: every rank owns
one block of depots, reads only its own slice of the lane list, and keeps only the lanes at its
own depots plus its halo (the neighbouring depots owned by other ranks). The model is the one
of tutorial 05 (a MagneticFilter on the lanes in front of a small MLP), unchanged: it is given a
``GraphShard`` where it was given the graph, and the features of the owned depots.

What the script shows, in order:
1. the partition: contiguous blocks of the depot ids as given against blocks of a locality
   order (reverse Cuthill-McKee), with the lanes cut and the halo each rank receives;
2. the collective load (``GraphShard.from_local_edges``): each rank passes its own slice of the
   lane list, lanes travel to the owners of their endpoints;
3. exactness: on the owned depots the sharded model gives the output of the same model on the
   whole graph in one process (checked here because the generated network fits anyway);
4. training with DistributedDataParallel: each rank's loss covers its own training depots,
   scaled so that DDP's average of the gradients is the gradient of the whole-graph loss;
   accuracies are summed over ranks with all_reduce.

Run it with torchrun (gloo on CPUs; one rank per process; 2 ranks on 2 cores is the sensible
maximum on a laptop, more ranks oversubscribe the cores):

    torchrun --nproc_per_node=2 tutorials/07_one_graph_many_ranks.py --quick

Without torchrun it runs as one rank (the same numbers, no exchange). For real multi-machine
runs use ``--nnodes`` and a rendezvous address as torchrun documents; on GPUs use the nccl
backend and move the features and model to each rank's GPU.

Cautions. Adding relational information makes predictions depend on whom an entity is
connected to; on networks of people or firms that can infer sensitive attributes and carry
bias along the edges. Obtain consent, follow applicable privacy law and ethics review;
predictions are not decisions.

Usage: torchrun --nproc_per_node=R tutorials/07_one_graph_many_ranks.py [--quick] [--seed S]
"""

from __future__ import annotations

import os
import time

import torch
import torch.distributed as dist
import torch.nn.functional as F
from torch import nn

import phasorgraph as pg
from phasorgraph import data
from phasorgraph.distributed import GraphShard, partition_nodes

import _common as C
import freight


class DepotClassifierWithLanes(nn.Module):
    """Tutorial 05's model: MagneticFilter on the lanes, ComplexToReal, a small MLP."""

    def __init__(self, fin, hidden, classes):
        super().__init__()
        self.lanes = pg.nn.MagneticFilter(fin, hidden, order=2, charge=0.25, phase="sign")
        self.to_real = pg.nn.ComplexToReal()
        self.body = nn.Sequential(nn.Linear(2 * hidden, hidden), nn.ReLU(), nn.Linear(hidden, hidden), nn.ReLU())
        self.head = nn.Linear(hidden, classes)

    def forward(self, x, graph):
        return self.head(self.body(self.to_real(self.lanes(x, graph))))


def say(rank: int, *text) -> None:
    if rank == 0:
        print(*text, flush=True)


def total(value: float) -> float:
    """Sum of a number over all ranks."""
    if not dist.is_initialized():
        return value
    t = torch.tensor([float(value)], dtype=torch.float64)
    dist.all_reduce(t)
    return float(t)


def largest(value: float) -> float:
    if not dist.is_initialized():
        return value
    t = torch.tensor([float(value)], dtype=torch.float64)
    dist.all_reduce(t, op=dist.ReduceOp.MAX)
    return float(t)


def main(argv=None) -> None:
    args = C.parse_args(__doc__, argv)
    started_here = False
    if not dist.is_initialized() and "WORLD_SIZE" in os.environ:  # launched by torchrun
        dist.init_process_group("gloo")
        started_here = True
    rank = dist.get_rank() if dist.is_initialized() else 0
    world = dist.get_world_size() if dist.is_initialized() else 1
    if rank == 0:
        C.banner(f"07 one graph, many ranks ({world} rank(s), gloo)", args)
    t_start = time.perf_counter()
    depots, epochs = (400, 30) if args.quick else (20000, 200)
    # every rank generates the same network here; a real loader would read only its slice
    net = freight.freight_network(depots, seed=args.seed)
    graph, labels = net.graph, net.tier
    x = torch.cat([net.features, torch.ones(graph.num_nodes, 1)], dim=1)
    say(rank, "network:", net.describe())

    # 1. the partition
    given = partition_nodes(graph, world, order="given")
    local = partition_nodes(graph, world, order="locality")
    rows = [(p.kind, p.edge_cut, f"{p.cut_fraction:.1%}", p.halo_sizes) for p in (given, local)]
    if rank == 0:
        C.print_table(f"Partitions into {world} block(s) of depots", ["order", "lanes cut", "share cut",
                                                                     "halo depots per rank"], rows)

    # 2. the collective load: this rank's slice of the lane list (as read from its part of a file)
    lo, hi = rank * graph.num_edges // world, (rank + 1) * graph.num_edges // world
    shard = GraphShard.from_local_edges(graph.source[lo:hi], graph.target[lo:hi], graph.weight[lo:hi],
                                        graph.num_nodes, local)
    nodes = shard.nodes
    counts = shard.exchange_counts()
    line = (f"rank {rank}: {shard.num_rows} depots owned, {shard.num_halo} halo depots, {shard.num_local_edges} "
            f"lanes held (of {graph.num_edges}), {counts['rows_per_exchange']} rows sent per product")
    for r in range(world):  # one line per rank, in rank order
        if r == rank:
            print(line, flush=True)
        if dist.is_initialized():
            dist.barrier()

    # 3. exactness against the whole graph in one process
    torch.manual_seed(args.seed)
    model = DepotClassifierWithLanes(x.shape[1], 32, 4)
    with torch.no_grad():
        sharded = model(x[nodes], shard)
        whole = model(x, graph)[nodes]
    err = largest(float((sharded - whole).abs().max()) if nodes.numel() else 0.0)
    say(rank, f"max |sharded - whole graph| over the owned depots, all ranks: {err:.1e} (float32 rounding)")

    # 4. training with DDP; each rank's loss: its own training depots, scaled by world / n_train
    split = data.split_nodes(labels, train=0.1, val=0.1, seed=args.seed)
    is_train = torch.zeros(graph.num_nodes, dtype=torch.bool)
    is_train[split.train] = True
    mine = is_train[nodes]
    y = labels[nodes]
    ddp = nn.parallel.DistributedDataParallel(model) if dist.is_initialized() else model
    opt = torch.optim.Adam(ddp.parameters(), lr=0.01, weight_decay=5e-4)
    scale = world / max(split.train.numel(), 1)
    t0 = time.perf_counter()
    for epoch in range(1, epochs + 1):
        opt.zero_grad()
        logits = ddp(x[nodes], shard)
        loss = F.cross_entropy(logits[mine], y[mine], reduction="sum") * scale
        loss.backward()
        opt.step()
        if epoch % max(epochs // 3, 1) == 0 or epoch == epochs:
            say(rank, f"    epoch {epoch:4d}/{epochs}  loss {total(float(loss.detach())) / world:.3f}  "
                      f"{time.perf_counter() - t0:5.1f} s")
    with torch.no_grad():
        pred = model(x[nodes], shard).argmax(dim=1)
    result = []
    for name, idx in (("train", split.train), ("val", split.val), ("test", split.test)):
        member = torch.zeros(graph.num_nodes, dtype=torch.bool)
        member[idx] = True
        m = member[nodes]
        correct = total(float((pred[m] == y[m]).sum()))
        result.append((name, f"{correct / max(idx.numel(), 1):.3f}", idx.numel()))
    if rank == 0:
        C.print_table(f"Tier classification, trained on {world} rank(s) ({epochs} epochs; chance 0.25)",
                      ["depots", "accuracy", "count"], result)
        print(f"\nmachine: {C.machine_line()}")
        print(f"total time {time.perf_counter() - t_start:.1f} s")
    if started_here:
        dist.destroy_process_group()


if __name__ == "__main__":
    main()
