"""Per-unit marginal log-likelihood of models with categorical indicators, for LOO and WAIC.

The sampler works with each unit's latents; a comparison needs each unit's likelihood with
those latents integrated out (docs/comparison.md, "Categorical indicators"):

    log p(y_i | w_i, theta) = log N(y_ic; mu_c, S_cc) + log P(a_i < y*_ik <= b_i | y_ic)

y_ic are the unit's observed continuous entries, y*_ik the latent responses of its observed
categorical entries, whose categories bound them by the thresholds (a_i, b_i). Given the
parameters, (y_c, y*_k) is normal with the model's implied moments
(:func:`bayeslong.model.moments.implied_moments` on the categorical structure, whose Theta
holds the responses' errors), so under the probit the second term is a multivariate normal
rectangle probability of dimension q (the unit's categorical entries, at most J T),
whatever the number of latents.

Method, probit: Genz's (1992) separation of variables. With V = L L' the conditional
covariance of y*_k, the probability is an integral over the unit cube of dimension q - 1 of
a product of q univariate normal interval probabilities; it is averaged over randomized
quasi-Monte Carlo points (scrambled Sobol sets, Owen 1997), R independent scramblings giving
the estimate's standard error. The integrand is smooth and bounded by 1, which is why this
is more accurate per point than importance sampling over the latents.

Method, logit: the responses' errors are logistic, so y*_k is not normal; the normal part
x = y*_k - eps (the latents' contribution) is, and P(y_k | x) is a product of logistic
interval probabilities. The probability is averaged over randomized quasi-Monte Carlo draws
of x from its implied normal (the latents integrated against their own distribution,
Merkle, Furr & Rabe-Hesketh 2019), with the same replicate standard error.

The error reported is, per draw and unit, the standard error of the log estimate (delta
method: SE(p_hat) / p_hat); :func:`unit_marginal_loglik` returns it with
``return_error=True``.

References
----------
Genz, A. (1992). Numerical computation of multivariate normal probabilities. Journal of
Computational and Graphical Statistics 1(2), 141-149. doi:10.1080/10618600.1992.10477010
Merkle, E. C., Furr, D. & Rabe-Hesketh, S. (2019). Bayesian comparison of latent variable
models: conditional versus marginal likelihoods. Psychometrika 84(3), 802-829.
doi:10.1007/s11336-019-09679-0
Owen, A. B. (1997). Scrambled net variance for integrals of smooth functions. Annals of
Statistics 25(4), 1541-1562. doi:10.1214/aos/1069362388
"""

from __future__ import annotations

import numpy as np
from scipy.special import expit, ndtr, ndtri

from bayeslong.errors import DataError
from bayeslong.model.moments import NUMPY, implied_moments
from bayeslong.model.thresholds import Categorical

#: Default quasi-Monte Carlo points per replicate and number of replicates.
POINTS = 128
REPLICATES = 4

_LOG_2PI = float(np.log(2.0 * np.pi))


def _hermite(n: int) -> tuple[np.ndarray, np.ndarray]:
    """Nodes (n, 1) and weights (n,) of E f(z), z ~ N(0, 1), by Gauss-Hermite quadrature."""
    x, w = np.polynomial.hermite.hermgauss(n)
    return np.sqrt(2.0) * x[:, None], w / np.sqrt(np.pi)


def _qmc_points(dim: int, points: int, replicates: int, seed: int) -> np.ndarray:
    """(replicates, points, dim) scrambled Sobol points in (0, 1), one scrambling each."""
    from scipy.stats import qmc

    if dim == 0:
        return np.zeros((replicates, points, 0))
    out = np.empty((replicates, points, dim))
    for r in range(replicates):
        sobol = qmc.Sobol(d=dim, scramble=True, seed=np.random.default_rng([seed, r]))
        out[r] = sobol.random(points)
    return np.clip(out, 1e-12, 1.0 - 1e-12)


