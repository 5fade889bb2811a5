r"""The charge scan: does edge direction help on this graph, and at which charge q?

For every charge q of a grid the scan builds fixed (untrained) magnetic spectral features,
fits one small regularized linear model per cross-validation fold, and compares the fold
scores with those of q = 0 (direction thrown away). A direction-permutation test then asks
whether the best charge beats what charges gain on copies of the graph whose edge
orientations are random (the undirected structure and the weights kept).

Everything here is linear algebra on (labelled rows) x (features) matrices: the features
cost ``order`` sparse products per charge, and each model is solved in closed form (ridge) or
by a few bound-Hessian Newton steps (multinomial logistic), batched over every fold and charge.
A permuted copy is the graph's own magnetic values with the imaginary parts' signs flipped per
node pair (no new graph); see the Notes of :func:`scan_charges`.
"""

from __future__ import annotations

import math
import numbers
import sys
import time
from dataclasses import dataclass
from typing import Any, Optional, Sequence

import numpy as np
import torch

from ..errors import GraphInputError
from ..graph import DirectedGraph
from ..operators import node_pairs, normalized_magnetic_values, orientation_signs
from ..sparse import PatternOperator

__all__ = ["scan_charges", "ChargeScan", "ChargeRow", "magnetic_chebyshev_terms", "randomize_orientation",
           "DEFAULT_CHARGES"]

#: Charge 0 and a grid up to 0.25, denser near 0; see :func:`scan_charges` for why it stops at 0.25.
DEFAULT_CHARGES = (0.0, 0.02, 0.05, 0.1, 0.15, 0.2, 0.25)
_PHASES = ("difference", "sign", "relative")
_ALPHA = 0.05
_METRICS = {"classification": "accuracy", "regression": "R^2", "link": "AUC"}


# ---------------------------------------------------------------------- features
def magnetic_chebyshev_terms(graph: DirectedGraph, x: Any, charge: float, order: int = 4, *,
                             phase: str = "difference", dtype: torch.dtype = torch.complex64) -> torch.Tensor:
    r"""The Chebyshev terms :math:`T_k(L(q) - I)\,X`, k = 0..order, of the normalized magnetic Laplacian.

    :math:`L(q) = I - D^{-1/2} H(q) D^{-1/2}` (:func:`phasorgraph.operators.magnetic_laplacian`)
    has spectrum in [0, 2], so :math:`\tilde L = L(q) - I` has spectrum in [-1, 1] and
    :math:`T_0 = X`, :math:`T_1 = \tilde L X`, :math:`T_k = 2 \tilde L T_{k-1} - T_{k-2}`
    (Hammond et al., ACHA 2011). At q = 0 they are the real Chebyshev terms of the normalized
    Laplacian of :math:`A_s`; for q > 0 their imaginary parts carry the direction of the edges.
    ``order`` sparse products, memory O(nnz + order N F).

    Args:
        graph: a DirectedGraph with non-negative weights.
        x: (N, F) real node features (tensor or array).
        charge: q in [0, 0.5].
        order: K >= 0 (default 4).
        phase: "difference" (default), "sign" or "relative" (as the operator accepts).
        dtype: complex64 (default) or complex128.

    Returns:
        (N, K + 1, F) complex tensor.

    Example:
        >>> from phasorgraph import DirectedGraph
        >>> g = DirectedGraph.from_edges([[0, 1, 2], [1, 2, 0]])
        >>> magnetic_chebyshev_terms(g, torch.ones(3, 2), 0.25, order=2).shape
        torch.Size([3, 3, 2])
    """
    if not isinstance(graph, DirectedGraph):
        raise GraphInputError(f"graph must be a DirectedGraph; got {type(graph).__name__}")
    order = _count("order", order, 0)
    real = {torch.complex64: torch.float32, torch.complex128: torch.float64}.get(dtype)
    if real is None:
        raise GraphInputError(f"dtype must be torch.complex64 or torch.complex128; got {dtype}")
    xt = _features(x, graph.num_nodes).to(real)
    return _ChebyshevFeatures(graph, xt, order, phase, dtype=dtype).terms(charge)


#: a Chebyshev term is computed on the rows it is needed at only when these hold at most this
#: share of the non-zeros (a restricted term keeps its own values per charge; near all rows the
#: saving is not worth that memory)
_RESTRICT = 0.8


