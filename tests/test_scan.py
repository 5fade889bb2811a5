"""The charge scan (phasorgraph.scan): features, models, intervals, the permutation test, verdicts.

Graphs are small (150-180 nodes) and scans use few charges, so the whole file runs in seconds.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
import torch
from hypothesis import given
from hypothesis import strategies as st

import phasorgraph as pg
from phasorgraph import GraphInputError
from phasorgraph.data import directed_block_model, split_link_orientation, split_nodes
from phasorgraph.scan import charges as scan_mod
from phasorgraph.operators import node_pairs, normalized_magnetic_values, orientation_signs
from phasorgraph.scan import magnetic_chebyshev_terms, randomize_orientation, scan_charges
from strategies import charges, directed_graphs

import dense

FLOW = [[0.5, 0.85, 0.85], [0.15, 0.5, 0.85], [0.15, 0.15, 0.5]]  # block a ships to block b > a
NO_FLOW = [[0.5] * 3] * 3  # every edge points either way with probability 1/2


def _flow_graph(seed=1, sizes=(50, 50, 50), density=0.06, flow=FLOW, noise=0.0):
    return directed_block_model(list(sizes), density, flow, noise=noise, seed=seed)


# ---------------------------------------------------------------------- features
def _dense_chebyshev_terms(H: np.ndarray, x: np.ndarray, order: int) -> np.ndarray:
    """T_k(L - I) x from numpy.linalg.eigh and the closed form T_k(cos t) = cos(k t)."""
    d = H.__abs__().sum(1) if np.iscomplexobj(H) else H.sum(1)
    s = np.where(d > 0, 1.0 / np.sqrt(np.where(d > 0, d, 1.0)), 0.0)
    L = np.eye(len(d)) - s[:, None] * H * s[None, :]
    lam, V = np.linalg.eigh(L)
    theta = np.arccos(np.clip(lam - 1.0, -1.0, 1.0))
    return np.stack([(V * np.cos(k * theta)) @ (V.conj().T @ x) for k in range(order + 1)], axis=1)


def test_terms_at_charge_zero_are_the_real_chebyshev_terms_of_the_normalized_laplacian():
    # closed form: L = I - D^-1/2 As D^-1/2, As = (A + A^T) / 2; T_k(L - I) through numpy.linalg.eigh
    # and T_k(cos t) = cos(k t) (the Chebyshev polynomials' defining identity)
    g, _ = _flow_graph(seed=0, sizes=(6, 6), density=0.4, flow=[[0.5, 0.9], [0.1, 0.5]])
    g = pg.DirectedGraph(torch.cat([g.source, torch.tensor([11])]), torch.cat([g.target, torch.tensor([11])]),
                         None, 14)  # a self-loop and two isolated nodes
    A = g.to_scipy().toarray()
    As = (A + A.T) / 2
    x = np.random.default_rng(0).standard_normal((14, 3))
    got = magnetic_chebyshev_terms(g, x, 0.0, order=4, dtype=torch.complex128).numpy()
    want = _dense_chebyshev_terms(As, x, 4)
    assert np.abs(got.imag).max() == 0.0
    np.testing.assert_allclose(got.real, want.real, atol=1e-10)


def test_terms_at_a_charge_match_the_dense_hermitian_reference():
    # closed form H(q) = As * exp(i 2 pi q (A - A^T)) (Zhang et al., NeurIPS 2021), then numpy.linalg.eigh
    g, _ = _flow_graph(seed=2, sizes=(5, 5), density=0.5, flow=[[0.5, 0.8], [0.2, 0.5]])
    A = g.to_scipy().toarray()
    H = (A + A.T) / 2 * np.exp(1j * 2 * np.pi * 0.2 * (A - A.T))
    x = np.random.default_rng(1).standard_normal((10, 2))
    got = magnetic_chebyshev_terms(g, x, 0.2, order=3, dtype=torch.complex128).numpy()
    np.testing.assert_allclose(got, _dense_chebyshev_terms(H, x, 3), atol=1e-10)


def test_randomized_orientation_keeps_the_undirected_weighted_structure():
    rng = np.random.default_rng(0)
    src = torch.tensor([0, 1, 1, 2, 3, 4, 4])
    dst = torch.tensor([1, 0, 2, 3, 3, 0, 2])
    g = pg.DirectedGraph(src, dst, torch.tensor([1.0, 2.0, 0.5, 0.25, 3.0, 1.5, 0.75]), 6)
    A = g.to_scipy().toarray()
    flipped_any = False
    for _ in range(8):
        h = randomize_orientation(g, rng)
        B = h.to_scipy().toarray()
        np.testing.assert_array_equal(A + A.T, B + B.T)  # As kept exactly
        assert B[3, 3] == 3.0  # self-loop kept
        assert sorted(B[B > 0].tolist()) == sorted(A[A > 0].tolist())  # the same weights
        flipped_any |= not np.array_equal(A, B)
    assert flipped_any


@given(directed_graphs(max_nodes=10), st.integers(0, 2**31 - 1), charges())
def test_property_randomized_orientation_keeps_as_and_the_charge_zero_terms(graph, seed, q):
    # invariant: only orientations change, so A + A^T is unchanged, hence the q = 0 terms (which
    # depend on As alone) and, at every charge, the moduli |H(q)| = As of the magnetic adjacency
    h = randomize_orientation(graph, np.random.default_rng(seed))
    A, B = graph.to_scipy().toarray(), h.to_scipy().toarray()
    np.testing.assert_array_equal(A + A.T, B + B.T)
    x = np.random.default_rng(0).standard_normal((graph.num_nodes, 2))
    t0 = magnetic_chebyshev_terms(graph, x, 0.0, order=2, dtype=torch.complex128).numpy()
    u0 = magnetic_chebyshev_terms(h, x, 0.0, order=2, dtype=torch.complex128).numpy()
    np.testing.assert_allclose(t0, u0, atol=1e-12)
    ha = pg.magnetic_adjacency(graph, q, dtype=torch.complex128).to_dense().abs().numpy()
    hb = pg.magnetic_adjacency(h, q, dtype=torch.complex128).to_dense().abs().numpy()
    np.testing.assert_allclose(ha, hb, atol=1e-12)


# ---------------------------------------------------------------------- permuted copies without a new graph
def _same_flips(graph, seed):
    """The randomly oriented copy and, drawn from an equal generator, the scan's per-non-zero signs."""
    copy = randomize_orientation(graph, np.random.default_rng(seed))
    flips = scan_mod._pair_flips(np.random.default_rng(seed), node_pairs(graph)[1])
    return copy, orientation_signs(graph, flips, dtype=torch.float64)


