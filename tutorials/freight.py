"""The generated freight scenario used by every tutorial (invented, seeded; never real data).

A regional freight network: depots in four tiers, shipments (lanes) between them.

* tier 0 ``import terminal``, 1 ``distribution hub``, 2 ``regional warehouse``, 3 ``local outlet``;
* lanes flow mostly one tier down (u -> v with tier(v) = tier(u) + 1), some skip a tier, some
  are lateral transfers inside a tier, and a share of returns flows back up (as a small
  reverse lane next to a delivery lane, and as separate upward lanes);
* every tier has about the same number of lanes per depot (in and out together), so lane
  counts alone do not reveal the tier; only their direction does;
* the edge weight of a lane is its shipment volume (pallets per month, lognormal, so a few
  lanes carry most of the volume);
* node features carry no direction: a noisy log floor area and a noisy log staff count. Their
  tier means differ by much less than their spread, so on their own they are only weakly
  informative about the tier; the direction of the lanes has to do the work.

Everything is vectorized numpy: a network of 100 000 depots takes about a second.

:func:`freight_network` builds the network; :func:`unit_volumes` rescales the volumes to
(0, 1] for operators whose phase depends on the weight; :func:`flow_families` builds the small
networks of several families used for graph classification (tutorial 03).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import torch

import phasorgraph as pg

TIER_NAMES = ("import terminal", "distribution hub", "regional warehouse", "local outlet")
FEATURE_NAMES = ("log floor area (z)", "log staff (z)")


@dataclass(frozen=True)
class FreightNetwork:
    """A generated freight network.

    Attributes:
        graph: DirectedGraph, an edge u -> v is a lane shipping from depot u to depot v,
            its weight the monthly volume (pallets, > 0).
        tier: (N,) int64 tier of each depot (0 = import terminal ... 3 = local outlet).
        features: (N, 2) float32, standardized log floor area and log staff count.
        floor_area: (N,) float64 floor area in square metres (before the log).
        staff: (N,) int64 staff count.
    """

    graph: pg.DirectedGraph
    tier: torch.Tensor
    features: torch.Tensor
    floor_area: np.ndarray
    staff: np.ndarray

    @property
    def num_depots(self) -> int:
        return self.graph.num_nodes

    def describe(self) -> str:
        counts = np.bincount(self.tier.numpy(), minlength=4)
        src_t = self.tier[self.graph.source].numpy()
        dst_t = self.tier[self.graph.target].numpy()
        down = float(np.mean(dst_t > src_t))
        up = float(np.mean(dst_t < src_t))
        lateral = 1.0 - down - up
        tiers = ", ".join(f"{c} {n}s" for c, n in zip(counts, TIER_NAMES))
        return (f"{self.num_depots} depots ({tiers}); {self.graph.num_edges} lanes: "
                f"{down:.0%} down-tier, {lateral:.0%} lateral, {up:.0%} up-tier (returns)")


def freight_network(num_depots: int = 2000, *, tier_shares=(0.15, 0.25, 0.35, 0.25), lanes_per_depot: float = 3.0,
                    lateral_share: float = 0.12, skip_share: float = 0.06, upward_share: float = 0.06,
                    return_share: float = 0.30, feature_signal: float = 0.35, seed: int = 0) -> FreightNetwork:
    """Generate a seeded regional freight network (see the module docstring).

    Args:
        num_depots: number of depots N (default 2000).
        tier_shares: share of depots in each of the four tiers (normalized to sum 1).
        lanes_per_depot: average number of lanes leaving a depot before returns are added.
        lateral_share: share of lanes that are transfers inside a tier.
        skip_share: share of lanes that skip one tier on the way down (u -> tier + 2).
        upward_share: share of lanes that run one tier up (standalone return lanes).
        return_share: probability that a down-tier lane has a small reverse return lane.
        feature_signal: difference of tier means in the features, in units of their noise
            spread (default 0.35: weakly informative).
        seed: seed of the numpy generator.

    Returns:
        FreightNetwork.

    Example:
        >>> net = freight_network(200, seed=1)
        >>> net.graph.num_nodes, tuple(net.features.shape)
        (200, (200, 2))
    """
    rng = np.random.default_rng(seed)
    shares = np.asarray(tier_shares, dtype=np.float64)
    shares = shares / shares.sum()
    counts = np.maximum(1, np.floor(shares * num_depots).astype(np.int64))
    counts[-1] = num_depots - counts[:-1].sum()
    tier = np.repeat(np.arange(4), counts)
    rng.shuffle(tier)
    members = [np.flatnonzero(tier == t) for t in range(4)]

    # Lanes of each kind, as (source tier, target tier) pairs. Down-tier lanes between tiers
    # t and t + 1 are drawn in proportion to c = (n0, n1 - n0, n2 - n1 + n0), which gives every
    # tier about the same number of lanes per depot: lane counts alone do not reveal the tier.
    n = counts.astype(np.float64)
    chain = np.clip(np.array([n[0], n[1] - n[0], n[2] - n[1] + n[0]]), 0.05 * n.min(), None)
    pairs = np.array([[0, 1], [1, 2], [2, 3],          # deliveries, one tier down
                      [0, 0], [1, 1], [2, 2], [3, 3],  # lateral transfers
                      [0, 2], [1, 3],                  # deliveries skipping a tier
                      [1, 0], [2, 1], [3, 2]])         # standalone returns, one tier up
    kind_of_pair = np.array([0, 0, 0, 1, 1, 1, 1, 2, 2, 3, 3, 3])
    delivery = 1 - lateral_share - skip_share - upward_share
    prob = np.concatenate([delivery * chain / chain.sum(), lateral_share * n / n.sum(),
                           [skip_share / 2, skip_share / 2], upward_share * chain / chain.sum()])
    total = int(round(lanes_per_depot * num_depots))
    which = rng.choice(pairs.shape[0], size=total, p=prob / prob.sum())
    src_tier, dst_tier, kinds = pairs[which, 0], pairs[which, 1], kind_of_pair[which]

    def pick(tiers: np.ndarray) -> np.ndarray:
        # a uniformly random member of each requested tier, vectorized per tier
        out = np.empty(tiers.size, dtype=np.int64)
        for t in range(4):  # four tiers, not a loop over edges
            where = np.flatnonzero(tiers == t)
            out[where] = members[t][rng.integers(0, members[t].size, size=where.size)]
        return out

    src = pick(src_tier)
    dst = pick(dst_tier)
    keep = src != dst
    src, dst, kinds = src[keep], dst[keep], kinds[keep]
    # monthly volumes: deliveries large, transfers medium, standalone returns small
    scale = np.array([40.0, 15.0, 25.0, 6.0])[kinds]
    volume = scale * rng.lognormal(0.0, 0.8, size=src.size)
    # returns riding on delivery lanes: a small reverse lane
    back = (kinds == 0) & (rng.random(src.size) < return_share)
    rsrc, rdst = dst[back], src[back]
    rvol = volume[back] * rng.uniform(0.05, 0.25, size=rsrc.size)
    src = np.concatenate([src, rsrc])
    dst = np.concatenate([dst, rdst])
    volume = np.concatenate([volume, rvol])
    graph = pg.DirectedGraph.from_edges(src, dst, weight=volume, num_nodes=num_depots)

    # features without direction: tier means shifted by feature_signal noise units
    area_mean = np.log(4000.0) + 0.5 * feature_signal * (1.5 - tier)      # log m^2, larger up-tier
    log_area = area_mean + 0.5 * rng.standard_normal(num_depots)
    floor_area = np.exp(log_area)
    staff = rng.poisson(np.exp(np.log(12.0) + 0.6 * (log_area - np.log(4000.0))
                               + 0.35 * rng.standard_normal(num_depots))) + 1
    log_staff = np.log(staff)
    feats = np.stack([log_area, log_staff], axis=1)
    feats = (feats - feats.mean(0)) / feats.std(0).clip(min=1e-12)
    return FreightNetwork(graph=graph, tier=torch.as_tensor(tier, dtype=torch.int64),
                          features=torch.as_tensor(feats, dtype=torch.float32),
                          floor_area=floor_area, staff=staff.astype(np.int64))


def unit_volumes(graph: pg.DirectedGraph) -> pg.DirectedGraph:
    """The same lanes with volumes rescaled to (0, 1]: w / max(w).

    The magnetic phase ``"difference"`` is 2 pi q (A - A^T): with raw volumes (tens of
    pallets) it wraps around the circle many times, so two lanes of different volume can get
    the same phase. Dividing by the largest volume keeps every phase inside (-2 pi q, 2 pi q].
    """
    w = graph.weight
    top = float(w.max()) if w.numel() else 1.0
    return pg.DirectedGraph(graph.source, graph.target, w / top, graph.num_nodes)


# ---------------------------------------------------------------------- small flow networks
FAMILY_NAMES = ("distribution tree", "exchange ring", "hub with returns")


def _tree(rng, n):
    # a random recursive tree: node i (i >= 1) is supplied by an earlier node; edges parent -> child
    parent = np.floor(rng.random(n - 1) * np.arange(1, n)).astype(np.int64)
    return parent, np.arange(1, n)


def _ring(rng, n):
    # depots exchanging goods around a directed ring, plus a few directed chords
    src = np.arange(n)
    dst = (src + 1) % n
    k = max(1, n // 6)
    csrc = rng.integers(0, n, size=k)
    cdst = (csrc + rng.integers(2, max(3, n - 1), size=k)) % n
    return np.concatenate([src, csrc]), np.concatenate([dst, cdst])


def _hub(rng, n):
    # a few hubs serving outlets, most outlets sending returns back to their hub
    hubs = max(1, n // 8)
    outlets = np.arange(hubs, n)
    served_by = rng.integers(0, hubs, size=outlets.size)
    back = rng.random(outlets.size) < 0.7
    hub_links = np.arange(hubs - 1)
    src = np.concatenate([served_by, outlets[back], hub_links])
    dst = np.concatenate([outlets, served_by[back], hub_links + 1])
    return src, dst


def flow_families(num_graphs: int = 300, *, min_depots: int = 12, max_depots: int = 30, seed: int = 0):
    """Small generated flow networks of three families, in equal numbers, shuffled.

    Families: 0 ``distribution tree`` (one terminal feeding a random tree of depots), 1
    ``exchange ring`` (a directed ring of depots with a few chords), 2 ``hub with returns``
    (a few chained hubs serving outlets, most outlets returning goods to their hub). Volumes are
    lognormal; the graph sizes are uniform in [min_depots, max_depots] for every family, so
    size alone does not tell the family.

    Returns:
        (graphs, labels): a list of DirectedGraph and an int64 tensor of family ids.
    """
    rng = np.random.default_rng(seed)
    builders = (_tree, _ring, _hub)
    labels = np.arange(num_graphs) % len(builders)
    rng.shuffle(labels)
    graphs = []
    for label in labels:  # one small graph per iteration; each graph itself is vectorized
        n = int(rng.integers(min_depots, max_depots + 1))
        src, dst = builders[label](rng, n)
        vol = rng.lognormal(0.0, 0.5, size=src.size)
        graphs.append(pg.DirectedGraph.from_edges(src, dst, weight=vol / vol.max(), num_nodes=n))
    return graphs, torch.as_tensor(labels, dtype=torch.int64)


if __name__ == "__main__":
    import time

    t0 = time.perf_counter()
    net = freight_network(100_000, seed=0)
    print(net.describe())
    print(f"generated in {time.perf_counter() - t0:.2f} s")