class _ChebyshevFeatures:
    r"""The terms :math:`T_k(L(q) - I)\,X` of one graph at chosen nodes, for any charge and orientation.

    :math:`L(q) - I = -D^{-1/2} H(q) D^{-1/2}` is a :class:`~phasorgraph.sparse.PatternOperator`
    on the graph's structure, its values (:func:`~phasorgraph.operators.normalized_magnetic_values`)
    computed once per charge. A copy of the graph with reversed node pairs has the same pattern,
    degrees and real parts, and its imaginary parts times the signs of
    :func:`~phasorgraph.operators.orientation_signs` (:meth:`orientation`): a permuted copy
    costs its products and one multiplication per non-zero, no graph, no validation, no sort,
    no trigonometry.

    Only the rows the requested nodes depend on are computed: :math:`T_K` at the nodes,
    :math:`T_{k-1}` also at their neighbours, and so on, while a term's rows hold at most
    ``_RESTRICT`` of the non-zeros (below that the term is computed whole). The other rows of a
    restricted term hold values that are never read.
    """

    def __init__(self, graph: DirectedGraph, x: torch.Tensor, order: int, phase: str, nodes=None,
                 dtype: torch.dtype = torch.complex64):
        self.graph, self.order, self.phase, self.dtype = graph, order, phase, dtype
        self.real = torch.float32 if dtype == torch.complex64 else torch.float64
        st = graph.structure
        self.x = x.to(self.real).contiguous()
        self.nodes = None if nodes is None else torch.as_tensor(nodes, dtype=torch.int64)
        nnz = st.cols.numel()
        blank = torch.zeros(nnz, dtype=self.real)
        full = PatternOperator(st.crow, st.cols, blank, blank, hermitian=True, scale=-1.0)  # validated once
        # per k: (operator whose values get replaced, non-zeros it holds or None for all of them)
        self.ops = [(full, None)] * (order + 1)
        if self.nodes is not None and nnz:
            n = graph.num_nodes
            need = torch.zeros(n, dtype=torch.bool)
            need[self.nodes] = True
            for k in range(order, 0, -1):
                nz = torch.nonzero(need[st.rows]).squeeze(1)
                if nz.numel() > _RESTRICT * nnz:
                    break  # lower terms need at least these rows
                crow = torch.zeros(n + 1, dtype=torch.int64)
                torch.cumsum(torch.bincount(st.rows[nz], minlength=n), 0, out=crow[1:])
                cols = st.cols[nz]
                part = torch.zeros(nz.numel(), dtype=self.real)
                # rows outside the needed ones are empty: not Hermitian (only the backward, never run, reads this)
                self.ops[k] = (PatternOperator(crow, cols, part, part, hermitian=False, scale=-1.0), nz)
                need = need.clone()
                need[cols] = True  # T_(k-1) is read at the neighbours
        self._values = {}
        self._xc = None

    def _complex_x(self) -> torch.Tensor:
        if self._xc is None:
            self._xc = self.x.to(self.dtype)
        return self._xc

    def values(self, q) -> list:
        """Per k, (re, im) of :math:`D^{-1/2} H(q) D^{-1/2}` on that term's non-zeros (im None at q = 0)."""
        hit = self._values.get(q) if isinstance(q, float) else None
        if hit is None:
            re, im = normalized_magnetic_values(self.graph, q, phase=self.phase, dtype=self.real)  # checks q
            im = None if float(q) == 0 else im  # q = 0: real values, real products
            parts = {}
            hit = []
            for _, nz in self.ops:
                key = None if nz is None else id(nz)
                if key not in parts:
                    parts[key] = (re, im) if nz is None else (re[nz], None if im is None else im[nz])
                hit.append(parts[key])
            self._values[float(q)] = hit
        return hit

    def orientation(self, signs: torch.Tensor) -> list:
        """Per k, the signs of :func:`~phasorgraph.operators.orientation_signs` on that term's non-zeros."""
        return [signs if nz is None else signs[nz] for _, nz in self.ops]

    def terms(self, q: float, orientation: Optional[list] = None) -> torch.Tensor:
        """(nodes, K + 1, F) complex terms at charge q, of the graph reoriented by ``orientation`` if given."""
        values = self.values(q)
        x, nodes = self.x, self.nodes
        rows = x.shape[0] if nodes is None else nodes.numel()
        out = torch.empty((rows, self.order + 1, x.shape[1]), dtype=self.dtype)
        out[:, 0] = x if nodes is None else x[nodes]
        if self.order == 0 or x.shape[0] == 0:
            return out
        built = {}  # the whole-pattern operator serves every unrestricted term: built once

        def operator(k: int) -> PatternOperator:
            base, nz = self.ops[k]
            key = -1 if nz is None else k
            if key not in built:
                re, im = values[k]
                if im is not None and orientation is not None:
                    # in numpy, one thread: a torch op this size would wake torch's thread pool,
                    # whose threads keep spinning into the next native product (with two threads
                    # that slowed each call of terms by about a third, measured on 1e6 edges)
                    im = torch.from_numpy(im.numpy() * orientation[k].numpy())
                built[key] = base.with_values(re, im)
            return built[key]

        cur = operator(1).matmul(x)  # T1 = (L - I) X, real X never cast to complex
        prev = x if not cur.is_complex() else self._complex_x()  # (as the z of a complex product)
        out[:, 1] = cur if nodes is None else cur[nodes]
        for k in range(2, self.order + 1):
            # T_k = 2 (L - I) T_(k-1) - T_(k-2), one fused pass
            prev, cur = cur, operator(k).matmul_add(cur, prev, alpha=2.0, beta=-1.0)
            out[:, k] = cur if nodes is None else cur[nodes]
        return out


def _scaled_columns(z: np.ndarray) -> np.ndarray:
    """Centered real and imaginary parts of complex columns, each column pair scaled by one factor.

    A complex column is divided by the root mean square of its centered modulus, so its real
    and imaginary parts keep their relative size: at a small charge the imaginary parts stay
    small, as a trained filter sees them, instead of being blown up to unit variance (per-part
    standardization would make q = 0.001 and q = 0.25 look alike to a linear model). Columns
    of (numerically) zero spread become 0.
    """
    z = z - z.mean(axis=0)
    scale = np.sqrt(np.mean(z.real ** 2 + z.imag ** 2, axis=0))
    z *= np.divide(1.0, scale, out=np.zeros_like(scale), where=scale > 1e-12)
    return np.concatenate([z.real, z.imag], axis=1)


def _standardized_columns(z: np.ndarray) -> np.ndarray:
    """Real columns to mean 0 and standard deviation 1 (constant columns to 0)."""
    z = z - z.mean(axis=0)
    std = np.sqrt(np.mean(z * z, axis=0))
    z *= np.divide(1.0, std, out=np.zeros_like(std), where=std > 1e-12)
    return z


def _with_intercept(z: np.ndarray) -> np.ndarray:
    return np.concatenate([np.ones((z.shape[0], 1)), z], axis=1)


def _node_design(terms: torch.Tensor, rows: np.ndarray) -> np.ndarray:
    t = terms[torch.as_tensor(rows)].reshape(rows.size, -1).to(torch.complex128).numpy()
    return _with_intercept(np.concatenate([_scaled_columns(t), _standardized_columns(np.abs(t))], axis=1))


def _pair_design(terms: torch.Tensor, pairs: np.ndarray) -> np.ndarray:
    t = terms.reshape(terms.shape[0], -1)
    zu = t[torch.as_tensor(pairs[0])].to(torch.complex128).numpy()
    zv = t[torch.as_tensor(pairs[1])].to(torch.complex128).numpy()
    rms = np.sqrt(np.mean(np.abs(np.concatenate([zu, zv], axis=0)) ** 2, axis=0))
    rms[rms < 1e-12] = 1.0
    zu, zv = zu / rms, zv / rms
    cross = zu * np.conj(zv)  # real part symmetric in (u, v), imaginary part antisymmetric
    return _with_intercept(np.concatenate([_scaled_columns(zu), _scaled_columns(zv), _scaled_columns(cross)],
                                          axis=1))


