"""Unconstrained parameterisation for optimisers: log-Cholesky for covariance blocks.

A block with covariances fixed at zero (three processes joined by one same-wave path,
model/paths.py) keeps its zeros by solving for the Cholesky entry under each zero: with
S = L L' and j < i, S[i, j] = sum_(m < j) L[i, m] L[j, m] + L[i, j] L[j, j], so
L[i, j] = -sum_(m < j) L[i, m] L[j, m] / L[j, j] makes S[i, j] = 0 exactly. Every positive
definite matrix with those zeros has such a factor (its own Cholesky factor), so the map
reaches all of them. Its derivative is taken by the complex step (the map is analytic).
"""

from __future__ import annotations

import numpy as np

from bayeslong.model.structure import Structure


class Unconstrained:
    """Map between natural parameters ``theta`` and unconstrained ``u`` of equal length.

    Parameters outside covariance blocks are unchanged. For a block with covariance
    S = L L', the block's parameter slots in ``u`` hold the lower triangle of L with the
    diagonal on the log scale, so every ``u`` gives a positive definite block.
    """

    def __init__(self, structure: Structure):
        self.blocks = []
        self.zero_blocks = []  # (index, free lower-triangle positions, their parameter slots)
        singles = []  # 1 x 1 blocks (a lone variance) are handled together: theta = exp(2 u)
        for b in structure.blocks:
            idx = b.index
            if (idx < 0).any():
                rows, cols = np.tril_indices(len(idx))
                keep = idx[rows, cols] >= 0
                self.zero_blocks.append((idx, rows[keep], cols[keep], idx[rows, cols][keep]))
                continue
            if len(idx) == 1:
                singles.append(int(idx[0, 0]))
                continue
            if len(set(np.diag(idx).tolist())) < len(idx):
                # a block whose variances are held equal (strict invariance of unique
                # variances that covary over waves) has no log-Cholesky form: its variances
                # go on the log scale and its covariances stay as they are, and the
                # likelihood refuses points where the block is not positive definite
                singles.extend(int(i) for i in np.unique(np.diag(idx)))
                continue
            rows, cols = np.tril_indices(len(idx))
            self.blocks.append((idx, rows, cols, idx[rows, cols]))
        self.singles = np.array(sorted(set(singles)), dtype=np.int64)

    def to_natural(self, u: np.ndarray) -> np.ndarray:
        theta = np.array(u, dtype=float)
        theta[self.singles] = np.exp(2.0 * np.clip(theta[self.singles], -30, 30))
        for idx, rows, cols, slots in self.blocks:
            L = np.zeros(idx.shape)
            L[rows, cols] = u[slots]
            d = np.diag_indices(len(idx))
            L[d] = np.exp(np.clip(L[d], -30, 30))
            S = L @ L.T
            theta[slots] = S[rows, cols]
        for idx, rows, cols, slots in self.zero_blocks:
            theta[slots] = _zero_block(idx, rows, cols, u[slots]).real
        return theta

    def from_natural(self, theta: np.ndarray) -> np.ndarray:
        u = np.array(theta, dtype=float)
        v = theta[self.singles]
        u[self.singles] = 0.5 * np.log(np.maximum(v, 1e-8 * np.maximum(v, 1e-12)))  # as below, q = 1
        for idx, rows, cols, slots in self.blocks:
            S = theta[idx]
            w, v = np.linalg.eigh(S)
            S = (v * np.maximum(w, 1e-8 * max(w.max(), 1e-12))) @ v.T  # nearest PD
            L = np.linalg.cholesky(S)
            d = np.diag_indices(len(idx))
            L[d] = np.log(L[d])
            u[slots] = L[rows, cols]
        for idx, rows, cols, slots in self.zero_blocks:
            S = np.where(idx >= 0, theta[idx], 0.0)
            w, v = np.linalg.eigh(S)
            S = (v * np.maximum(w, 1e-8 * max(w.max(), 1e-12))) @ v.T
            S[idx < 0] = 0.0  # the zeros stay zeros (the nearest-PD step may move them)
            try:
                L = np.linalg.cholesky(S)
            except np.linalg.LinAlgError:  # zeroing made it indefinite: start from the diagonal
                L = np.diag(np.sqrt(np.maximum(np.diag(S), 1e-12)))
            d = np.diag_indices(len(idx))
            L[d] = np.log(L[d])
            u[slots] = L[rows, cols]
        return u

    def grad_to_u(self, u: np.ndarray, grad_theta: np.ndarray) -> np.ndarray:
        """Chain rule: gradient with respect to ``u`` from the gradient in ``theta``."""
        g = np.array(grad_theta, dtype=float)
        # d exp(2u)/du = 2 exp(2u)
        g[self.singles] *= 2.0 * np.exp(2.0 * np.clip(u[self.singles], -30, 30))
        for idx, rows, cols, slots in self.blocks:
            q = len(idx)
            L = np.zeros(idx.shape)
            L[rows, cols] = u[slots]
            d = np.diag_indices(q)
            L[d] = np.exp(np.clip(L[d], -30, 30))
            # symmetric dl/dS: a covariance parameter fills two entries
            Gs = grad_theta[idx] * np.where(np.eye(q, dtype=bool), 1.0, 0.5)
            dL = 2.0 * Gs @ L
            dL[d] *= L[d]
            g[slots] = dL[rows, cols]
        for idx, rows, cols, slots in self.zero_blocks:
            h = 1e-30
            steps = u[slots] + 1j * h * np.eye(len(slots))
            J = np.array([_zero_block(idx, rows, cols, s).imag / h for s in steps])  # du x dtheta
            g[slots] = J @ np.asarray(grad_theta, dtype=float)[slots]
        return g


