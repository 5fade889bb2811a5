"""Dense NumPy references for the tests: every operator formula of src/phasorgraph/operators.py written once, densely.

Everything here is built straight from the formulas with numpy, independent of
phasorgraph.operators (only the graph's raw edges are read). Sources:

* the symmetrized adjacency As = (A + A^T) / 2 and degrees d = As 1 (src/phasorgraph/operators.py);
* zero degree: D^-1/2 and D^-1 of a zero degree are 0 (src/phasorgraph/operators.py);
* the magnetic adjacency H(q) = As * exp(i Theta), Theta = 2 pi q (A - A^T), 2 pi q sign(A - A^T)
  (Zhang et al. 2021; Shubin 1994) or 2 pi q (A - A^T) / (A + A^T) (the relative phase, as
  phasorgraph.operators documents it), normalized magnetic Laplacian I - D^-1/2 H D^-1/2;
* the renormalized adjacency D~^-1/2 (As + I) D~^-1/2 (Kipf & Welling 2017, eq. 2);
* lazy diffusion T = (I + D^-1/2 As D^-1/2) / 2 and walk P = As D^-1 (Coifman & Maggioni 2006);
* Chebyshev filters evaluated with numpy.linalg.eigh and numpy.polynomial.chebyshev.chebval.
"""

from __future__ import annotations

import numpy as np
import numpy.polynomial.chebyshev as npcheb

__all__ = ["dense_adjacency", "DenseGraph", "inverse_root", "magnetic_adjacency", "normalized_magnetic_laplacian",
           "normalized_laplacian", "combinatorial_laplacian", "renormalized_adjacency", "chebyshev_filter"]


def dense_adjacency(graph) -> np.ndarray:
    """A[u, v] = summed weight of the edges u -> v, from the graph's raw edges (numpy.add.at)."""
    A = np.zeros((graph.num_nodes, graph.num_nodes))
    np.add.at(A, (graph.source.numpy(), graph.target.numpy()), graph.weight.numpy())
    return A


def inverse_root(d: np.ndarray, power: float = 0.5) -> np.ndarray:
    """d^-power, 0 where d = 0 (src/phasorgraph/operators.py: isolated nodes never give NaN)."""
    pos = d > 0
    return np.where(pos, 1.0 / np.where(pos, d, 1.0) ** power, 0.0)


def phase_angles(A: np.ndarray, q: float, phase: str = "difference") -> np.ndarray:
    """Theta = 2 pi q (A - A^T), 2 pi q sign(A - A^T), or 2 pi q (A - A^T) / (A + A^T) (0 where
    A + A^T = 0; phase="relative", the net-flow fraction)."""
    diff = A - A.T
    if phase == "relative":
        total = A + A.T
        return 2 * np.pi * q * np.divide(diff, total, out=np.zeros_like(A), where=total > 0)
    return 2 * np.pi * q * (diff if phase == "difference" else np.sign(diff))


def magnetic_adjacency(A: np.ndarray, q: float, phase: str = "difference") -> np.ndarray:
    """H(q) = As * exp(i Theta) (Zhang et al. 2021)."""
    return (A + A.T) / 2 * np.exp(1j * phase_angles(A, q, phase))


def normalized_magnetic_laplacian(A: np.ndarray, q: float, phase: str = "difference") -> np.ndarray:
    """I - D^-1/2 H(q) D^-1/2; q = 0 gives the normalized Laplacian of As."""
    s = inverse_root(((A + A.T) / 2).sum(axis=1))
    return np.eye(A.shape[0]) - s[:, None] * magnetic_adjacency(A, q, phase) * s[None, :]


def normalized_laplacian(A: np.ndarray) -> np.ndarray:
    return normalized_magnetic_laplacian(A, 0.0).real


def combinatorial_laplacian(A: np.ndarray) -> np.ndarray:
    """D - As (the textbook combinatorial Laplacian of the symmetrized graph)."""
    As = (A + A.T) / 2
    return np.diag(As.sum(axis=1)) - As


def renormalized_adjacency(A: np.ndarray) -> np.ndarray:
    """D~^-1/2 (As + I) D~^-1/2 (Kipf & Welling 2017, eq. 2)."""
    As = (A + A.T) / 2 + np.eye(A.shape[0])
    s = 1.0 / np.sqrt(As.sum(axis=1))
    return s[:, None] * As * s[None, :]


def chebyshev_filter(L: np.ndarray, x: np.ndarray, W: np.ndarray, max_eigenvalue: float,
                     min_eigenvalue: float = 0.0) -> np.ndarray:
    """sum_k U T_k(2 (lam - a) / (max_eigenvalue - a) - 1) U^H x W_k on the eigenvalues, a = min_eigenvalue.

    Source: numpy.linalg.eigh for L = U diag(lam) U^H and numpy.polynomial.chebyshev.chebval for
    T_k (the coefficient vector e_k), independent of the layer's three-term recursion.
    """
    lam, U = np.linalg.eigh(L)
    t = 2 * (lam - min_eigenvalue) / (max_eigenvalue - min_eigenvalue) - 1
    xh = U.conj().T @ x
    out = 0
    for k in range(W.shape[0]):
        e = np.zeros(k + 1)
        e[k] = 1.0
        out = out + U @ (npcheb.chebval(t, e)[:, None] * xh) @ W[k]
    return out