# ---------------------------------------------------------------------- models
def _logistic_weights(Z: torch.Tensor, Y: torch.Tensor, weight: torch.Tensor, gram: torch.Tensor,
                      lam: torch.Tensor, iterations: int) -> torch.Tensor:
    r"""Multinomial logistic weights (Q, J, D, C) minimizing, per charge q and fold j,
    :math:`\sum_n w_{jn}\,\mathrm{CE}(\mathrm{softmax}(Z_{qn} W), Y_n) + \tfrac12 \sum_d \lambda_d \|W_d\|^2`.

    Boehning's bound on the multinomial logistic Hessian, :math:`\tfrac12 (I - 11^T / C) \otimes
    Z^T \mathrm{diag}(w) Z` (Boehning, Ann. Inst. Stat. Math. 1992), is
    :math:`\tfrac12 G + \mathrm{diag}(\lambda)` on every class column of zero sum, one fixed
    matrix per fit; each step multiplies the gradient by its inverse. The steps decrease the
    objective monotonically (a majorize-minimize scheme); they stop once no weight moves by 1e-6.
    ``weight`` (J, n) holds 1 / n_train on the training rows of fold j, 0 elsewhere; ``gram``
    (Q, J, D, D) is :math:`Z_q^T \mathrm{diag}(w_j) Z_q` (float64: the bound is inverted there,
    by Cholesky). The steps run in the precision of ``Z``; the weights of all folds sit side by
    side, (D, J C) per charge, so each step is two batched products over the rows.
    """
    Q, n, D = Z.shape
    J = weight.shape[0]
    classes = Y.shape[1]
    free = classes - 1
    bound = 0.5 * gram.to(torch.float64) + torch.diag(lam.to(torch.float64))
    factor, info = torch.linalg.cholesky_ex(bound)
    bound_inv = torch.cholesky_inverse(factor) if not bool(info.any()) else torch.linalg.inv(bound)
    bound_inv = bound_inv.to(Z.dtype)  # (Q, J, D, D)
    # The weights of every fold side by side, transposed and class-major: (Q, (C - 1) J, D), so
    # the logits come out as (Q, C, J, n) and softmax and the elementwise steps run along the
    # rows. Each fit's (D, C) weights have rows summing to 0 (the steps start at 0 and every
    # gradient row sums to 0, since softmax and one-hot rows both sum to 1), so the last class is
    # minus the sum of the others and both products run on C - 1 classes.
    W = torch.zeros(Q, free * J, D, dtype=Z.dtype)
    Zt = Z.transpose(1, 2)
    Yt = Y.T.to(Z.dtype)[:, None, :]  # (C, 1, n)
    w = weight.to(Z.dtype)  # (J, n)
    lam_d = lam.to(Z.dtype)
    inv_flat = bound_inv.reshape(Q * J, D, D)
    for _ in range(iterations):
        R = torch.softmax(_class_logits(W, Zt, free, J), dim=1)
        R -= Yt
        R *= w  # (Q, C, J, n)
        grad = torch.bmm(R[:, :free].reshape(Q, free * J, n), Z) + lam_d * W  # (a view of R: no copy)
        # the step of fold j is its gradient times the inverse bound (symmetric) of fold j
        step = torch.bmm(grad.view(Q, free, J, D).transpose(1, 2).reshape(Q * J, free, D), inv_flat)
        step = step.view(Q, J, free, D).transpose(1, 2).reshape(Q, free * J, D)
        W -= step
        if max(float(step.abs().max()), float(step.view(Q, free, J, D).sum(1).abs().max())) < 1e-6:
            break
    W = W.view(Q, free, J, D)
    return torch.cat([W, -W.sum(1, keepdim=True)], dim=1).permute(0, 2, 3, 1)  # (Q, J, D, C)


def _first_argmax(logits: torch.Tensor) -> torch.Tensor:
    """``logits.argmax(1)`` (the first class of highest logit) for a few classes, one pass per class."""
    best = logits[:, 0].clone()
    index = torch.zeros(best.shape, dtype=torch.int64)
    for c in range(1, logits.shape[1]):
        better = logits[:, c] > best
        best = torch.where(better, logits[:, c], best)
        index.masked_fill_(better, c)
    return index


def _class_logits(W: torch.Tensor, Zt: torch.Tensor, free: int, J: int) -> torch.Tensor:
    """(Q, C, J, n) logits from transposed class-major weights (Q, free J, D) of C - 1 = free classes
    (the last class: minus their sum) and the transposed design (Q, D, n)."""
    part = torch.bmm(W, Zt).view(Zt.shape[0], free, J, Zt.shape[2])
    return torch.cat([part, -part.sum(1, keepdim=True)], dim=1)


class _FoldModels:
    """One regularized linear model per charge and fold, scored on the fold's held-out rows.

    Everything that does not depend on the features (the folds, their row weights and held-out
    rows, one-hot targets, penalties) is prepared once and reused for the observed graph and
    every permuted copy, so observed and null scores come from the same fits. Ridge models are
    solved in float64; the logistic fits run in float32 (the design is standardized; the bound
    is inverted in float64), at half the cost of float64.
    """

    def __init__(self, target: np.ndarray, test: np.ndarray, task: str, penalty: float, iterations: int):
        self.task, self.target, self.test_np = task, target, test
        self.penalty, self.iterations = float(penalty), iterations
        self.test = torch.from_numpy(test)  # (J, n) bool
        train = (~self.test).to(torch.float64)
        self.n_train = train.sum(1)  # (J,)
        self.train = train
        self.weight = train / self.n_train[:, None]
        self.held = [torch.nonzero(self.test[j]).squeeze(1) for j in range(test.shape[0])]
        times = test.sum(0)  # how often each row is held out
        self.repeats = int(times[0]) if times.size and np.all(times == times[0]) and times[0] > 0 else 0
        if task == "regression":
            self.y = torch.from_numpy(target).to(torch.float64)
        else:
            self.target_t = torch.from_numpy(target)
            self.Y = torch.nn.functional.one_hot(self.target_t, int(target.max()) + 1).to(torch.float64)

    def _grams(self, Zt: torch.Tensor) -> torch.Tensor:
        """(Q, J, D, D) Gram matrices of each fold's training rows, weighted 1 / n_train.

        Folds, not rows: each fold's training Gram is the total minus its held-out Gram, and when
        every row is held out equally often (r times: the folds of each repeat partition the
        rows) the total is the sum of the held-out Grams divided by r, so the rows are read once.
        """
        Q, n, D = Zt.shape
        held = torch.empty(Q, len(self.held), D, D, dtype=Zt.dtype)
        for j, rows in enumerate(self.held):
            Zj = Zt.index_select(1, rows)
            held[:, j] = torch.bmm(Zj.transpose(1, 2), Zj)
        if self.repeats:
            total = held.sum(1) / self.repeats
        else:
            total = torch.bmm(Zt.transpose(1, 2), Zt)
        return (total[:, None] - held) / self.n_train[None, :, None, None]

    def scores(self, Z: np.ndarray) -> np.ndarray:
        """Scores (Q, J) of the model of charge q (design Z[q], (n, D)) on the held-out rows of fold j."""
        used = np.flatnonzero(np.any(Z != 0, axis=(0, 1)))
        if used.size < Z.shape[2]:
            # columns that are 0 for every charge (the imaginary parts of T_0 = X, constant features)
            # keep 0 weights in every fit and change no other weight (their Gram rows are 0 and
            # the penalty alone bounds them): leaving them out changes no score
            Z = Z[:, :, used]
        Zt = torch.from_numpy(Z)  # (Q, n, D) float64, column 0 the intercept
        Q, n, D = Zt.shape
        J = len(self.held)
        lam = torch.full((D,), self.penalty, dtype=torch.float64)
        lam[0] = 0.0  # the intercept is not penalized
        if self.task == "regression":
            gram = self._grams(Zt)
            y = self.y
            rhs = torch.einsum("qnd,jn->qjd", Zt, self.train * y / self.n_train[:, None])
            w = torch.linalg.solve(gram + torch.diag(lam), rhs.unsqueeze(-1)).squeeze(-1)  # (Q, J, D)
            pred = torch.einsum("qnd,qjd->qjn", Zt, w)
            scores = torch.empty(Q, J, dtype=torch.float64)
            for j, rows in enumerate(self.held):
                yt = y[rows]
                sst = ((yt - yt.mean()) ** 2).sum()
                sse = ((pred[:, j, rows] - yt) ** 2).sum(-1)
                scores[:, j] = 1.0 - sse / sst.clamp_min(1e-300)
            return scores.numpy()
        Z32 = Zt.to(torch.float32)
        gram = self._grams(Z32).to(torch.float64)  # standardized columns: float32 sums are ample for the bound
        classes = self.Y.shape[1]
        W = _logistic_weights(Z32, self.Y, self.weight, gram, lam, self.iterations)  # (Q, J, D, C)
        logits = torch.bmm(W.permute(0, 3, 1, 2).reshape(Q, classes * J, D), Z32.transpose(1, 2))
        logits = logits.view(Q, classes, J, n)
        if self.task == "classification":
            correct = (_first_argmax(logits) == self.target_t).to(torch.float64)  # (Q, J, n)
            hits = (correct * self.test).sum(-1)
            return (hits / self.test.sum(1).to(torch.float64)).numpy()
        margin = (logits[:, 1] - logits[:, 0]).to(torch.float64).numpy()  # (Q, J, n)
        scores = np.empty((Q, J))
        for j in range(J):
            rows = self.test_np[j]
            for q in range(Q):
                scores[q, j] = _auc(margin[q, j, rows], self.target[rows])
        return scores


