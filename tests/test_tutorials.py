"""Smoke tests of the tutorials (each run with --quick in a fresh interpreter) and checks of their helpers.

The tutorials run as scripts (``__main__``) in one subprocess of the same (venv) python that
runs pytest, one after the other, so that the interpreter and torch start only once. A tutorial that leaves a model out because a layer is missing prints
"not available"; that fails the test rather than passing silently. The helpers are checked
against references outside the tutorials: the AUC rank formula against the pairwise
definition of the AUC, and the generator against its own specification.
"""

from __future__ import annotations

import os
import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import torch

ROOT = Path(__file__).resolve().parents[1]
TUTORIALS = ROOT / "tutorials"
sys.path.insert(0, str(TUTORIALS))

import _common  # noqa: E402
import freight  # noqa: E402

# tutorial file -> (arguments, text every successful quick run prints, plot written)
CASES = {
    "01_direction_matters.py": ([], ["Tier classification, test accuracy", "Chebyshev, symmetrized",
                                     "BandMix, symmetrized", "Magnetic, learned q", "Magnetic, bank of q",
                                     "Magnetic scattering", "Chebyshev, PageRank Laplacian",
                                     "Proximity, 1st + 2nd order"], "01_direction_matters.png"),
    "02_link_direction.py": (["--no-plot"], ["Held-out lanes, test metrics", "charge learned from 0.05",
                                             "charge 0 (no direction)"], None),
    "03_graph_classification.py": (["--no-plot"], ["Flow-network family, test accuracy",
                                                   "magnetic diffusion T(0.25)", "reversal check"], None),
    "04_oversmoothing.py": ([], ["Normalized Dirichlet energy", "RenormalizedFilter + ReLU", "BandMix + ReLU",
                                 "scattering layers + ReLU"], "04_oversmoothing.png"),
    "05_drop_in.py": (["--no-plot"], ["The whole change", "after: + MagneticFilter", "before: MLP on features"], None),
    "06_does_direction_help.py": ([], ["charge scan (classification", "scan verdict: ", "Magnetic, q = 0 (symmetric)",
                                       "gain norm at eigenvalue"], "06_filter_response.png"),
    # here as one process; tests/test_graph_shards.py runs it on two ranks
    "07_one_graph_many_ranks.py": ([], ["Partitions into 1 block(s)", "max |sharded - whole graph|",
                                        "Tier classification, trained on 1 rank(s)"], None),
    "08_bandpass_and_direction.py": ([], ["Transit depot or end point, test accuracy", "symmetric band-pass",
                                          "magnetic low-pass", "magnetic band-pass", "BandMix, magnetic band-pass"],
                                     "08_bandpass_and_direction.png"),
}


_DRIVER = r"""
import runpy, sys, traceback
sys.path.insert(0, sys.argv[1])
for script, args in eval(sys.argv[2]):
    print("@@@ start " + script, flush=True)
    sys.argv = [script, "--quick", "--seed", "1"] + args
    try:
        runpy.run_path(sys.path[0] + "/" + script, run_name="__main__")
        print("@@@ ok", flush=True)
    except BaseException:
        traceback.print_exc(file=sys.stdout)
        print("@@@ failed", flush=True)
"""


@pytest.fixture(scope="module")
def quick_runs(tmp_path_factory):
    """Run every tutorial with --quick, one after the other, in one fresh interpreter (the venv
    python that runs pytest), so the interpreter and torch start once; returns {script: (output, ok)}."""
    out_dir = tmp_path_factory.mktemp("tutorial_output")
    env = dict(os.environ, PHASORGRAPH_TUTORIAL_OUTPUT=str(out_dir), MPLBACKEND="Agg")
    cases = [(script, CASES[script][0]) for script in sorted(CASES)]
    proc = subprocess.run([sys.executable, "-c", _DRIVER, str(TUTORIALS), repr(cases)], cwd=ROOT, env=env,
                          capture_output=True, text=True, timeout=600)
    sections = {}
    for chunk in proc.stdout.split("@@@ start ")[1:]:
        script, _, body = chunk.partition("\n")
        sections[script] = (body, body.rstrip().endswith("@@@ ok"))
    return sections, out_dir, proc


@pytest.mark.parametrize("script", sorted(CASES))
def test_tutorial_quick_run(script, quick_runs):
    sections, out_dir, proc = quick_runs
    args, expected, plot = CASES[script]
    assert script in sections, f"{script} did not start:\n{proc.stdout[-3000:]}\n{proc.stderr[-3000:]}"
    out, ok = sections[script]
    assert ok, f"{script} failed:\n{out[-4000:]}"
    assert "not available" not in out, f"{script} left a model out:\n{out}"
    for text in expected:
        assert text in out, f"{script}: expected {text!r} in its output:\n{out[-3000:]}"
    assert re.search(r"\bnan\b|n/a", out) is None, f"{script} printed a missing number:\n{out[-3000:]}"
    if plot is not None:
        try:
            import matplotlib  # noqa: F401
        except ImportError:
            assert "matplotlib is not installed" in out
        else:
            assert (out_dir / plot).is_file(), f"{script} did not write {plot}"