class DenseGraph:
    """Every operator of src/phasorgraph/operators.py for one graph (a DirectedGraph or a dense adjacency), as dense numpy matrices."""

    def __init__(self, graph):
        self.A = graph if isinstance(graph, np.ndarray) else dense_adjacency(graph)
        self.n = self.A.shape[0]
        self.As = (self.A + self.A.T) / 2
        self.d = self.As.sum(axis=1)
        self.dis = inverse_root(self.d)            # D^-1/2, 0 if d = 0
        self.dinv = inverse_root(self.d, 1.0)      # D^-1, 0 if d = 0
        self.I = np.eye(self.n)

    def H(self, q, phase="difference"):
        return magnetic_adjacency(self.A, q, phase)

    def mag_norm(self, q, phase="difference"):
        return normalized_magnetic_laplacian(self.A, q, phase)

    def mag(self, q, phase="difference"):
        return np.diag(self.d) - self.H(q, phase)

    def norm(self):
        return normalized_laplacian(self.A)

    def comb(self):
        return combinatorial_laplacian(self.A)

    def rw(self):
        return self.I - np.diag(self.dinv) @ self.As

    def renorm(self):
        return renormalized_adjacency(self.A)

    def T(self, q=None, phase="difference"):
        """Lazy diffusion (I + D^-1/2 As D^-1/2) / 2, or its magnetic form I - L_norm(q) / 2."""
        if q is None:
            S = np.diag(self.dis)
            return (self.I + S @ self.As @ S) / 2
        return self.I - self.mag_norm(q, phase) / 2

    def P(self, lazy=True):
        W = self.As @ np.diag(self.dinv)
        return (self.I + W) / 2 if lazy else W


# ---------------------------------------------------------------------- band-pass layers
def wavelet_bands(T: np.ndarray, scales: int) -> list:
    """Psi_0 .. Psi_J, Phi_J as dense matrices: Psi_0 = I - T, Psi_j = T^(2^(j-1)) - T^(2^j), Phi_J = T^(2^J)
    (Coifman & Maggioni 2006), by numpy.linalg.matrix_power."""
    n = T.shape[0]
    P = [np.eye(n, dtype=T.dtype)] + [np.linalg.matrix_power(T, 2 ** j) for j in range(scales + 1)]
    return [P[i] - P[i + 1] for i in range(scales + 1)] + [P[-1]]


def selector_bands(T: np.ndarray, selection: np.ndarray) -> list:
    """Bands B_{j-1} - B_j and B_S with B_0 = I, B_j = sum_t F_jt T^t (Tong et al. 2021, as the
    layer's docstring writes it), by numpy.linalg.matrix_power."""
    n = T.shape[0]
    S, t1 = selection.shape
    powers = [np.linalg.matrix_power(T, t) for t in range(t1)]
    B = [np.eye(n)] + [sum(selection[j, t] * powers[t] for t in range(t1)) for j in range(S)]
    return [B[i] - B[i + 1] for i in range(S)] + [B[-1]]


def scattering(T: np.ndarray, x: np.ndarray, scales: int, order: int, lowpass: bool = True) -> np.ndarray:
    """(N, K, F) coefficients Phi_J x, Phi_J |Psi_j x|, Phi_J |Psi_j2 |Psi_j1 x|| (j1 < j2) (Gama et al.
    2019; Gao et al. 2019), one feature column and one path at a time with dense wavelets."""
    bands = wavelet_bands(T, scales)
    psi = bands[:-1]
    phi = bands[-1] if lowpass else np.eye(T.shape[0])

    def low(v):
        out = phi @ v  # complex low-pass outputs take a modulus; real ones keep their sign
        return np.abs(out) if np.iscomplexobj(out) else out

    cols = []
    for f in range(x.shape[1]):
        v = x[:, f]
        coeffs = [low(v)]
        coeffs += [low(np.abs(psi[j] @ v)) for j in range(scales + 1)]
        if order == 2:
            coeffs += [low(np.abs(psi[j2] @ np.abs(psi[j1] @ v)))
                       for j1 in range(scales + 1) for j2 in range(j1 + 1, scales + 1)]
        cols.append(np.stack(coeffs, axis=1))
    return np.stack(cols, axis=2)


def band_mix_channels(A: np.ndarray, x: np.ndarray, steps, scales: int) -> np.ndarray:
    """(N, C, F): renormalized-adjacency powers (Kipf & Welling 2017) then |Psi_j x| of the lazy
    diffusion (Min et al. 2020's channel pairing), by numpy.linalg.matrix_power."""
    low = [np.linalg.matrix_power(renormalized_adjacency(A), k) @ x for k in steps]
    T = DenseGraph(A).T()
    band = [np.abs(P @ x) for P in wavelet_bands(T, scales)[:-1]]
    return np.stack(low + band, axis=1)


__all__ += ["phase_angles", "wavelet_bands", "selector_bands", "scattering", "band_mix_channels"]