def _auc(scores: np.ndarray, labels: np.ndarray) -> float:
    """AUC by the rank formula (Mann-Whitney U; Hanley and McNeil, Radiology 1982), ties given average ranks."""
    pos = labels == 1
    n_pos, n_neg = int(pos.sum()), int((~pos).sum())
    if n_pos == 0 or n_neg == 0:
        return float("nan")
    order = np.argsort(scores, kind="mergesort")
    s = scores[order]
    edges = np.flatnonzero(np.diff(s)) + 1
    starts = np.concatenate([[0], edges])
    ends = np.concatenate([edges, [s.size]])
    ranks = np.empty(s.size)
    ranks[order] = np.repeat((starts + ends + 1) / 2.0, ends - starts)  # mean of ranks start+1 .. end
    return float((ranks[pos].sum() - n_pos * (n_pos + 1) / 2) / (n_pos * n_neg))


# ---------------------------------------------------------------------- intervals
def _corrected_interval(values: np.ndarray, test_fraction: float, level: float = 0.95) -> tuple:
    """Mean and a t interval of repeated cross-validation scores with the Nadeau-Bengio variance.

    Fold scores of repeated k-fold cross-validation are correlated (their training sets
    overlap), so the plain variance of their mean, s^2 / J, is too small. Nadeau and Bengio
    (Machine Learning 2003) correct it to (1 / J + n_test / n_train) s^2; with Student's t on
    J - 1 degrees of freedom this is the "corrected repeated k-fold cv test" that Bouckaert
    and Frank (PAKDD 2004) found to hold its nominal level.
    """
    from scipy.special import stdtrit  # Student's t quantile (scipy.stats costs seconds to import)

    values = np.asarray(values, dtype=np.float64)
    values = values[np.isfinite(values)]
    J = values.size
    mean = float(values.mean()) if J else float("nan")
    if J < 2:
        return mean, (float("nan"), float("nan"))
    var = float(values.var(ddof=1))
    half = float(stdtrit(J - 1, 0.5 + level / 2)) * math.sqrt((1.0 / J + test_fraction / (1 - test_fraction)) * var)
    return mean, (mean - half, mean + half)


# ---------------------------------------------------------------------- result
@dataclass(frozen=True)
class ChargeRow:
    """One charge of a scan: mean fold score with its 95 % interval, and the paired gain over q = 0."""

    charge: float
    score: float
    low: float
    high: float
    gain: float
    gain_low: float
    gain_high: float