class Cholesky:
    """Covariance blocks as S = L L' with L lower triangular and its diagonal unrestricted.

    The coordinates in which maximum likelihood runs Newton's method. Every real ``u``
    gives a positive semi-definite block, and a block on the boundary (a variance, or a
    conditional variance, at zero) is an ordinary interior point of ``u`` (L[d, d] = 0): a
    maximum there is a stationary point that Newton's method reaches at its usual rate,
    where the log scale of :class:`Unconstrained` sends log L[d, d] towards minus infinity
    and stalls. The factor is unique only up to the signs of its columns, which is harmless
    for an optimiser that starts with a positive diagonal (Pinheiro, J. C. & Bates, D. M.
    1996, Unconstrained parametrizations for variance-covariance matrices, Statistics and
    Computing 6, 289-296). A 1 x 1 block is theta = u^2. Parameters outside covariance
    blocks are unchanged.
    """

    def __init__(self, structure: Structure):
        self.p = structure.n_params
        self.blocks = []
        for b in structure.blocks:
            idx = b.index
            rows, cols = np.tril_indices(len(idx))
            slots = idx[rows, cols]
            if (slots < 0).any() or len(np.unique(slots)) < len(slots):
                # a block with fixed entries or entries tied to each other (equal unique
                # variances over waves under strict invariance) has fewer free values than
                # its factor: its parameters stay natural, and Newton's method's steps in
                # the natural parameters serve it
                continue
            self.blocks.append((idx, rows, cols, slots))

    @staticmethod
    def factor(u: np.ndarray, rows, cols, q: int) -> np.ndarray:
        """The block's lower-triangular factor L from its slots of ``u``."""
        L = np.zeros((q, q))
        L[rows, cols] = u
        return L

    def to_natural(self, u: np.ndarray) -> np.ndarray:
        theta = np.array(u, dtype=float)
        for idx, rows, cols, slots in self.blocks:
            L = self.factor(u[slots], rows, cols, len(idx))
            theta[slots] = (L @ L.T)[rows, cols]
        return theta

    def from_natural(self, theta: np.ndarray) -> np.ndarray:
        """Cholesky factors of the blocks (a block that is not positive definite is first
        moved to the nearest one with eigenvalues at least 1e-10 times the largest)."""
        u = np.array(theta, dtype=float)
        for idx, rows, cols, slots in self.blocks:
            S = theta[idx]
            try:
                L = np.linalg.cholesky(S)
            except np.linalg.LinAlgError:
                w, v = np.linalg.eigh(S)
                L = np.linalg.cholesky((v * np.maximum(w, 1e-10 * max(w.max(), 1e-12))) @ v.T)
            u[slots] = L[rows, cols]
        return u

    def jacobian(self, u: np.ndarray) -> np.ndarray:
        """d theta / d u, shape (p, p): S[r, c] = sum_m L[r, m] L[c, m]."""
        J = np.eye(self.p)
        for idx, rows, cols, slots in self.blocks:
            L = self.factor(u[slots], rows, cols, len(idx))
            # dS[r, c] / dL[a, m] = [r == a] L[c, m] + [c == a] L[r, m]
            for j, (a, m) in enumerate(zip(rows, cols)):
                J[slots, slots[j]] = (np.where(rows == a, L[cols, m], 0.0)
                                      + np.where(cols == a, L[rows, m], 0.0))
        return J

    def curvature(self, grad_theta: np.ndarray) -> np.ndarray:
        """sum_k g_k d2 theta_k / du du' (the second-order term of the chain rule).

        With G symmetric such that sum_k g_k theta_k = tr(G S) over a block,
        d2 tr(G L L') / dL[a, m] dL[b, n] = 2 G[a, b] [m == n]. This term carries the
        curvature at a variance held at zero (where d theta / d u vanishes), so the
        Hessian in u tells a boundary maximum (G negative there) from a stall.
        """
        C = np.zeros((self.p, self.p))
        for idx, rows, cols, slots in self.blocks:
            q = len(idx)
            G = grad_theta[idx] * np.where(np.eye(q, dtype=bool), 1.0, 0.5)
            C[np.ix_(slots, slots)] = 2.0 * G[np.ix_(rows, rows)] * (cols[:, None] == cols[None, :])
        return C


def _zero_block(idx, rows, cols, values):
    """The free entries of S = L L' from the free Cholesky entries (module notes)."""
    q = len(idx)
    L = np.zeros((q, q), dtype=np.result_type(values, float))
    L[rows, cols] = values
    for i in range(q):
        for j in range(i + 1):
            if i == j:
                L[i, i] = np.exp(np.clip(L[i, i].real, -30, 30) + 1j * L[i, i].imag) \
                    if np.iscomplexobj(L) else np.exp(np.clip(L[i, i], -30, 30))
            elif idx[i, j] < 0:
                L[i, j] = -(L[i, :j] @ L[j, :j]) / L[j, j]
    S = L @ L.T
    return S[rows, cols]