@given(directed_graphs(max_nodes=10), st.integers(0, 2**31 - 1), charges(),
       st.sampled_from(["difference", "sign", "relative"]))
def test_property_flipped_values_are_the_operator_of_the_randomly_oriented_graph(graph, seed, q, phase):
    # reference: tests/dense.py builds I - D^-1/2 H(q) D^-1/2 (Zhang et al., NeurIPS 2021) from the
    # edges of randomize_orientation(graph); the scan keeps the graph's pattern and real parts and
    # multiplies the imaginary parts by orientation_signs (same generator, same flips)
    copy, signs = _same_flips(graph, seed)
    n = graph.num_nodes
    st_ = graph.structure
    re, im = normalized_magnetic_values(graph, q, phase=phase, dtype=torch.float64)
    got = np.eye(n, dtype=complex)
    np.add.at(got, (st_.rows.numpy(), st_.cols.numpy()), -(re + 1j * im * signs).numpy())
    want = dense.normalized_magnetic_laplacian(dense.dense_adjacency(copy), q, phase)
    np.testing.assert_allclose(got, want, atol=1e-12)


@given(directed_graphs(max_nodes=10), st.integers(0, 2**31 - 1))
def test_property_node_pairs_number_the_unordered_pairs_and_signs_follow_a_minus_a_transpose(graph, seed):
    # reference: the definition, in plain Python: pairs {min, max} of the non-zeros numbered in
    # sorted order; after reversal A - A^T of the copy equals sign * (A - A^T) on every non-zero
    st_ = graph.structure
    r, c = st_.rows.tolist(), st_.cols.tolist()
    keys = sorted({(min(u, v), max(u, v)) for u, v in zip(r, c)})
    pair, count = node_pairs(graph)
    assert count == len(keys)
    assert pair.tolist() == [keys.index((min(u, v), max(u, v))) for u, v in zip(r, c)]
    copy, signs = _same_flips(graph, seed)
    A, B = dense.dense_adjacency(graph), dense.dense_adjacency(copy)
    np.testing.assert_allclose((B - B.T)[r, c], signs.numpy() * (A - A.T)[r, c], atol=1e-12)