class ChargeScan:
    """The result of :func:`scan_charges`.

    Attributes:
        task: "classification", "regression" or "link".
        metric: "accuracy", "R^2" or "AUC" (higher is better).
        rows: tuple of :class:`ChargeRow`, one per charge, in increasing charge.
        best_charge: the charge q > 0 of highest mean score.
        gain: mean paired fold gain of ``best_charge`` over q = 0 (in the metric's units).
        interval: (low, high) 95 % interval of that gain (Nadeau-Bengio corrected t interval).
        p_value: direction-permutation p-value of the gain, or None when no permutation ran.
        permutations: the number of permuted graphs scanned.
        direction_helps: True when the interval excludes 0 and ``p_value <= 0.05``; None when
            no permutation ran.
        suggested_charge: a starting charge for a learned ``MagneticFilter``.
        fold_scores: (Q, J) array, score of charge ``rows[i].charge`` on fold j.
        null_gains: the gains measured on the permuted graphs.
    """

    def __init__(self, *, task, metric, charges, fold_scores, test_fraction, null_gains, permutations_asked,
                 settings):
        self.task = task
        self.metric = metric
        self.fold_scores = np.asarray(fold_scores)
        self.settings = dict(settings)
        self.null_gains = tuple(float(g) for g in null_gains)
        self.permutations = len(self.null_gains)
        charges = [float(q) for q in charges]
        zero = charges.index(0.0)
        base = self.fold_scores[zero]
        rows = []
        for q, scores in zip(charges, self.fold_scores):
            mean, (low, high) = _corrected_interval(scores, test_fraction)
            gain, (glow, ghigh) = _corrected_interval(scores - base, test_fraction)
            rows.append(ChargeRow(q, mean, low, high, gain, glow, ghigh))
        self.rows = tuple(rows)
        positive = [r for r in rows if r.charge > 0]
        best = max(positive, key=lambda r: (r.score, -r.charge))
        self.best_charge = best.charge
        self.gain = best.gain
        self.interval = (best.gain_low, best.gain_high)
        if self.permutations == 0:
            self.p_value = None
            self.direction_helps = None
        else:
            exceed = sum(g >= self.gain - 1e-12 for g in self.null_gains)
            if self.permutations < permutations_asked:
                # stopped early (Besag and Clifford, Biometrika 1991): p = h / l
                self.p_value = exceed / self.permutations
            else:
                self.p_value = (1 + exceed) / (1 + self.permutations)
            self.direction_helps = bool(self.interval[0] > 0 and self.p_value <= _ALPHA)
        if self.direction_helps:
            self.suggested_charge = float(min(max(self.best_charge, 0.01), 0.45))
        else:
            self.suggested_charge = 0.02  # a small start (common practice, no source)

    @property
    def verdict(self) -> str:
        """One sentence: whether direction helped, by how much, and what to do next."""
        low, high = self.interval
        gain = f"{self.gain:+.3f} {self.metric} (95 % interval {low:+.3f} to {high:+.3f})"
        if self.p_value is None:
            return (f"best charge q = {self.best_charge:g}: gain {gain} over q = 0; no permutation test ran "
                    f"(permutations=0), so no verdict")
        p = f"direction-permutation p = {self.p_value:.3g} over {self.permutations} permuted graphs"
        if self.direction_helps:
            return (f"direction helps: q = {self.best_charge:g} gains {gain} over q = 0; {p}. Start a learned "
                    f"charge at {self.suggested_charge:g}.")
        if low <= 0:
            why = "its interval includes 0"
        elif not any(g >= self.gain - 1e-12 for g in self.null_gains):
            why = (f"no randomized copy matched it, but {self.permutations} permutations cannot give p <= "
                   f"{_ALPHA}; use at least {int(round(1 / _ALPHA)) - 1}")
        else:
            why = "randomly oriented copies of the graph gain as much"
        return (f"no evidence that direction helps ({why}): best q = {self.best_charge:g} gains {gain}; {p}. "
                f"A symmetric filter (q = 0) is enough; to try direction anyway, start a learned charge at "
                f"{self.suggested_charge:g}.")

    def __repr__(self) -> str:
        return (f"ChargeScan(task={self.task!r}, best_charge={self.best_charge:g}, gain={self.gain:.4f}, "
                f"p_value={self.p_value}, direction_helps={self.direction_helps})")

    def __str__(self) -> str:
        head = ["charge q", f"{self.metric} (mean)", "95 % interval", "gain over q = 0", "95 % interval"]
        body = [[f"{r.charge:g}" + (" *" if r.charge == self.best_charge else ""), f"{r.score:.4f}",
                 f"[{r.low:.4f}, {r.high:.4f}]", "-" if r.charge == 0 else f"{r.gain:+.4f}",
                 "-" if r.charge == 0 else f"[{r.gain_low:+.4f}, {r.gain_high:+.4f}]"] for r in self.rows]
        widths = [max(len(h), *(len(b[i]) for b in body)) for i, h in enumerate(head)]
        line = lambda cells: "  ".join(c.ljust(w) for c, w in zip(cells, widths)).rstrip()  # noqa: E731
        s = self.settings
        used = f"{s['labelled']}" if s["labelled"] == s["labelled_total"] else f"{s['labelled']} of {s['labelled_total']}"
        out = [f"charge scan ({self.task}, {used} labelled {s['unit']}, {s['folds']} folds x "
               f"{s['repeats']} repeats, order {s['order']}, phase {s['phase']!r})",
               line(head), line(["-" * w for w in widths])]
        out += [line(b) for b in body]
        out.append(f"* best charge. {self.verdict}")
        return "\n".join(out)

    def to_dict(self) -> dict:
        """Plain Python (JSON-ready): settings, rows, best charge, gain, interval, p-value, verdict."""
        return {
            "task": self.task, "metric": self.metric, "settings": self.settings,
            "rows": [vars(r) if hasattr(r, "__dict__") else r.__dict__ for r in self.rows],
            "best_charge": self.best_charge, "gain": self.gain, "interval": list(self.interval),
            "p_value": self.p_value, "permutations": self.permutations, "null_gains": list(self.null_gains),
            "direction_helps": self.direction_helps, "suggested_charge": self.suggested_charge,
            "verdict": self.verdict, "fold_scores": self.fold_scores.tolist(),
        }

    def plot(self, path) -> str:
        """Write a PNG: mean score against q with its 95 % band, q = 0 marked; returns the path."""
        try:
            import matplotlib

            matplotlib.use("Agg", force=False)
            import matplotlib.pyplot as plt
        except ImportError as err:  # pragma: no cover - matplotlib is in the tutorials extra
            raise ImportError("ChargeScan.plot needs matplotlib (pip install matplotlib)") from err
        q = np.array([r.charge for r in self.rows])
        m = np.array([r.score for r in self.rows])
        lo = np.array([r.low for r in self.rows])
        hi = np.array([r.high for r in self.rows])
        fig, ax = plt.subplots(figsize=(6, 4))
        ax.fill_between(q, lo, hi, color="#2a7ab9", alpha=0.2, label="95 % interval")
        ax.plot(q, m, "o-", color="#2a7ab9", label=f"mean {self.metric}")
        zero = self.rows[[r.charge for r in self.rows].index(0.0)]
        ax.axhline(zero.score, color="#999999", ls=":", lw=1)
        ax.plot([0.0], [zero.score], "s", color="k", label="q = 0 (no direction)")
        ax.plot([self.best_charge], [max(m[q > 0])], "*", ms=14, color="#d95f02", label="best q")
        ax.set_xlabel("charge q")
        ax.set_ylabel(f"cross-validated {self.metric}")
        p = "-" if self.p_value is None else f"{self.p_value:.3g}"
        ax.set_title(f"direction helps: {self.direction_helps} (gain {self.gain:+.3f}, p = {p})", fontsize=10)
        ax.legend(fontsize=8)
        fig.tight_layout()
        fig.savefig(path, dpi=110)
        plt.close(fig)
        return str(path)


# ---------------------------------------------------------------------- validation
def _count(name: str, value, minimum: int) -> int:
    if isinstance(value, bool) or not isinstance(value, numbers.Integral) or int(value) < minimum:
        raise GraphInputError(f"{name} must be an integer >= {minimum}; got {value!r}")
    return int(value)


