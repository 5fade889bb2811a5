"""Benchmark of one graph across ranks (phasorgraph.distributed) on this machine, plus a MODEL.

Graph: a generated road-like network, the nodes of a side x side grid joined to their right and
lower neighbours (both directions, 20 % of the streets one-way), weights in (0, 1], node ids
shuffled by a seeded permutation (ids as a loader would hand them over: no locality).

Partitions (computed once, in the parent, on the whole graph):
* ``given``: contiguous blocks of the shuffled ids;
* ``locality``: contiguous blocks of the reverse Cuthill-McKee order (``partition_nodes``).

For each world size R in (1, 2, 4) the parent spawns R gloo ranks on loopback (file://
rendezvous, one torch thread per rank). Each rank generates only ITS slice of the edge list
(from the edge index, no whole list), builds its shard with ``GraphShard.from_local_edges``,
and measures, with barriers around every timed step:
* rows and bytes it sends per product (the plan's counters after one product) against the
  edge cut of the partition;
* peak resident memory (ru_maxrss) above its resident memory before the shard was built,
  against the same for R = 1 (one process holding the whole graph);
* time of a ChebyshevFilter layer (order 3, F -> F, float32, forward + backward: 6 products,
  6 exchanges) and of one bare exchange, medians over repeats; the step time is the slowest
  rank's.

R = 4 OVERSUBSCRIBES this 2-core machine (4 single-threaded processes on 2 cores): its times
measure time-sharing, not scaling. The memory and byte figures are exact at any R.

Finally a MODEL (not a measurement) extrapolates compute against communication per product for
a 1e8-edge graph on P machines, from the single-rank product rate measured here and a stated
network bandwidth; see the printed assumptions.

Usage: ``python bench/distributed.py [--quick] [--repeats 5]``; writes
bench/results/distributed.json (``--quick``: distributed_quick.json).
"""

from __future__ import annotations

import argparse
import datetime
import json
import os
import sys
import tempfile
import time

import numpy as np
import torch

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))
from _common import machine_info, print_table, write_results  # noqa: E402

import phasorgraph.operators as O  # noqa: E402
from phasorgraph import DirectedGraph  # noqa: E402
from phasorgraph.distributed import GraphShard, partition_nodes  # noqa: E402
from phasorgraph.nn import ChebyshevFilter  # noqa: E402

F = 32
WORLDS = (1, 2, 4)


# ---------------------------------------------------------------------- the generated graph
def _num_edges(side: int) -> int:
    return 4 * side * (side - 1)  # 2 side (side - 1) streets, 2 directed slots each