def _interval(lo: np.ndarray, hi: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Phi(hi) - Phi(lo), accurate in both tails, with the lower end and a flip flag.

    In the upper tail Phi(-lo) - Phi(-hi) keeps the digits that Phi(hi) - Phi(lo) loses.
    """
    upper = lo > 0
    a = np.where(upper, -hi, lo)
    b = np.where(upper, -lo, hi)
    pa, pb = ndtr(a), ndtr(b)
    return pb - pa, pa, upper


def _genz(L: np.ndarray, lo: np.ndarray, hi: np.ndarray, u: np.ndarray) -> np.ndarray:
    """Rectangle probabilities by separation of variables (Genz 1992), averaged over points.

    L: (S, q, q) Cholesky factors; lo, hi: (S, n, q) centred bounds; u: (M, q - 1) points.
    Returns (S, n) estimates.
    """
    S, n, q = lo.shape
    M = len(u)
    f = np.ones((S, n, M))
    w = np.empty((S, n, M, q))
    for j in range(q):
        shift = np.einsum("sk,snmk->snm", L[:, j, :j], w[..., :j]) if j else 0.0
        d = L[:, j, j][:, None, None]
        a = (lo[:, :, j, None] - shift) / d  # (S, n, 1) for the first variable: no points yet
        b = (hi[:, :, j, None] - shift) / d
        width, pa, upper = _interval(a, b)
        f *= width
        if j < q - 1:
            p = np.clip(pa + u[None, None, :, j] * width, 1e-300, 1.0 - 1e-16)
            z = ndtri(p)
            w[..., j] = np.where(upper, -z, z)
    return f.mean(axis=2)


def _latent_average(R: np.ndarray, lo: np.ndarray, hi: np.ndarray, z: np.ndarray,
                    weights: np.ndarray, link: str) -> np.ndarray:
    """Weighted mean over nodes z of prod_j P(lo_j < x_j + eps_j <= hi_j), x = R z.

    R: (S, q, r) root of the latents' part of the responses' covariance; lo, hi: (S, n, q)
    centred bounds; z: (M, r) standard normal nodes; weights: (M,) summing to 1.
    """
    x = np.einsum("sqk,mk->smq", R, z)[:, None]  # (S, 1, M, q)
    a, b = lo[:, :, None, :] - x, hi[:, :, None, :] - x
    p = _interval(a, b)[0] if link == "probit" else expit(b) - expit(a)
    return np.prod(np.clip(p, 0.0, None), axis=-1) @ weights


def _low_rank_root(V: np.ndarray, tol: float = 1e-9) -> np.ndarray:
    """(S, q, r) with R R' = V (positive semi-definite), r its numerical rank (largest over draws)."""
    vals, vecs = np.linalg.eigh(V)
    keep = (vals > tol * np.maximum(vals[..., -1:], 1e-300)).any(axis=0)
    keep[-1] = True  # rank 0: one column of zeros keeps the shapes
    return (vecs * np.sqrt(np.clip(vals, 0.0, None))[..., None, :])[..., keep]


#: Gauss-Hermite nodes for a single latent dimension, and the coarser rule that bounds
#: their error.
GH_NODES = 48


def unit_marginal_loglik(cat: Categorical, panel, theta, tau, *, points: int = POINTS,
                         replicates: int = REPLICATES, seed: int = 0, chunk: int | None = None,
                         return_error: bool = False):
    """Per-draw, per-unit marginal log-likelihood log p(y_i | w_i, theta_s) (module notes).

    Parameters
    ----------
    cat : Categorical
        The categorical part of the model (:func:`bayeslong.model.thresholds.categorical_structure`).
    panel : Panel
    theta : numpy.ndarray, shape (S, n_params) or (n_params,)
        The structure's parameters (pinned ones included), ``cat.structure.names`` order.
    tau : numpy.ndarray, shape (S, n_thresholds) or (n_thresholds,)
        The free thresholds, ``cat.thresholds`` order.
    points, replicates : int
        Quasi-Monte Carlo points per replicate (a power of 2) and independent scramblings.
    seed : int
        Seed of the scramblings (the same points serve every draw and unit).
    chunk : int, optional
        Draws per batch (memory); by default about 4 million values per array.
    return_error : bool
        Also return the standard error of each log estimate, shape (S, N).

    Returns
    -------
    numpy.ndarray, shape (S, N)
    """
    theta = np.atleast_2d(np.asarray(theta, dtype=float))
    tau = np.asarray(tau, dtype=float).reshape(len(theta), -1)
    ys = panel.outcome_matrix()
    w = panel.covariate_matrix()
    N, Y = ys.shape
    S = len(theta)
    if ys.shape[1] != len(cat.structure.observed):
        raise DataError("the panel's observed variables do not match the model's design; "
                        "compute the marginal likelihood on the panel the model was fitted to")
    is_cat = np.zeros(Y, dtype=bool)
    for v in cat.variables:
        is_cat[cat.rows[v]] = True
    observed = ~np.isnan(ys)
    masks, unit_group = np.unique(observed, axis=0, return_inverse=True)
    unit_group = unit_group.reshape(-1)
    q_max = int((masks & is_cat).sum(axis=1).max())
    u_all = _qmc_points(max(q_max - 1, 0), points, replicates, seed)  # Genz: q - 1 dimensions
    u_rank = _qmc_points(q_max, points, replicates, seed)  # over the latents: up to q
    if chunk is None:
        chunk = max(1, int(4e6 // max(1, N * points * max(q_max, 1))))
    out = np.empty((S, N))
    err = np.zeros((S, N))
    codes = np.where(observed, ys, 0).astype(np.int64)
    for start in range(0, S, chunk):
        sl = slice(start, min(S, start + chunk))
        c, D, Sigma = implied_moments(cat.structure, theta[sl], NUMPY)
        s = len(c)
        mu = c[:, None, :] + np.einsum("syw,nw->sny", D, w)  # (s, N, Y)
        lo = np.full((s, N, Y), -np.inf)
        hi = np.full((s, N, Y), np.inf)
        for v, cuts in cat.cut_values(tau[sl]).items():
            r = cat.rows[v]
            k = codes[:, r]  # (N, T)
            t_idx = np.arange(len(r))[None, :]
            lo[:, :, r] = cuts[:, t_idx, k]
            hi[:, :, r] = cuts[:, t_idx, k + 1]
        for g, mask in enumerate(masks):
            units = np.flatnonzero(unit_group == g)
            oc = np.flatnonzero(mask & ~is_cat)
            ok = np.flatnonzero(mask & is_cat)
            m = mu[:, units]  # (s, n, Y)
            total = np.zeros((s, len(units)))
            shift = np.zeros((s, len(units), len(ok)))
            V = Sigma[:, ok][:, :, ok]
            if len(oc):
                Scc = Sigma[:, oc][:, :, oc]
                Lc = np.linalg.cholesky(Scc)
                resid = ys[units][:, oc][None] - m[:, :, oc]  # (s, n, qc)
                sol = np.linalg.solve(Lc[:, None], resid[..., None])[..., 0]
                logdet = 2.0 * np.log(np.diagonal(Lc, axis1=1, axis2=2)).sum(axis=1)
                total += -0.5 * (len(oc) * _LOG_2PI + logdet[:, None] + (sol**2).sum(axis=-1))
                if len(ok):
                    A = np.linalg.solve(Scc, Sigma[:, oc][:, :, ok]).transpose(0, 2, 1)  # (s, qk, qc)
                    shift = np.einsum("skc,snc->snk", A, resid)
                    V = V - A @ Sigma[:, oc][:, :, ok]
            if len(ok):
                a = lo[:, units][:, :, ok] - m[:, :, ok] - shift
                b = hi[:, units][:, :, ok] - m[:, :, ok] - shift
                R = _low_rank_root(V - cat.error_variance * np.eye(len(ok)))
                rank = R.shape[-1]
                if rank <= 1:
                    # one latent dimension (or none): Gauss-Hermite, error from the rule
                    # with half the nodes
                    est = np.stack([_latent_average(R, a, b, *_hermite(n), cat.link)
                                    for n in (GH_NODES, GH_NODES // 2)])
                elif cat.link == "probit" and rank == len(ok):
                    L = np.linalg.cholesky(V)
                    est = np.stack([_genz(L, a, b, u_all[r][:, :len(ok) - 1])
                                    for r in range(replicates)])
                else:  # fewer latent dimensions than entries, or the logit
                    est = np.stack([_latent_average(R, a, b, ndtri(u_rank[r][:, :rank]),
                                                    np.full(points, 1.0 / points), cat.link)
                                    for r in range(replicates)])
                if rank <= 1:
                    p = est[0]
                    err[sl, units] = np.abs(est[0] - est[1]) / np.maximum(p, 1e-300)
                    total += np.log(np.maximum(p, 1e-300))
                    out[sl, units] = total
                    continue
                p = est.mean(axis=0)
                total += np.log(np.maximum(p, 1e-300))
                if len(est) > 1:
                    err[sl, units] = est.std(axis=0, ddof=1) / np.sqrt(len(est)) / np.maximum(p, 1e-300)
            out[sl, units] = total
    return (out, err) if return_error else out


def treatment_conflict(panels: dict) -> str | None:
    """Why fits on these panels cannot be compared by LOO, if one treats a variable as
    categorical and another as continuous; None when they treat every variable alike.

    ``panels`` maps a fit's name to its panel. A categorical variable's term is a log
    probability (of a category), a continuous one's a log density (of a value on the
    variable's scale): the two are on different scales, and their difference says nothing
    about which model predicts better.
    """
    names = list(panels)
    first = getattr(panels[names[0]], "categories", None) or {}
    for name in names[1:]:
        other = getattr(panels[name], "categories", None) or {}
        for v in sorted(set(first) ^ set(other), key=str):
            cat_in, cont_in = (names[0], name) if v in first else (name, names[0])
            return (f"fits {cat_in!r} and {cont_in!r} treat {v!r} differently: as categorical in "
                    f"{cat_in!r} (its log-likelihood terms are log probabilities of categories) "
                    f"and as continuous in {cont_in!r} (log densities of values on the "
                    "variable's scale). The two are on different scales, so their LOO or WAIC "
                    "values cannot be compared; compare models that treat each variable the "
                    "same way.")
        for v in first:
            if tuple(first[v]) != tuple(other[v]):
                return (f"fits {names[0]!r} and {name!r} give {v!r} different categories "
                        f"({list(first[v])} and {list(other[v])}); the log probabilities of "
                        "different categories cannot be compared: use one coding.")
    return None