def _features(x, num_nodes: int) -> torch.Tensor:
    if isinstance(x, torch.Tensor):
        xt = x.detach().cpu()
    else:
        try:
            xt = torch.as_tensor(np.asarray(x))
        except (TypeError, ValueError, RuntimeError):
            raise GraphInputError(f"x must be an (N, F) array of real numbers; got {type(x).__name__}") from None
    if xt.dim() == 1:
        xt = xt[:, None]
    if xt.dim() != 2 or xt.is_complex() or not (xt.is_floating_point() or xt.dtype in (
            torch.int8, torch.int16, torch.int32, torch.int64, torch.uint8, torch.bool)):
        raise GraphInputError(f"x must be an (N, F) array of real numbers; got shape {tuple(xt.shape)}, dtype {xt.dtype}")
    if xt.shape[0] != num_nodes:
        raise GraphInputError(f"x must have one row per node: the graph has {num_nodes} nodes, x has {xt.shape[0]} rows")
    xt = xt.to(torch.float64)
    bad = ~torch.isfinite(xt)
    if bool(bad.any()):
        r, c = (int(v) for v in torch.nonzero(bad)[0])
        raise GraphInputError(f"x holds {int(bad.sum())} non-finite values (first: {float(xt[r, c])} at row {r}, "
                              f"column {c}); the scan needs finite features (impute or drop them first)")
    return xt


def _node_targets(y, num_nodes: int):
    if isinstance(y, torch.Tensor):
        ya = y.detach().cpu().numpy()
    else:
        ya = np.asarray(y)
    if ya.ndim != 1:
        raise GraphInputError(f"y must be a 1-D array with one entry per node; got shape {ya.shape}")
    if ya.shape[0] != num_nodes:
        raise GraphInputError(f"y must have one entry per node: the graph has {num_nodes} nodes, y has {ya.shape[0]}")
    if ya.dtype.kind in "iu":
        if ya.size and ya.min() < -1:
            raise GraphInputError(f"y holds class {int(ya.min())}; classes are integers >= 0 and -1 marks unlabeled")
        rows = np.flatnonzero(ya >= 0)
        _, target = np.unique(ya[rows], return_inverse=True)
        if np.unique(target).size < 2:
            raise GraphInputError(f"y has {np.unique(target).size} class among its labelled nodes; a scan "
                                  f"needs at least 2 classes (labels of -1 are unlabeled)")
        return "classification", rows, target.astype(np.int64)
    if ya.dtype.kind == "f":
        ya = ya.astype(np.float64)
        if np.isinf(ya).any():
            raise GraphInputError(f"y holds an infinite target at node {int(np.flatnonzero(np.isinf(ya))[0])}; "
                                  f"regression targets must be finite (NaN marks unlabeled)")
        rows = np.flatnonzero(~np.isnan(ya))
        if rows.size and np.ptp(ya[rows]) == 0:
            raise GraphInputError("y is constant over its labelled nodes; a regression scan needs varying targets")
        return "regression", rows, ya[rows]
    raise GraphInputError(f"y must hold integer classes (-1 unlabeled) or float targets (NaN unlabeled); got dtype {ya.dtype}")


def _check_charges(charges) -> list:
    if charges is None:
        return list(DEFAULT_CHARGES)
    if isinstance(charges, numbers.Real):
        charges = [charges]
    try:
        values = [float(q) for q in charges]
    except (TypeError, ValueError):
        raise GraphInputError(f"charges must be a list of numbers in [0, 0.5]; got {charges!r}") from None
    for q in values:
        if not (0.0 <= q <= 0.5):
            raise GraphInputError(f"charges must lie in [0, 0.5]; got {q}")
    values = sorted(set(values) | {0.0})  # the gain is always measured against q = 0
    if len(values) < 2:
        raise GraphInputError(f"charges must hold at least one charge q > 0 besides 0; got {charges!r}")
    return values


def _folds(rng, n: int, folds: int, repeats: int, strata: Optional[np.ndarray], groups: Optional[np.ndarray]) -> np.ndarray:
    """Test masks (repeats * folds, n): every repeat partitions the rows into ``folds`` folds.

    Classes are spread evenly over the folds (stratified); rows of one group (the two
    orientations of one link) share a fold.
    """
    masks = np.zeros((repeats * folds, n), dtype=bool)
    for r in range(repeats):
        if groups is not None:
            _, g = np.unique(groups, return_inverse=True)
            fold_of_group = rng.permutation(g.max() + 1) % folds
            fold = fold_of_group[g]
        else:
            order = rng.permutation(n)
            if strata is not None:
                order = order[np.argsort(strata[order], kind="stable")]
                counts = np.bincount(strata)
                starts = np.concatenate([[0], np.cumsum(counts)[:-1]])
                rank = np.arange(n) - starts[strata[order]]
                offset = rng.integers(0, folds, size=counts.size)
                fold_sorted = (rank + offset[strata[order]]) % folds
            else:
                fold_sorted = np.arange(n) % folds
            fold = np.empty(n, dtype=np.int64)
            fold[order] = fold_sorted
        masks[r * folds + np.arange(folds)] = fold[None, :] == np.arange(folds)[:, None]
    if (masks.sum(1) == 0).any() or (masks.sum(1) == n).any():
        raise GraphInputError(f"folds = {folds} leaves a fold without test or training rows; use fewer folds")
    return masks


def _pair_flips(rng: np.random.Generator, count: int) -> np.ndarray:
    """Which of ``count`` node pairs (numbered as :func:`phasorgraph.operators.node_pairs` does) to reverse."""
    return rng.random(count) < 0.5


def randomize_orientation(graph: DirectedGraph, rng: np.random.Generator) -> DirectedGraph:
    """The graph with each linked node pair's orientation flipped with probability 1/2.

    A pair {u, v} joined by u -> v (weight a) and possibly v -> u (weight b) becomes, when
    flipped, v -> u (a) and u -> v (b). So the symmetrized adjacency :math:`A_s` (the undirected
    structure and its weights) is unchanged and only which way each pair points is random;
    self-loops stay. Vectorized over the edges.

    :func:`scan_charges` never builds these graphs: it draws the same flips from ``rng`` and
    applies them to the graph's magnetic values (:func:`phasorgraph.operators.orientation_signs`);
    the tests check that both give the same features.
    """
    s = graph.source.numpy()
    t = graph.target.numpy()
    lo, hi = np.minimum(s, t), np.maximum(s, t)
    _, pair = np.unique(lo * np.int64(max(graph.num_nodes, 1)) + hi, return_inverse=True)
    f = _pair_flips(rng, int(pair.max()) + 1 if pair.size else 0)[pair]
    return DirectedGraph(torch.from_numpy(np.where(f, t, s)), torch.from_numpy(np.where(f, s, t)), graph.weight,
                         graph.num_nodes)