def grid_edges(side: int, lo: int, hi: int, seed: int = 0):
    """Edges with slot index in [lo, hi): slot 2p + d is street p in direction d (d = 1 is the
    reverse, left out for the one-way 20 % of streets). Vectorized from the indices alone, so a
    rank generates its own slice without the whole list."""
    k = torch.arange(lo, hi, dtype=torch.int64)
    p, d = k // 2, k % 2
    horizontal = side * (side - 1)
    h = p < horizontal
    u = torch.where(h, (p // (side - 1)) * side + p % (side - 1), p - horizontal)
    v = torch.where(h, u + 1, u + side)
    mix = (p * 2654435761 + seed) % 1000003
    keep = (d == 0) | (mix % 5 != 0)                       # 20 % of the streets are one-way
    w = ((mix % 997) + 1).to(torch.float64) / 997.0        # weights in (0, 1]
    s, t = torch.where(d == 0, u, v), torch.where(d == 0, v, u)
    perm = shuffled_ids(side, seed)
    return perm[s[keep]], perm[t[keep]], w[keep]


def shuffled_ids(side: int, seed: int = 0) -> torch.Tensor:
    return torch.randperm(side * side, generator=torch.Generator().manual_seed(seed + 1))


def rss_now() -> float:
    """Current resident set size in bytes (/proc/self/statm)."""
    with open("/proc/self/statm") as fh:
        return int(fh.read().split()[1]) * os.sysconf("SC_PAGE_SIZE")


class PeakRss:
    """Context manager sampling the resident set size every millisecond; ``peak`` in bytes.

    (ru_maxrss is a lifetime high-water mark, set by imports and setup; sampling measures the
    peak of the work inside the block. The workers run with a fixed glibc mmap threshold, so
    freed tensors leave the resident set and one block does not inherit the next one's pages.)
    """

    def __enter__(self):
        import threading

        self.peak = rss_now()
        self._stop = threading.Event()

        def sample():
            while not self._stop.is_set():
                self.peak = max(self.peak, rss_now())
                time.sleep(0.001)

        self._thread = threading.Thread(target=sample, daemon=True)
        self._thread.start()
        return self

    def __exit__(self, *exc):
        self._stop.set()
        self._thread.join()
        self.peak = max(self.peak, rss_now())


# ---------------------------------------------------------------------- one rank
def _median_synced(fn, repeats: int, world: int) -> float:
    import torch.distributed as dist

    times = []
    for i in range(repeats + 1):
        if world > 1:
            dist.barrier()
        t0 = time.perf_counter()
        fn()
        if world > 1:
            dist.barrier()
        if i:  # the first run is a warm-up
            times.append(time.perf_counter() - t0)
    return float(np.median(times))


def _worker(rank: int, world: int, init_file: str, cfg: dict, out_dir: str) -> None:
    import torch.distributed as dist

    torch.set_num_threads(1)
    if world > 1:
        dist.init_process_group("gloo", init_method=f"file://{init_file}", rank=rank, world_size=world,
                                timeout=datetime.timedelta(seconds=300))
    side, repeats = cfg["side"], cfg["repeats"]
    n, e = side * side, _num_edges(side)
    out = {}
    # warm-up on a tiny grid: kernels compiled or loaded, allocator arenas made, so that the first
    # measured partition does not carry these one-time costs
    tiny = partition_nodes(64, num_parts=world, order="given")
    ts, tt, tw = grid_edges(8, rank * _num_edges(8) // world, (rank + 1) * _num_edges(8) // world)
    warm = GraphShard.from_local_edges(ts, tt, tw, 64, tiny)
    ChebyshevFilter(F, F, order=3, max_eigenvalue=2.0)(
        torch.randn(warm.num_rows, F, requires_grad=True), warm.operator(O.normalized_laplacian)).sum().backward()
    del warm
    for name in cfg["partitions"]:
        owner = torch.load(os.path.join(out_dir, f"owner_{name}_{world}.pt"))
        part = partition_nodes(n, num_parts=world, owner=owner)
        lo, hi = rank * e // world, (rank + 1) * e // world
        src, dst, w = grid_edges(side, lo, hi)
        base_rss = rss_now()
        with PeakRss() as memory:
            shard = GraphShard.from_local_edges(src, dst, w, n, part)
            del src, dst, w
            op = shard.operator(O.normalized_laplacian, dtype=torch.float32)
            torch.manual_seed(0)
            layer = ChebyshevFilter(F, F, order=3, max_eigenvalue=2.0)
            x = torch.randn(shard.num_rows, F, requires_grad=True)

            def step():
                layer.zero_grad(set_to_none=True)
                x.grad = None
                layer(x, op).square().sum().backward()

            step()
        counts = shard.exchange_counts()
        rows_per_product = counts["rows_sent"] / max(counts["exchanges"], 1) if counts["exchanges"] else 0.0
        layer_s = _median_synced(step, repeats, world)
        xr = torch.randn(shard.num_rows, F)
        exchange_s = _median_synced(lambda: shard.halo(xr), repeats * 4, world)
        local_s = _median_synced(lambda: op._local.matmul(torch.cat([xr, torch.zeros(shard.num_halo, F)])),
                                 repeats * 4, 1)  # the local product alone, no exchange
        out[name] = {
            "rank": rank, "rows": shard.num_rows, "halo": shard.num_halo, "local_edges": shard.num_local_edges,
            "nnz": op.nnz, "rows_sent_per_product": rows_per_product,
            "bytes_sent_per_product": rows_per_product * F * 4,
            "peak_rss_above_start_mb": (memory.peak - base_rss) / 2 ** 20,
            "layer_fwd_bwd_s": layer_s, "exchange_s": exchange_s, "local_product_s": local_s,
        }
        if world == 1 and name == "locality":
            # the same layer on the whole graph's own operator, without a shard: the shard's overhead
            plain = O.normalized_laplacian(DirectedGraph(*grid_edges(side, 0, e), n), dtype=torch.float32)
            xp = torch.randn(n, F, requires_grad=True)

            def plain_step():
                layer.zero_grad(set_to_none=True)
                xp.grad = None
                layer(xp, plain).square().sum().backward()

            out[name]["plain_layer_fwd_bwd_s"] = _median_synced(plain_step, repeats, 1)
            del plain, xp
        del shard, op, layer, x, xr
    with open(os.path.join(out_dir, f"rank{rank}_of_{world}.json"), "w") as fh:
        json.dump(out, fh)
    if world > 1:
        dist.destroy_process_group()


def run_world(world: int, cfg: dict, out_dir: str, timeout_s: float = 900.0) -> list:
    import torch.multiprocessing as mp

    os.environ["MALLOC_MMAP_THRESHOLD_"] = str(1 << 16)  # children inherit it: see PeakRss
    init_file = os.path.join(out_dir, f"rendezvous_{world}")
    ctx = mp.start_processes(_worker, args=(world, init_file, cfg, out_dir), nprocs=world, join=False,
                             start_method="spawn")
    deadline = time.monotonic() + timeout_s
    try:
        while not ctx.join(timeout=1.0):
            if time.monotonic() > deadline:
                raise RuntimeError(f"{world} ranks did not finish within {timeout_s} s")
    finally:
        for p in ctx.processes:
            if p.is_alive():
                p.kill()
                p.join(5)
    ranks = []
    for r in range(world):
        with open(os.path.join(out_dir, f"rank{r}_of_{world}.json")) as fh:
            ranks.append(json.load(fh))
    return ranks


# ---------------------------------------------------------------------- the model
def communication_model(rate_nnz_f: float, road_halo_per_side: float) -> list:
    """MODEL rows for E = 1e8: compute = (nnz / P) F / rate; communication = halo rows F 4 bytes / bandwidth + latency.

    rate_nnz_f: non-zeros x features per second of one rank's local product, measured here.
    road_halo_per_side: the largest halo of a locality (RCM) block of the grid measured here, per
    grid side; RCM blocks of a grid are diagonal bands, whose boundary is a few sides long
    whatever P is, so a road-like graph of N nodes is given halo = this x sqrt(N).
    """
    E, N, feats = 1e8, 1e7, 64
    nnz = 2 * E + N  # symmetrized pattern plus diagonal, as the grid's operators here
    rows = []
    for bandwidth_gbit in (10.0, 100.0):
        bw = bandwidth_gbit * 1e9 / 8
        latency = 20e-6  # per message, a typical Ethernet/RDMA round figure (no source: stated assumption)
        for P in (4, 16, 64):
            compute = (nnz / P) * feats / rate_nnz_f
            # road-like (planar), locality blocks: the measured band boundary, scaled with sqrt(N)
            road_halo = road_halo_per_side * np.sqrt(N)
            # no locality (uniform random graph, average degree 20): nearly every neighbour is remote
            random_halo = min(N - N / P, (N / P) * 20 * (1 - 1 / P))
            for kind, halo in (("road-like, locality blocks", road_halo), ("random, any blocks", random_halo)):
                comm = halo * feats * 4 / bw + (P - 1) * latency
                rows.append({"network Gbit/s": bandwidth_gbit, "P": P, "graph": kind,
                             "halo rows / rank": halo, "compute s": compute, "exchange s": comm,
                             "exchange / compute": comm / compute})
    return rows


# ---------------------------------------------------------------------- main
def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="a 128 x 128 grid (seconds)")
    parser.add_argument("--repeats", type=int, default=5)
    args = parser.parse_args(argv)
    side = 128 if args.quick else 512
    cfg = {"side": side, "repeats": args.repeats, "partitions": ["given", "locality"]}
    n, e = side * side, _num_edges(side)
    t_start = time.perf_counter()
    print(f"grid {side} x {side}: N = {n} nodes, up to {e} directed edge slots, F = {F} float32, "
          f"ChebyshevFilter order 3; load average {os.getloadavg()[0]:.1f} at start", flush=True)
    src, dst, w = grid_edges(side, 0, e)
    graph = DirectedGraph(src, dst, w, n)
    del src, dst, w
    partition_rows = []
    with tempfile.TemporaryDirectory() as tmp:
        for world in WORLDS:
            for name in cfg["partitions"]:
                p = partition_nodes(graph, world, order=name)
                torch.save(p.owner, os.path.join(tmp, f"owner_{name}_{world}.pt"))
                partition_rows.append({"ranks": world, "partition": name, "edges": graph.num_edges,
                                       "edge cut": p.edge_cut, "cut share": p.cut_fraction,
                                       "halo rows (sum)": sum(p.halo_sizes), "max halo": max(p.halo_sizes)})
        del graph
        results = {}
        for world in WORLDS:
            print(f"-- {world} rank(s){' (OVERSUBSCRIBES the 2 cores)' if world > os.cpu_count() else ''}",
                  flush=True)
            results[world] = run_world(world, cfg, tmp)
    rows = []
    for world in WORLDS:
        for name in cfg["partitions"]:
            ranks = [r[name] for r in results[world]]
            pr = next(p for p in partition_rows if p["ranks"] == world and p["partition"] == name)
            sent = sum(r["rows_sent_per_product"] for r in ranks)
            one = results[1][0][name]
            rows.append({
                "ranks": world, "partition": name, "edge cut": pr["edge cut"],
                "rows sent / product (all ranks)": sent,
                "MB sent / product": sent * F * 4 / 1e6,
                "max rank peak MB": max(r["peak_rss_above_start_mb"] for r in ranks),
                "peak vs 1 process": max(r["peak_rss_above_start_mb"] for r in ranks) / max(one["peak_rss_above_start_mb"], 1e-9),
                "layer s (slowest rank)": max(r["layer_fwd_bwd_s"] for r in ranks),
                "layer vs 1 rank": max(r["layer_fwd_bwd_s"] for r in ranks) / one["layer_fwd_bwd_s"],
                "exchange ms": 1e3 * max(r["exchange_s"] for r in ranks),
                "local product ms": 1e3 * max(r["local_product_s"] for r in ranks),
            })
    print_table(partition_rows, title="Partitions of the grid (edge cut and halo rows, from partition_nodes)")
    print_table(rows, title="Per product and per layer, measured (4 ranks oversubscribe 2 cores: time-sharing)")
    one = results[1][0]["locality"]
    rate = one["nnz"] * F / one["local_product_s"]
    print(f"one process, whole graph: ChebyshevFilter fwd+bwd {one['plain_layer_fwd_bwd_s']:.3f} s on the plain "
          f"operator, {one['layer_fwd_bwd_s']:.3f} s on the one-rank shard (ratio "
          f"{one['layer_fwd_bwd_s'] / one['plain_layer_fwd_bwd_s']:.2f})")
    widest = max(WORLDS)
    road_c = max(r["locality"]["halo"] for r in results[widest]) / side
    model = communication_model(rate, road_c)
    print_table(model, title=(f"MODEL, not a measurement: E = 1e8, N = 1e7, F = 64 float32, per product; compute "
                              f"at the single-rank rate measured here ({rate:.3g} nnz x features / s, one core), "
                              f"20 us per message; road-like halo {road_c:.2f} sqrt(N) rows (the largest locality "
                              f"halo measured here at {widest} ranks, per grid side), random-graph halo "
                              f"min(N - N / P, 20 (1 - 1 / P) N / P) rows"))
    doc = {"config": {"side": side, "nodes": n, "features": F, "dtype": "float32", "layer": "ChebyshevFilter order 3",
                      "repeats": args.repeats, "worlds": list(WORLDS), "threads_per_rank": 1,
                      "note": "4 ranks oversubscribe the 2 cores of this machine"},
           "partitions": partition_rows, "rows": rows, "per_rank": {str(k): v for k, v in results.items()},
           "model": {"assumptions": {"edges": 1e8, "nodes": 1e7, "features": 64, "bytes_per_value": 4,
                                     "latency_s_per_message": 20e-6, "rate_nnz_features_per_s": rate,
                                     "road_halo_per_sqrt_n": road_c},
                     "rows": model},
           "seconds": time.perf_counter() - t_start, "load_average_end": os.getloadavg()[0]}
    write_results("distributed_quick" if args.quick else "distributed", doc, argv=sys.argv)


if __name__ == "__main__":
    main()