@pytest.mark.parametrize("phase", ["difference", "sign", "relative"])
def test_features_of_a_permuted_copy_equal_those_built_on_the_randomized_graph(phase):
    # reference: numpy.linalg.eigh of the dense magnetic Laplacian of randomize_orientation(graph)
    # (tests/dense.py) and T_k(cos t) = cos(k t), at a few nodes; the fast path computes only the
    # rows those nodes depend on (the last terms on restricted rows), with the copy's signs
    g, _ = _flow_graph(seed=7, sizes=(30, 30), density=0.03, flow=[[0.5, 0.9], [0.1, 0.5]])
    w = torch.linspace(0.2, 1.0, g.num_edges, dtype=torch.float64)
    g = pg.DirectedGraph(g.source, g.target, w, g.num_nodes)  # unequal weights: all three phases differ
    x = np.random.default_rng(2).standard_normal((g.num_nodes, 2))
    nodes = np.array([3, 17, 41])
    features = scan_mod._ChebyshevFeatures(g, torch.from_numpy(x), 3, phase, nodes=nodes, dtype=torch.complex128)
    assert features.ops[3][1] is not None  # the restricted path runs
    for seed in range(3):
        copy, signs = _same_flips(g, seed)
        got = features.terms(0.2, features.orientation(signs)).numpy()
        L = dense.normalized_magnetic_laplacian(dense.dense_adjacency(copy), 0.2, phase)
        lam, V = np.linalg.eigh(L)
        theta = np.arccos(np.clip(lam - 1.0, -1.0, 1.0))
        want = np.stack([(V * np.cos(k * theta)) @ (V.conj().T @ x) for k in range(4)], axis=1)[nodes]
        np.testing.assert_allclose(got, want, atol=1e-10)
        whole = magnetic_chebyshev_terms(copy, x, 0.2, order=3, phase=phase, dtype=torch.complex128).numpy()
        np.testing.assert_allclose(got, whole[nodes], atol=1e-12)
    # the unflipped graph, through the same object
    np.testing.assert_allclose(features.terms(0.2).numpy(), magnetic_chebyshev_terms(
        g, x, 0.2, order=3, phase=phase, dtype=torch.complex128).numpy()[nodes], atol=1e-12)


# ---------------------------------------------------------------------- models and intervals
def test_logistic_steps_reach_the_optimum_found_by_scipy():
    # the bound-Hessian steps against scipy.optimize.minimize (L-BFGS-B) on the same objective:
    # mean cross-entropy over the training rows + 1/2 sum_d lambda_d ||W_d||^2, intercept unpenalized
    from scipy.optimize import minimize

    rng = np.random.default_rng(0)
    n, D, C = 120, 5, 3
    Z = np.concatenate([np.ones((n, 1)), rng.standard_normal((n, D - 1))], axis=1)
    y = (Z[:, 1] + 0.5 * rng.standard_normal(n) > 0).astype(int) + (Z[:, 2] > 0.8)
    train = np.ones(n)
    train[:20] = 0
    lam = np.full(D, 0.01)
    lam[0] = 0

    def objective(w):
        W = w.reshape(D, C)
        logits = Z @ W
        logz = np.log(np.exp(logits - logits.max(1, keepdims=True)).sum(1)) + logits.max(1)
        ce = logz - logits[np.arange(n), y]
        return float((ce * train).sum() / train.sum() + 0.5 * (lam[:, None] * W ** 2).sum())

    ref = minimize(objective, np.zeros(D * C), method="L-BFGS-B", options={"maxiter": 5000, "ftol": 1e-14})
    Zt = torch.from_numpy(Z)[None]
    weight = torch.from_numpy(train / train.sum())[None]
    gram = (Zt[0].T * weight[0]) @ Zt[0]
    W = scan_mod._logistic_weights(Zt, torch.nn.functional.one_hot(torch.from_numpy(y), C).double(), weight,
                                   gram[None, None], torch.from_numpy(lam), iterations=400)
    assert objective(W[0, 0].numpy().ravel()) == pytest.approx(ref.fun, abs=1e-6)