class _Progress:
    """Progress lines on stderr (tqdm when installed); ``None`` means "only after 3 s"."""

    def __init__(self, mode, total: int, label: str):
        self.mode, self.total, self.label, self.done = mode, total, label, 0
        self.start = time.perf_counter()
        self.bar = None
        self.last = 0.0

    def step(self, what: str) -> None:
        self.done += 1
        if self.mode is False:
            return
        elapsed = time.perf_counter() - self.start
        if self.mode is None and elapsed < 3.0:
            return
        if self.bar is None:
            try:
                from tqdm import tqdm

                self.bar = tqdm(total=self.total, desc=self.label, initial=self.done - 1, file=sys.stderr)
            except ImportError:
                self.bar = False
        if self.bar:
            self.bar.set_postfix_str(what)
            self.bar.update(1)
        elif elapsed - self.last >= 1.0 or self.done == self.total or self.mode is True:
            self.last = elapsed
            print(f"{self.label}: {self.done}/{self.total} ({what}), {elapsed:.1f} s", file=sys.stderr, flush=True)

    def close(self) -> None:
        if self.bar:
            self.bar.close()


# ---------------------------------------------------------------------- the scan
def scan_charges(graph, x, y=None, *, charges: Optional[Sequence[float]] = None, order: int = 4, folds: int = 5,
                 repeats: int = 2, permutations: int = 19, phase: str = "difference", penalty: float = 0.01,
                 max_labelled: Optional[int] = 5000, seed: Any = None, progress: Optional[bool] = None) -> ChargeScan:
    r"""Does edge direction help predict ``y``? Score fixed magnetic features at each charge q.

    For each charge q the features of node u are the Chebyshev terms
    :math:`T_k(L(q) - I)\,X`, k = 0..order (:func:`magnetic_chebyshev_terms`): real and
    imaginary parts (each complex column centered and divided by one scale, so that a small
    charge gives small imaginary parts, as a trained filter sees them) and moduli (standardized).
    For a link split, the pair features are those of both endpoints and of
    :math:`z_u \bar z_v` (whose imaginary part changes sign when the pair is reversed). A regularized linear model is fitted
    on the same cross-validation folds for every charge (``repeats`` times ``folds``-fold,
    stratified by class): multinomial logistic regression for integer labels (scored by
    accuracy), ridge regression for float targets (scored by R^2 on the held-out fold), or, for
    a link split, logistic regression on pair features (scored by AUC). Then:

    * **gain and interval.** The gain of the best charge q* > 0 over q = 0 is the mean of the
      paired fold differences, with a 95 % interval from Student's t and the Nadeau-Bengio
      variance :math:`(1/J + n_{test}/n_{train})\,s^2` (J = folds x repeats). The plain
      :math:`s^2/J` treats the folds as independent, but their training sets overlap, so it is
      too narrow; Nadeau and Bengio (Machine Learning 2003) derived the correction and Bouckaert
      and Frank (PAKDD 2004) found that this corrected repeated-cv test keeps its level.
    * **direction-permutation test.** A charge q > 0 adds imaginary-part features that may help
      by themselves, and q* is the best of several charges, so the interval alone is optimistic.
      The same scan runs on copies of the graph whose edge orientations are randomized (each
      linked pair flipped with probability 1/2: undirected structure and weights kept, so the
      q = 0 scores do not change), and the p-value is the share of copies whose best gain
      reaches the observed one, :math:`(1 + \#\{g_b \ge g\}) / (1 + B)`. It stops early once
      3 copies reach the observed gain (p = 3 / copies scanned; Besag and Clifford, Biometrika
      1991), since the verdict is then settled.
    * **verdict.** ``direction_helps`` is True only when the interval excludes 0 and
      p <= 0.05. With the default 19 permutations that means no randomized copy matched the
      observed gain.

    Default charges: 0 and (0.02, 0.05, 0.1, 0.15, 0.2, 0.25). The direction signal of a
    one-way edge is the imaginary part of its phasor, :math:`\sin 2\pi q`, which is largest at
    q = 0.25 and symmetric about it (q and 0.5 - q give it equally; beyond 0.25 only the real
    part changes, which weighs one-way against reciprocal edges, not direction), so 0.25 ends
    the grid. The grid is denser near 0 because the phase is linear there and learned charges
    start there. With large weights and ``phase="difference"`` the phase wraps: pass
    ``phase="sign"``.

    Args:
        graph: a DirectedGraph, or a LinkSplit from :func:`phasorgraph.data.split_link_orientation` or
            :func:`~phasorgraph.data.split_link_presence` (then
            ``y`` must be None: the held-out pairs of ``split.val`` and ``split.test`` and their
            labels are scored on ``split.train_graph``, which does not contain them; the
            training pairs are left out because their own edges, direction included, are in
            that graph).
        x: (N, F) real node features; the scan adds a column of ones to them, so features
            without direction (or a single column of ones) are fine.
        y: (N,) integer classes (-1 = unlabeled) or float targets (NaN = unlabeled); None for a
            LinkSplit.
        charges: charges in [0, 0.5] (default :data:`DEFAULT_CHARGES`); 0 is always added.
        order: Chebyshev order K (default 4).
        folds: folds per repeat (default 5).
        repeats: repeats of the fold split (default 2).
        permutations: randomized-orientation copies for the p-value (default 19; 0 skips the
            test and leaves ``direction_helps`` None).
        phase: the magnetic phase, "difference" (default), "sign" or "relative".
        penalty: L2 penalty on the standardized weights (default 0.01, per mean loss; common
            practice, no source); the intercept is not penalized.
        max_labelled: score at most this many labelled rows (default 5000), a uniformly random
            subset when there are more (for links, whole node pairs); None scores all. The model
            fits cost time in proportion to the rows, and 5000 rows already give fold scores
            with a standard error near 0.01; the features always use the whole graph.
        seed: None, an int or a numpy Generator (folds, subset and permutations).
        progress: None (default: a line on stderr once the scan has run 3 s), True, or False.

    Returns:
        :class:`ChargeScan`.

    Notes:
        Cost: ``order`` sparse products per charge per graph, for the observed graph and each
        permuted copy, plus the model fits on (labelled rows) x (3 (K + 1) (F + 1) + 1) features,
        batched over all folds and charges. The logistic models take 15 bound-Hessian Newton
        steps (Boehning, Ann. Inst. Stat. Math. 1992) from zero, short of the exact optimum (the
        fold scores moved by at most 0.03 between 15 and 200 steps on the freight network of the
        tutorials); the ridge models take one solve per fold.

        What keeps the permutation test cheap, with the null statistic computed exactly as the
        observed one (same charges, folds, designs and fits): a permuted copy is never built as
        a graph. Reversing node pairs keeps the pattern, the degrees and the real parts of the
        magnetic values and flips the sign of their imaginary parts pair by pair
        (:func:`phasorgraph.operators.orientation_signs`), so a copy costs one multiplication per
        non-zero and its products; q = 0 is orientation-free and scored once. Terms are computed
        only on the rows the scored nodes depend on (the last term on the scored nodes alone). Fold splits, weights and targets are prepared once; the
        logistic steps run in float32 on C - 1 classes (the weights of each class sum to 0).
        ``bench/scan.py`` measures each stage (bench/README.md).

    Example:
        >>> from phasorgraph.data import directed_block_model
        >>> g, y = directed_block_model([40, 40], 0.1, [[0.5, 0.9], [0.1, 0.5]], seed=0)
        >>> result = scan_charges(g, torch.ones(80, 1), y, charges=[0, 0.25], permutations=4, seed=0,
        ...                       progress=False)
        >>> result.best_charge
        0.25
    """
    permutations = _count("permutations", permutations, 0)
    if max_labelled is not None:
        max_labelled = _count("max_labelled", max_labelled, 2)
    order = _count("order", order, 0)
    folds = _count("folds", folds, 2)
    repeats = _count("repeats", repeats, 1)
    if phase not in _PHASES:
        raise GraphInputError(f"phase must be one of {_PHASES}; got {phase!r}")
    if isinstance(penalty, bool) or not isinstance(penalty, numbers.Real) or not (penalty > 0 and math.isfinite(penalty)):
        raise GraphInputError(f"penalty must be a finite number > 0; got {penalty!r}")
    qs = _check_charges(charges)
    rng = np.random.default_rng(seed)
    if hasattr(graph, "train_graph") and hasattr(graph, "val") and hasattr(graph, "test"):
        if y is not None:
            raise GraphInputError("y must be None when graph is a LinkSplit (its pairs carry their own labels)")
        split, graph = graph, graph.train_graph
        task = "link"
        pairs = np.concatenate([split.val.pairs.numpy(), split.test.pairs.numpy()], axis=1)
        target = np.concatenate([split.val.labels.numpy(), split.test.labels.numpy()]).astype(np.int64)
        if np.unique(target).size < 2:
            raise GraphInputError("graph (a LinkSplit) holds held-out pairs of a single label; both 0 and 1 are needed")
        rows = pairs
        n_rows = pairs.shape[1]
        lo, hi = np.minimum(pairs[0], pairs[1]), np.maximum(pairs[0], pairs[1])
        groups, strata = lo * np.int64(max(graph.num_nodes, 1)) + hi, None
        unit = "pairs"
    elif isinstance(graph, DirectedGraph):
        if y is None:
            raise GraphInputError("y must be given: (N,) integer classes (-1 unlabeled) or float targets")
        task, rows, target = _node_targets(y, graph.num_nodes)
        n_rows = rows.size
        groups, strata = None, (target if task == "classification" else None)
        unit = "nodes"
    else:
        raise GraphInputError(f"graph must be a DirectedGraph or a LinkSplit; got {type(graph).__name__}")
    xt = _features(x, graph.num_nodes).to(torch.float32)
    # a column of ones lets the terms see the shape of the neighbourhood (degrees, and for q > 0
    # the balance of in- and out-edges) even when x carries none of it
    xt = torch.cat([torch.ones(graph.num_nodes, 1), xt], dim=1)
    if n_rows < folds:
        raise GraphInputError(f"y has {n_rows} labelled {unit}, fewer than folds = {folds}; label more or use fewer folds")
    labelled = n_rows
    if max_labelled is not None and n_rows > max_labelled:
        # a random subset of the labelled rows (whole groups for links): the fits cost O(rows),
        # the features do not depend on it
        if groups is not None:
            _, g_of = np.unique(groups, return_inverse=True)
            keep_groups = rng.permutation(g_of.max() + 1)[:max(1, max_labelled // 2)]
            pick = np.flatnonzero(np.isin(g_of, keep_groups))
        else:
            pick = np.sort(rng.permutation(n_rows)[:max_labelled])
        rows = rows[:, pick] if rows.ndim == 2 else rows[pick]
        target = target[pick]
        groups = None if groups is None else groups[pick]
        strata = None if strata is None else strata[pick]
        n_rows = pick.size
    test = _folds(rng, n_rows, folds, repeats, strata, groups)
    test_fraction = float(test.sum(1).mean()) / n_rows
    if task == "link":
        nodes, where = np.unique(rows, return_inverse=True)  # the pairs' endpoints
        where = where.reshape(rows.shape)
        design = _pair_design
    else:
        nodes, where, design = rows, np.arange(rows.size), _node_design
    # features are computed at the scored nodes only (and the rows they depend on); the models
    # on the same folds for every charge, the observed graph and every permuted copy
    features = _ChebyshevFeatures(graph, xt, order, phase, nodes=nodes)
    iterations = 15  # fold scores moved by <= 0.03 between 15 and 200 steps on the freight network (measured)
    models = _FoldModels(target, test, task, float(penalty), iterations)
    bar = _Progress(progress, len(qs) + permutations * (len(qs) - 1), "charge scan")

    def scores_on(signs, which):
        Z = []
        for q in which:
            Z.append(design(features.terms(q, signs), where))
            bar.step(f"q = {q:g}")
        return models.scores(np.stack(Z))

    observed = scores_on(None, qs)
    means = observed.mean(1)
    base = means[0]
    gain = float(np.max(means[1:]) - base)
    # the gain as ChargeScan measures it: the best charge's mean paired difference
    null = []
    exceed = 0
    pair_count = node_pairs(graph)[1] if permutations else 0
    for _ in range(permutations):
        # a randomly oriented copy: the flips randomize_orientation(graph, rng) would draw, applied
        # to the magnetic values (q = 0 is orientation-free: its scores are the observed ones)
        signs = features.orientation(orientation_signs(graph, _pair_flips(rng, pair_count)))
        g_null = float(np.max(scores_on(signs, qs[1:]).mean(1)) - base)
        null.append(g_null)
        exceed += g_null >= gain - 1e-12
        if exceed >= 3:
            break
    bar.close()
    settings = {"labelled": int(n_rows), "labelled_total": int(labelled), "unit": unit, "folds": folds,
                "repeats": repeats, "order": order, "phase": phase, "penalty": float(penalty), "charges": qs,
                "permutations_asked": permutations}
    return ChargeScan(task=task, metric=_METRICS[task], charges=qs, fold_scores=observed, test_fraction=test_fraction,
                      null_gains=null, permutations_asked=permutations, settings=settings)