def test_every_tutorial_has_a_smoke_test():
    scripts = {p.name for p in TUTORIALS.glob("[0-9][0-9]_*.py")} - {"00_operators.py"}
    assert scripts == set(CASES)


# ---------------------------------------------------------------------- AUC
def _pairwise_auc(scores, labels):
    # the definition: P(score of a positive > score of a negative) + P(tie) / 2 over all pairs
    # (Hanley and McNeil, Radiology 1982); brute force over every (positive, negative) pair
    s, y = np.asarray(scores, float), np.asarray(labels, bool)
    pos, neg = s[y][:, None], s[~y][None, :]
    return float(((pos > neg) + 0.5 * (pos == neg)).mean())


def test_auc_matches_the_pairwise_definition():
    rng = np.random.default_rng(0)
    for _ in range(20):
        n = int(rng.integers(2, 60))
        scores = rng.integers(0, 6, size=n).astype(float)  # many ties
        labels = rng.random(n) < 0.4
        labels[0], labels[1] = True, False
        assert _common.auc(scores, labels) == pytest.approx(_pairwise_auc(scores, labels), abs=1e-12)


def test_auc_hand_computed_cases():
    # perfect ranking 1, reversed 0, all tied 0.5; [0.1, 0.4, 0.35, 0.8] with labels [0, 0, 1, 1]
    # is the classic example with AUC 0.75 (3 of 4 positive-negative pairs ordered correctly)
    assert _common.auc([0.1, 0.2, 0.8, 0.9], [0, 0, 1, 1]) == 1.0
    assert _common.auc([0.9, 0.8, 0.2, 0.1], [0, 0, 1, 1]) == 0.0
    assert _common.auc([0.5] * 4, [0, 1, 0, 1]) == 0.5
    assert _common.auc([0.1, 0.4, 0.35, 0.8], [0, 0, 1, 1]) == 0.75
    assert np.isnan(_common.auc([0.1, 0.2], [1, 1]))


# ---------------------------------------------------------------------- the generator
def test_freight_network_is_seeded_and_follows_its_specification():
    a = freight.freight_network(600, seed=3)
    b = freight.freight_network(600, seed=3)
    c = freight.freight_network(600, seed=4)
    assert a.graph == b.graph and torch.equal(a.features, b.features)
    assert not a.graph == c.graph
    tier = a.tier.numpy()
    assert np.bincount(tier, minlength=4).tolist() == [90, 150, 210, 150]  # shares 0.15/0.25/0.35/0.25
    src_t, dst_t = tier[a.graph.source.numpy()], tier[a.graph.target.numpy()]
    w = a.graph.weight.numpy()
    down, up = dst_t > src_t, dst_t < src_t
    assert down.mean() > 0.55 and 0.05 < up.mean() < 0.4  # mostly down-tier, a share of returns
    assert w[down].mean() > 3 * w[up].mean()  # returns are small next to deliveries
    assert (w > 0).all() and a.features.shape == (600, 2)
    # about the same number of lanes (in + out) per depot in every tier
    lanes = np.bincount(a.graph.source.numpy(), minlength=600) + np.bincount(a.graph.target.numpy(), minlength=600)
    per_tier = np.array([lanes[tier == k].mean() for k in range(4)])
    assert per_tier.max() < 1.25 * per_tier.min()
    # terminals mostly send, outlets mostly receive
    out_lanes = np.bincount(a.graph.source.numpy(), minlength=600)
    assert out_lanes[tier == 0].mean() > 0.6 * lanes[tier == 0].mean()
    assert out_lanes[tier == 3].mean() < 0.4 * lanes[tier == 3].mean()
    assert torch.allclose(a.features.mean(0), torch.zeros(2), atol=1e-5)


def test_freight_features_are_only_weakly_informative():
    # the tier means of the features differ by much less than the spread within a tier
    net = freight.freight_network(4000, seed=0)
    f, t = net.features.numpy(), net.tier.numpy()
    means = np.stack([f[t == k].mean(0) for k in range(4)])
    within = np.mean([f[t == k].std(0) for k in range(4)], axis=0)
    gap = np.abs(np.diff(means, axis=0)).max(0)
    assert (gap < 0.5 * within).all()


def test_unit_volumes_and_flow_families():
    net = freight.freight_network(300, seed=0)
    unit = freight.unit_volumes(net.graph)
    assert float(unit.weight.max()) == pytest.approx(1.0) and float(unit.weight.min()) > 0
    assert torch.equal(unit.source, net.graph.source)
    graphs, labels = freight.flow_families(30, seed=0)
    assert len(graphs) == 30 and sorted(torch.bincount(labels).tolist()) == [10, 10, 10]
    sizes = [g.num_nodes for g in graphs]
    assert min(sizes) >= 12 and max(sizes) <= 30
    # a distribution tree has n - 1 lanes, all leaving an earlier depot (parent -> child)
    for g, y in zip(graphs, labels.tolist()):
        if y == 0:
            assert g.num_edges == g.num_nodes - 1 and bool((g.source < g.target).all())