def test_first_argmax_matches_torch_argmax_with_ties():
    # reference: torch.argmax, which documents that ties give the first maximal index
    logits = torch.randint(0, 3, (2, 4, 3, 50)).to(torch.float32)
    torch.testing.assert_close(scan_mod._first_argmax(logits), logits.argmax(1))


@pytest.mark.parametrize("task", ["classification", "regression"])
def test_all_zero_design_columns_change_no_score(task):
    # a column that is 0 in every row takes no part in any fit (its Gram row is 0); checked by
    # scoring the same design with and without such columns
    rng = np.random.default_rng(4)
    n = 90
    target = rng.integers(0, 3, n) if task == "classification" else rng.standard_normal(n)
    Z = np.concatenate([np.ones((2, n, 1)), rng.standard_normal((2, n, 4))], axis=2)
    Z[..., 1] += (target if task == "classification" else np.sign(target))[None]
    padded = np.concatenate([Z[..., :2], np.zeros((2, n, 3)), Z[..., 2:]], axis=2)
    test = scan_mod._folds(rng, n, 3, 2, target if task == "classification" else None, None)
    models = scan_mod._FoldModels(target, test, task, 0.01, 15)
    # (to rounding: BLAS results may depend on the arrays' memory alignment)
    np.testing.assert_allclose(models.scores(Z), models.scores(padded), rtol=1e-12, atol=1e-12)


def test_corrected_interval_is_the_nadeau_bengio_t_interval():
    # Nadeau and Bengio (Machine Learning 2003): variance (1/J + n_test/n_train) s^2, Student t with
    # J - 1 degrees of freedom; quantile from scipy.stats.t
    from scipy.stats import t

    d = np.array([0.1, 0.05, 0.12, 0.0, 0.08, 0.11, 0.02, 0.07, 0.09, 0.04])
    mean, (low, high) = scan_mod._corrected_interval(d, 0.2)
    half = t.ppf(0.975, 9) * np.sqrt((1 / 10 + 0.2 / 0.8) * d.var(ddof=1))
    assert mean == pytest.approx(d.mean())
    assert (low, high) == pytest.approx((d.mean() - half, d.mean() + half))


def test_auc_matches_the_pairwise_definition():
    # AUC = P(score of a positive > score of a negative) + 1/2 P(tie) (Hanley and McNeil, Radiology 1982)
    rng = np.random.default_rng(3)
    s = rng.integers(0, 5, size=40).astype(float)
    y = (rng.random(40) < 0.4).astype(int)
    pos, neg = s[y == 1], s[y == 0]
    pairwise = ((pos[:, None] > neg[None]).sum() + 0.5 * (pos[:, None] == neg[None]).sum()) / (pos.size * neg.size)
    assert scan_mod._auc(s, y) == pytest.approx(pairwise)


# ---------------------------------------------------------------------- the scan
def test_finds_direction_on_a_block_model_with_flow():
    g, y = _flow_graph(seed=1)
    result = scan_charges(g, torch.ones(g.num_nodes, 1), y, charges=[0, 0.1, 0.25], seed=0, progress=False)
    assert result.best_charge > 0
    assert result.interval[0] > 0 and result.p_value <= 0.05 and result.direction_helps
    assert result.suggested_charge == result.best_charge
    assert result.permutations == 19 and len(result.rows) == 3


