"""Unconstrained parameterisation for optimisers: log-Cholesky for covariance blocks."""

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
        singles = []  # 1 x 1 blocks (a lone variance) are handled together: theta = exp(2 u)
        for b in structure.blocks:
            idx = b.index
            if (idx < 0).any():
                raise NotImplementedError("covariance blocks with fixed zeros are not supported")
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
        return g