def test_false_positives_without_a_preferred_direction():
    # flow 0.5 everywhere: every edge points either way with probability 1/2, so direction carries
    # nothing. The verdict must claim direction in at most 2 of 20 seeds (a test at level 0.05
    # claims it in 1 of 20 on average; 2 of 20 leaves room for chance, common practice, no source).
    claims = 0
    for seed in range(20):
        g, y = _flow_graph(seed=100 + seed, sizes=(40, 40, 40), density=0.08, flow=NO_FLOW)
        result = scan_charges(g, torch.ones(g.num_nodes, 1), y, charges=[0, 0.1, 0.25], repeats=1,
                              seed=seed, progress=False)
        claims += bool(result.direction_helps)
    assert claims <= 2


def test_charge_ranking_agrees_with_training_a_magnetic_filter():
    # q = 0 ignores direction; q = 0.5 turns every one-way edge into -As (a sign, no direction:
    # e^{i pi} = e^{-i pi}); q = 0.25 gives one-way edges the largest imaginary part. The scan
    # must rank 0.25 first and the other two below it, and so must trained MagneticFilters.
    g, y = _flow_graph(seed=3, noise=0.3, flow=[[0.5, 0.8, 0.8], [0.2, 0.5, 0.8], [0.2, 0.2, 0.5]])
    x = torch.ones(g.num_nodes, 1)
    result = scan_charges(g, x, y, charges=[0, 0.25, 0.5], permutations=0, seed=0, progress=False)
    scores = {r.charge: r.score for r in result.rows}
    assert result.best_charge == 0.25 and scores[0.25] > max(scores[0.0], scores[0.5]) + 0.1

    def trained_accuracy(q, seed):
        torch.manual_seed(seed)
        split = split_nodes(y, train=0.5, val=0.0, seed=seed)
        layer = pg.nn.MagneticFilter(1, 8, order=2, charge=q)
        head = torch.nn.Sequential(pg.nn.ComplexToReal("cartesian"), torch.nn.Linear(16, 3))
        opt = torch.optim.Adam(list(layer.parameters()) + list(head.parameters()), lr=0.05)
        for _ in range(60):
            opt.zero_grad()
            torch.nn.functional.cross_entropy(head(layer(x, g))[split.train], y[split.train]).backward()
            opt.step()
        with torch.no_grad():
            return float((head(layer(x, g)).argmax(1)[split.test] == y[split.test]).float().mean())

    trained = {q: np.mean([trained_accuracy(q, s) for s in range(2)]) for q in (0.0, 0.25, 0.5)}
    ranking_scan = sorted(scores, key=scores.get, reverse=True)
    ranking_trained = sorted(trained, key=trained.get, reverse=True)
    assert ranking_scan[0] == ranking_trained[0] == 0.25
    assert trained[0.25] > max(trained[0.0], trained[0.5]) + 0.1


def test_regression_variant_scores_r2():
    g, y = _flow_graph(seed=4)
    target = y.double() + 0.3 * torch.randn(g.num_nodes, generator=torch.Generator().manual_seed(0))
    target[:10] = float("nan")  # NaN marks unlabeled targets
    result = scan_charges(g, torch.ones(g.num_nodes, 1), target, charges=[0, 0.25], permutations=3, seed=0,
                          progress=False)
    assert result.task == "regression" and result.metric == "R^2"
    assert result.settings["labelled"] == g.num_nodes - 10
    assert result.best_charge == 0.25 and result.gain > 0.2


def test_link_variant_scores_auc_on_held_out_pairs():
    g, _ = _flow_graph(seed=5, sizes=(60, 60, 60))
    split = split_link_orientation(g, val_fraction=0.2, test_fraction=0.2, seed=0)
    result = scan_charges(split, torch.ones(g.num_nodes, 1), charges=[0, 0.25], permutations=3, seed=0,
                          progress=False)
    assert result.task == "link" and result.metric == "AUC"
    assert result.settings["labelled"] == len(split.val) + len(split.test)
    rows = {r.charge: r.score for r in result.rows}
    # at q = 0 only the ordered endpoint features can tell (u, v) from (v, u), and they see no direction
    assert rows[0.0] < 0.65 and rows[0.25] > rows[0.0] + 0.15


def test_result_prints_plots_and_serializes(tmp_path):
    g, y = _flow_graph(seed=1)
    result = scan_charges(g, torch.ones(g.num_nodes, 1), y, charges=[0, 0.25], permutations=2, seed=0,
                          progress=False)
    text = str(result)
    assert "charge q" in text and "accuracy" in text and result.verdict in text
    subset = scan_charges(g, torch.ones(g.num_nodes, 1), y, charges=[0, 0.25], permutations=0, max_labelled=60,
                          seed=0, progress=False)
    assert subset.settings["labelled"] == 60 and "60 of 150 labelled nodes" in str(subset)
    assert json.loads(json.dumps(result.to_dict()))["best_charge"] == 0.25
    path = result.plot(tmp_path / "scan.png")
    assert open(path, "rb").read(8) == b"\x89PNG\r\n\x1a\n"


def test_progress_lines_go_to_stderr(capsys):
    g, y = _flow_graph(seed=1, sizes=(20, 20, 20))
    scan_charges(g, torch.ones(g.num_nodes, 1), y, charges=[0, 0.25], permutations=1, seed=0, progress=True)
    assert "charge scan" in capsys.readouterr().err
    scan_charges(g, torch.ones(g.num_nodes, 1), y, charges=[0, 0.25], permutations=1, seed=0, progress=False)
    assert capsys.readouterr().err == ""


# ---------------------------------------------------------------------- bad input
@pytest.mark.parametrize("case, match", [
    ("x_rows", r"x must have one row per node: the graph has 30 nodes, x has 29 rows"),
    ("y_length", r"y must have one entry per node: the graph has 30 nodes, y has 31"),
    ("single_class", r"y has 1 class among its labelled nodes"),
    ("few_labelled", r"y has 4 labelled nodes, fewer than folds = 5"),
    ("nan_x", r"x holds 1 non-finite values \(first: nan at row 3, column 0\)"),
    ("charges", r"charges must lie in \[0, 0.5\]; got 0.7"),
    ("folds", r"folds must be an integer >= 2; got 1"),
    ("graph", r"graph must be a DirectedGraph or a LinkSplit; got list"),
])
def test_bad_input_names_the_argument(case, match):
    g, y = _flow_graph(seed=0, sizes=(10, 10, 10), density=0.3)
    x = torch.ones(30, 1)
    kwargs = dict(charges=[0, 0.25], permutations=0, progress=False)
    if case == "x_rows":
        args = (g, x[:29], y)
    elif case == "y_length":
        args = (g, x, torch.cat([y, y[:1]]))
    elif case == "single_class":
        args = (g, x, torch.where(y == 0, 0, -1))
    elif case == "few_labelled":
        yy = torch.full((30,), -1)
        yy[:2], yy[10:12] = 0, 1
        args = (g, x, yy)
    elif case == "nan_x":
        xx = x.clone()
        xx[3, 0] = float("nan")
        args = (g, xx, y)
    elif case == "charges":
        args, kwargs["charges"] = (g, x, y), [0.1, 0.7]
    elif case == "folds":
        args, kwargs["folds"] = (g, x, y), 1
    else:
        args = ([0, 1], x, y)
    with pytest.raises(GraphInputError, match=match):
        scan_charges(*args, **kwargs)


def test_a_phase_wrap_warning_is_given_once_not_per_permutation():
    # weights of 10 with phase="difference" wrap the phase at q = 0.25 (2 pi 0.25 10 > pi)
    g, y = _flow_graph(seed=1, sizes=(20, 20, 20))
    heavy = pg.DirectedGraph(g.source, g.target, torch.full((g.num_edges,), 10.0), g.num_nodes)
    with pytest.warns(pg.errors.PhaseWrapWarning) as caught:
        scan_charges(heavy, torch.ones(g.num_nodes, 1), y, charges=[0, 0.25], permutations=3, seed=0,
                     progress=False)
    assert len([w for w in caught if issubclass(w.category, pg.errors.PhaseWrapWarning)]) == 1

