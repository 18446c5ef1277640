"""One compiled log posterior for every model structure: numba kernels cached on disk.

The model structure is data here (docs/engine.md, "Compile once per machine"): the
functions below take the unconstrained parameter vector and two flat buffers, ``ints``
and ``floats``, that describe the structure (which entry of which model matrix each
parameter fills), the priors (families and hyperparameters), the covariance blocks and the
pattern cross-products. :mod:`bayeslong.infer.generic_logp` packs the buffers. Every
function is ``njit(cache=True)`` (or a ``cfunc(cache=True)``): numba compiles them once per
machine, stores the machine code in its on-disk cache, and every later process, structure,
option, data size and prior value reuses it.

Buffer layout (offsets are read from the header of ``ints``, slots ``H_*`` below):
matrices a, B, G, Psi, nu, Lam, Theta as index arrays (ints) and fixed parts (floats),
and the entries that are linear combinations of parameters (matrix, position, parameter,
coefficient: effects coding, approximate invariance; docs/engine.md, "Matrix form");
a table of scalar random variables (x position, parameter, family, target, transform)
with three hyperparameters each; a table of LKJ covariance blocks (x offset, q, family,
offset of the members' parameter indices) with each member's hyperparameters, the LKJ
shape and the normalising constant; the pooling terms of residual log-SDs (members, tau);
the pattern counts, cross-products and masks.

The log density is term for term that of :func:`bayeslong.infer.pymc_model.build_model`
at the same unconstrained point (PyMC's default transforms and their log-Jacobians
included); ``tests/infer/test_generic_logp.py`` holds the two to 1e-10 on every catalog
model.
"""

from __future__ import annotations

import math

import numba
import numpy as np
from numba import types
from numba.core import cgutils
from numba.extending import intrinsic

LOG_2PI = float(np.log(2.0 * np.pi))
_HALF_LOG_2PI = 0.5 * LOG_2PI
_HALF_LOG_2_OVER_PI = 0.5 * float(np.log(2.0 / np.pi))
_LOG2 = float(np.log(2.0))

# NumPy's error model: a division by zero or an overflow gives inf or nan (then -inf log
# density), never an exception, which a C callback could not pass on to the sampler
_njit = numba.njit(cache=True, error_model="numpy")

# header slots of ``ints`` (generic_logp._build_layout and Layout.buffers fill them)
H_NX, H_NPAR, H_L, H_Y, H_W, H_DEPTH, H_NSCALAR, H_NBLOCK, H_P = range(9)
H_IDX = 9        # 7 offsets of the matrices' index arrays in ints
H_FIX = 16       # 7 offsets of the matrices' fixed parts in floats
H_SCALAR = 23    # offset of the scalar table in ints (5 per row)
H_SCALAR_F = 24  # offset of the scalar hyperparameters in floats (3 per row)
H_BLOCK = 25     # offset of the block table in ints (BLOCK_ROW per row)
H_BLOCK_F = 26   # offset of the block floats (per block: eta, norm, 3 per member)
H_COUNTS = 27    # offsets in floats of counts (P), cross (P U U), masks (P Y)
H_CROSS = 28
H_MASKS = 29
H_NTERMS = 30    # number of linear-combination entries (Matrix.terms of model/structure.py)
H_TERMS = 31     # their table in ints (3 per row: matrix, flat position, parameter)
H_TERMS_F = 32   # their coefficients in floats
H_NPOOL = 33     # number of pooling terms of residual log-SDs (infer/pooling.py)
H_POOL = 34      # their table in ints (per term: number of members m, then m parameters)
H_POOL_F = 35    # their tau in floats (one per term)
HEADER_SIZE = 36
BLOCK_ROW = 6    # x offset, q, SD family, member table offset, SD transform, number of SDs

# family codes (generic_logp.FAMILY_CODES maps the names of priors.FAMILIES to these)
NORMAL, STUDENT_T, UNIFORM, HALFNORMAL, HALFSTUDENT_T, EXPONENTIAL, LOGNORMAL, GAMMA = range(8)
# transforms of a scalar random variable (PyMC's defaults for the family's support)
IDENTITY, LOG, INTERVAL = range(3)


@_njit
def family_logp(fam, v, a0, a1, a2):
    """Log density of a prior family at ``v`` and its derivative in ``v``.

    The densities with their normalising constants, as PyMC writes them (Normal, StudentT,
    Uniform, HalfNormal, HalfStudentT, Exponential with rate lam, LogNormal, Gamma with
    rate beta), so that the log posterior matches the PyMC model to rounding.
    """
    if fam == NORMAL:
        z = (v - a0) / a1
        return -0.5 * z * z - math.log(a1) - _HALF_LOG_2PI, -z / a1
    if fam == STUDENT_T:
        nu, mu, sig = a0, a1, a2
        z = (v - mu) / sig
        const = (math.lgamma(0.5 * (nu + 1.0)) - math.lgamma(0.5 * nu)
                 - 0.5 * math.log(nu * math.pi) - math.log(sig))
        return (const - 0.5 * (nu + 1.0) * math.log1p(z * z / nu),
                -(nu + 1.0) * z / (sig * (nu + z * z)))
    if fam == UNIFORM:
        if v < a0 or v > a1:
            return -np.inf, 0.0
        return -math.log(a1 - a0), 0.0
    if v < 0.0:  # the remaining families live on the positive half-line
        return -np.inf, 0.0
    if fam == HALFNORMAL:
        z = v / a0
        return _HALF_LOG_2_OVER_PI - math.log(a0) - 0.5 * z * z, -z / a0
    if fam == HALFSTUDENT_T:
        nu, sig = a0, a1
        z = v / sig
        const = (math.log(2.0) + math.lgamma(0.5 * (nu + 1.0)) - math.lgamma(0.5 * nu)
                 - 0.5 * math.log(nu * math.pi) - math.log(sig))
        return (const - 0.5 * (nu + 1.0) * math.log1p(z * z / nu),
                -(nu + 1.0) * z / (sig * (nu + z * z)))
    if fam == EXPONENTIAL:
        return math.log(a0) - a0 * v, -a0
    if fam == LOGNORMAL:
        lv = math.log(v)
        z = (lv - a0) / a1
        return -0.5 * z * z - math.log(a1) - _HALF_LOG_2PI - lv, (-z / a1 - 1.0) / v
    # GAMMA (alpha, rate beta)
    return (a0 * math.log(a1) - math.lgamma(a0) + (a0 - 1.0) * math.log(v) - a1 * v,
            (a0 - 1.0) / v - a1)


@_njit
def pattern_kernel(c, D, Sigma, counts, cross, masks):
    """Total pattern log-likelihood and its gradient in c (Y,), D (Y, W), Sigma (Y, Y).

    For pattern p with observed set o, A = [-c, -D, I], R_p = A_o M_p A_o' (docs/engine.md):
      ll_p = -n_p/2 (q log 2pi + log det S) - 1/2 tr(S^-1 R_p),  S = Sigma_oo = L L'
      dll/dSigma_oo = -n_p/2 S^-1 + 1/2 S^-1 R_p S^-1,   dll/dA_o = -S^-1 A_o M_p
    (Magnus & Neudecker 1999, ch. 15). A covariance that is not positive definite gives
    -inf and zero gradients.
    """
    Y = Sigma.shape[0]
    W = D.shape[1]
    U = 1 + W + Y
    P = counts.shape[0]
    A = np.zeros((Y, U))
    for i in range(Y):
        A[i, 0] = -c[i]
        for j in range(W):
            A[i, 1 + j] = -D[i, j]
        A[i, 1 + W + i] = 1.0
    gA = np.zeros((Y, U))
    gS = np.zeros((Y, Y))
    total = 0.0
    idx = np.empty(Y, np.int64)
    L = np.zeros((Y, Y))
    Li = np.zeros((Y, Y))
    for p in range(P):
        n_p = counts[p]
        q = 0
        for i in range(Y):
            if masks[p, i] > 0.5:
                idx[q] = i
                q += 1
        if n_p == 0.0 or q == 0:
            continue
        for j in range(q):  # Cholesky of Sigma_oo
            s = Sigma[idx[j], idx[j]]
            for k in range(j):
                s -= L[j, k] * L[j, k]
            if not (s > 1e-200) or not np.isfinite(s):
                return -np.inf, np.zeros(Y), np.zeros((Y, W)), np.zeros((Y, Y))
            L[j, j] = np.sqrt(s)
            for i in range(j + 1, q):
                t = Sigma[idx[i], idx[j]]
                for k in range(j):
                    t -= L[i, k] * L[j, k]
                L[i, j] = t / L[j, j]
        logdet = 0.0
        for j in range(q):  # L^-1 by forward substitution
            logdet += 2.0 * np.log(L[j, j])
            Li[j, j] = 1.0 / L[j, j]
            for i in range(j + 1, q):
                t = 0.0
                for k in range(j, i):
                    t -= L[i, k] * Li[k, j]
                Li[i, j] = t / L[i, i]
        Sinv = np.zeros((q, q))
        for i in range(q):
            for j in range(i + 1):
                t = 0.0
                for k in range(i, q):
                    t += Li[k, i] * Li[k, j]
                Sinv[i, j] = t
                Sinv[j, i] = t
        Ao = np.empty((q, U))
        for i in range(q):
            Ao[i] = A[idx[i]]
        AoM = Ao @ np.ascontiguousarray(cross[p])
        R = AoM @ Ao.T
        SR = Sinv @ R
        tr = 0.0
        for i in range(q):
            tr += SR[i, i]
        total += -0.5 * n_p * (q * LOG_2PI + logdet) - 0.5 * tr
        G = 0.5 * (SR @ Sinv) - 0.5 * n_p * Sinv
        gAo = -(Sinv @ AoM)
        for i in range(q):
            for j in range(q):
                gS[idx[i], idx[j]] += G[i, j]
            for j in range(U):
                gA[idx[i], j] += gAo[i, j]
    if not np.isfinite(total):
        return -np.inf, np.zeros(Y), np.zeros((Y, W)), np.zeros((Y, Y))
    return total, -gA[:, 0].copy(), -np.ascontiguousarray(gA[:, 1:1 + W]), gS


@_njit
def _fill(ints, floats, which, rows, cols, theta):
    # model matrix ``which`` (0 a, 1 B, 2 G, 3 Psi, 4 nu, 5 Lam, 6 Theta): fixed + theta[index],
    # plus coef * theta[k] at the linear-combination entries of that matrix
    io = ints[H_IDX + which]
    fo = ints[H_FIX + which]
    out = np.empty((rows, cols))
    for i in range(rows):
        for j in range(cols):
            k = ints[io + i * cols + j]
            v = floats[fo + i * cols + j]
            out[i, j] = v + theta[k] if k >= 0 else v
    to, tf = ints[H_TERMS], ints[H_TERMS_F]
    for n in range(ints[H_NTERMS]):
        if ints[to + 3 * n] == which:
            pos = ints[to + 3 * n + 1]
            out[pos // cols, pos % cols] += floats[tf + n] * theta[ints[to + 3 * n + 2]]
    return out


@_njit
def _scatter(ints, floats, which, rows, cols, g, gtheta):
    # dL/dtheta_k += sum of dL/dM_ij over the entries that parameter k fills (times its
    # coefficient at a linear-combination entry)
    io = ints[H_IDX + which]
    for i in range(rows):
        for j in range(cols):
            k = ints[io + i * cols + j]
            if k >= 0:
                gtheta[k] += g[i, j]
    to, tf = ints[H_TERMS], ints[H_TERMS_F]
    for n in range(ints[H_NTERMS]):
        if ints[to + 3 * n] == which:
            pos = ints[to + 3 * n + 1]
            gtheta[ints[to + 3 * n + 2]] += floats[tf + n] * g[pos // cols, pos % cols]


@_njit
def _scalar_value(tr, x, lo, hi):
    # PyMC's default transforms: value, d value / dx, log-Jacobian and its derivative
    if tr == IDENTITY:
        return x, 1.0, 0.0, 0.0
    if tr == LOG:
        v = math.exp(x)
        return v, v, x, 1.0
    # INTERVAL (lower, upper): v = lower + (upper - lower) sigmoid(x)
    s = 1.0 / (1.0 + math.exp(-x)) if x >= 0 else math.exp(x) / (1.0 + math.exp(x))
    sp = math.log1p(math.exp(-abs(x))) + max(-x, 0.0)  # softplus(-x)
    return (s * hi + (1.0 - s) * lo, (hi - lo) * s * (1.0 - s),
            math.log(hi - lo) - 2.0 * sp - x, 1.0 - 2.0 * s)


@_njit
def natural(x, ints, floats):
    """The parameter vector theta (structure.names order) at the unconstrained point x."""
    theta = np.zeros(ints[H_NPAR])
    so, sf = ints[H_SCALAR], ints[H_SCALAR_F]
    for j in range(ints[H_NSCALAR]):
        xp, k = ints[so + 5 * j], ints[so + 5 * j + 1]
        target, tr = ints[so + 5 * j + 3], ints[so + 5 * j + 4]
        v = _scalar_value(tr, x[xp], floats[sf + 3 * j], floats[sf + 3 * j + 1])[0]
        theta[k] = v * v if target == 1 else v
    bo, fpos = ints[H_BLOCK], ints[H_BLOCK_F]
    for b in range(ints[H_NBLOCK]):
        off, q = ints[bo + BLOCK_ROW * b], ints[bo + BLOCK_ROW * b + 1]
        sd, L = _block_parts(x, off, q, ints[bo + BLOCK_ROW * b + 4], floats, fpos,
                             ints[bo + BLOCK_ROW * b + 5])
        _block_put(ints, ints[bo + BLOCK_ROW * b + 3], q, _block_cov(sd, L), theta)
        fpos += 2 + 3 * q
    return theta


@_njit
def _log1m_tanh2(y):
    # log(1 - tanh(y)^2) = 2 (log 2 - |y| - log1p(exp(-2 |y|))), exact for large |y|
    a = abs(y)
    return 2.0 * (_LOG2 - a - math.log1p(math.exp(-2.0 * a)))


@_njit
def _block_parts(x, off, q, tr, floats, fpos, nsd):
    """The SDs and the Cholesky factor L of the correlation matrix of a covariance block.

    x[off:off + nsd] are the SDs on their transform's scale (nsd = q, or 1 when the block's
    variances are one parameter, as strict invariance makes them; docs/priors.md);
    x[off + nsd:] the canonical
    partial correlations z = tanh(y), row by row of the strict lower triangle:
    L_rc = z_rc sqrt(1 - sum_{k<c} L_rk^2), L_rr = sqrt(1 - sum_{k<r} L_rk^2)
    (Lewandowski, Kurowicka & Joe 2009; docs/engine.md).
    """
    sd = np.empty(q)
    for r in range(q):
        h = fpos + 2 + 3 * r
        sd[r] = _scalar_value(tr, x[off + (r if nsd == q else 0)], floats[h], floats[h + 1])[0]
    L = np.zeros((q, q))
    L[0, 0] = 1.0
    pos = off + nsd
    for r in range(1, q):
        rest = 1.0
        for c in range(r):
            z = math.tanh(x[pos])
            L[r, c] = z * math.sqrt(rest)
            rest *= 1.0 - z * z
            pos += 1
        L[r, r] = math.sqrt(rest)
    return sd, L


@_njit
def _block_cov(sd, L):
    # diag(sd) L L' diag(sd)
    C = L @ L.T
    q = len(sd)
    for r in range(q):
        for c in range(q):
            C[r, c] *= sd[r] * sd[c]
    return C


@_njit
def _block_put(ints, mo, q, S, theta):
    # block member table at ints[mo:]: q diagonal parameters, then the q x q index matrix
    for r in range(q):
        for c in range(r + 1):
            theta[ints[mo + q + r * q + c]] = S[r, c]


@_njit
def logp_grad(x, ints, floats):
    """Log posterior density at the unconstrained point ``x`` and its gradient.

    log p = sum of the priors (with the log-Jacobians of PyMC's transforms) + the pooling
    of residual log-SDs + the pattern log-likelihood at the implied moments. The gradient is analytic: the likelihood's
    derivatives in (c, D, Sigma) (:func:`pattern_kernel`) are chained to the model matrices
    by matrix calculus (Magnus & Neudecker 1999), with T = (I - B)^-1, Phi = T Psi T':

        c = nu + Lam T a:   dnu = gc, dLam += gc (T a)', da = T' Lam' gc, dT += (Lam' gc) a'
        D = Lam T G:        dLam += gD (T G)',  dG = T' Lam' gD,  dT += (Lam' gD) G'
        Sigma = Lam Phi Lam' + Theta:  dTheta = gS, dLam += 2 gS Lam Phi,
                            dPhi = Lam' gS Lam, dPsi = T' dPhi T, dT += 2 dPhi T Psi
        T = (I - B)^-1:     dB = T' dT T'

    then scattered to theta by the index arrays and through the transforms to x.
    """
    n_x, n_par, nL, nY, nW = ints[H_NX], ints[H_NPAR], ints[H_L], ints[H_Y], ints[H_W]
    grad = np.zeros(n_x)
    theta = np.zeros(n_par)
    lp = 0.0
    # --- scalar random variables: value and sd priors ---------------------------------
    so, sf = ints[H_SCALAR], ints[H_SCALAR_F]
    ns = ints[H_NSCALAR]
    dv = np.empty(ns)  # d value / dx, kept for the chain rule
    vals = np.empty(ns)
    for j in range(ns):
        xp, k, fam = ints[so + 5 * j], ints[so + 5 * j + 1], ints[so + 5 * j + 2]
        target, tr = ints[so + 5 * j + 3], ints[so + 5 * j + 4]
        a0, a1, a2 = floats[sf + 3 * j], floats[sf + 3 * j + 1], floats[sf + 3 * j + 2]
        v, dvdx, logjac, dlogjac = _scalar_value(tr, x[xp], a0, a1)
        prior, dprior = family_logp(fam, v, a0, a1, a2)
        lp += prior + logjac
        grad[xp] += dprior * dvdx + dlogjac
        dv[j], vals[j] = dvdx, v
        theta[k] = v * v if target == 1 else v
    # --- covariance blocks: SDs times an LKJ correlation matrix ---------------------------
    bo, bf = ints[H_BLOCK], ints[H_BLOCK_F]
    nb = ints[H_NBLOCK]
    fpos = bf
    for b in range(nb):
        off, q, fam = ints[bo + BLOCK_ROW * b], ints[bo + BLOCK_ROW * b + 1], ints[bo + BLOCK_ROW * b + 2]
        mo, tr = ints[bo + BLOCK_ROW * b + 3], ints[bo + BLOCK_ROW * b + 4]
        nsd = ints[bo + BLOCK_ROW * b + 5]
        eta, norm = floats[fpos], floats[fpos + 1]
        sd, L = _block_parts(x, off, q, tr, floats, fpos, nsd)
        _block_put(ints, mo, q, _block_cov(sd, L), theta)
        lp += norm
        for r in range(nsd):  # each SD's prior, on its transform's scale
            h = fpos + 2 + 3 * r
            v, dvdx, logjac, dlogjac = _scalar_value(tr, x[off + r], floats[h], floats[h + 1])
            prior, dprior = family_logp(fam, v, floats[h], floats[h + 1], floats[h + 2])
            lp += prior + logjac
            grad[off + r] += dprior * dvdx + dlogjac
        # LKJ(eta) on the correlation matrix with the Jacobian of the canonical partial
        # correlations z = tanh(y): sum over z_rc of (eta + (q - c - 2) / 2) log(1 - z_rc^2),
        # whose derivative in y_rc is -2 (eta + (q - c - 2) / 2) z_rc (docs/engine.md)
        pos = off + nsd
        for r in range(1, q):
            for c in range(r):
                coef = eta + 0.5 * (q - c - 2.0)
                lp += coef * _log1m_tanh2(x[pos])
                grad[pos] += -2.0 * coef * math.tanh(x[pos])
                pos += 1
        fpos += 2 + 3 * q
    # --- residual log-SDs pooled over waves: -1/2 sum_t (l_t - mean l)^2 / tau^2 with
    # l_t = log(theta_k) / 2 (infer/pooling.py); d/dtheta_k = -(l_k - mean l) / (2 tau^2 theta_k)
    # (the deviations sum to zero, so the mean's own derivative drops out)
    gtheta = np.zeros(n_par)
    po = ints[H_POOL]
    for g in range(ints[H_NPOOL]):
        m = ints[po]
        tau2 = floats[ints[H_POOL_F] + g] ** 2
        mean = 0.0
        for j in range(m):
            v = theta[ints[po + 1 + j]]
            if not v > 0.0:
                return -np.inf, np.zeros(n_x)
            mean += 0.5 * math.log(v)
        mean /= m
        for j in range(m):
            k = ints[po + 1 + j]
            d = 0.5 * math.log(theta[k]) - mean
            lp += -0.5 * d * d / tau2
            gtheta[k] += -d / (2.0 * tau2 * theta[k])
        po += 1 + m
    if not np.isfinite(lp):
        return -np.inf, np.zeros(n_x)
    # --- likelihood at the implied moments ------------------------------------------------
    a = _fill(ints, floats, 0, nL, 1, theta)
    B = _fill(ints, floats, 1, nL, nL, theta)
    G = _fill(ints, floats, 2, nL, nW, theta)
    Psi = _fill(ints, floats, 3, nL, nL, theta)
    nu = _fill(ints, floats, 4, nY, 1, theta)
    Lam = _fill(ints, floats, 5, nY, nL, theta)
    Theta = _fill(ints, floats, 6, nY, nY, theta)
    # T = (I - B)^-1 = I + B + ... + B^(depth-1): B is nilpotent (docs/engine.md)
    T = np.eye(nL)
    power = np.eye(nL)
    for _ in range(ints[H_DEPTH] - 1):
        power = power @ B
        T += power
    Ta = T @ a
    TG = T @ G
    TPsi = T @ Psi
    Phi = TPsi @ T.T
    LamPhi = Lam @ Phi
    c = (nu + Lam @ Ta)[:, 0]
    D = Lam @ TG
    Sigma = LamPhi @ Lam.T + Theta
    Sigma = 0.5 * (Sigma + Sigma.T)
    P = ints[H_P]
    U = 1 + nW + nY
    co, cr, ma = ints[H_COUNTS], ints[H_CROSS], ints[H_MASKS]
    counts = floats[co:co + P]
    cross = floats[cr:cr + P * U * U].reshape((P, U, U))
    masks = floats[ma:ma + P * nY].reshape((P, nY))
    ll, gc, gD, gS = pattern_kernel(c, D, Sigma, counts, cross, masks)
    if not np.isfinite(ll):
        return -np.inf, np.zeros(n_x)
    lp += ll
    # --- chain rule to the matrices ---------------------------------------------------------
    gc2 = gc.reshape((nY, 1))
    v = Lam.T @ gc2                       # (L, 1)
    gLam = gc2 @ Ta.T + gD @ TG.T + 2.0 * (gS @ LamPhi)
    ga = T.T @ v
    LgD = Lam.T @ gD                      # (L, W)
    gG = T.T @ LgD
    gPhi = Lam.T @ gS @ Lam
    gPsi = T.T @ gPhi @ T
    gT = v @ a.T + LgD @ G.T + 2.0 * (gPhi @ TPsi)
    gB = T.T @ gT @ T.T
    _scatter(ints, floats, 0, nL, 1, ga, gtheta)
    _scatter(ints, floats, 1, nL, nL, gB, gtheta)
    _scatter(ints, floats, 2, nL, nW, gG, gtheta)
    _scatter(ints, floats, 3, nL, nL, gPsi, gtheta)
    _scatter(ints, floats, 4, nY, 1, gc2, gtheta)
    _scatter(ints, floats, 5, nY, nL, gLam, gtheta)
    _scatter(ints, floats, 6, nY, nY, gS, gtheta)
    # --- through the parameterisation to x ----------------------------------------------------
    for j in range(ns):
        xp, k, target = ints[so + 5 * j], ints[so + 5 * j + 1], ints[so + 5 * j + 3]
        g = gtheta[k] * (2.0 * vals[j] if target == 1 else 1.0)
        grad[xp] += g * dv[j]
    fpos = bf
    for b in range(nb):
        off, q = ints[bo + BLOCK_ROW * b], ints[bo + BLOCK_ROW * b + 1]
        mo, tr = ints[bo + BLOCK_ROW * b + 3], ints[bo + BLOCK_ROW * b + 4]
        nsd = ints[bo + BLOCK_ROW * b + 5]
        sd, L = _block_parts(x, off, q, tr, floats, fpos, nsd)
        # Sigma = M M' with M = diag(sd) L; a covariance fills two entries, so half its
        # gradient on each, and a variance shared by the whole diagonal (one SD) fills q
        share = 1.0 / q if nsd == 1 else 1.0
        Gs = np.empty((q, q))
        for r in range(q):
            for cc in range(q):
                g = gtheta[ints[mo + q + r * q + cc]]
                Gs[r, cc] = share * g if r == cc else 0.5 * g
        M = np.empty((q, q))
        for r in range(q):
            for cc in range(q):
                M[r, cc] = sd[r] * L[r, cc]
        gM = 2.0 * (Gs @ M)
        for r in range(q):  # SDs, through their transform (one shared SD gathers all)
            h = fpos + 2 + 3 * r
            xr = off + (r if nsd == q else 0)
            dvdx = _scalar_value(tr, x[xr], floats[h], floats[h + 1])[1]
            gsd = 0.0
            for cc in range(r + 1):
                gsd += gM[r, cc] * L[r, cc]
            grad[xr] += gsd * dvdx
        # row r of L: L_rc = z_rc w_c (c < r), L_rr = w_r, w_c = prod_{k<c} sqrt(1 - z_rk^2);
        # d/dy_rc = gL_rc w_c (1 - z_rc^2) - z_rc sum_{k=c+1..r} gL_rk L_rk
        pos = off + nsd
        for r in range(1, q):
            w = 1.0
            for c in range(r):
                z = math.tanh(x[pos])
                tail = 0.0
                for k in range(c + 1, r + 1):
                    tail += sd[r] * gM[r, k] * L[r, k]
                grad[pos] += sd[r] * gM[r, c] * w * (1.0 - z * z) - z * tail
                w *= math.sqrt(1.0 - z * z)
                pos += 1
        fpos += 2 + 3 * q
    for i in range(n_x):
        if not np.isfinite(grad[i]):
            return -np.inf, np.zeros(n_x)
    return lp, grad


@_njit
def logp_only(x, ints, floats):
    return logp_grad(x, ints, floats)[0]


# --- C callbacks for nutpie: pointers to the two buffers arrive as user data ---------------
@intrinsic
def _as_pointer(typingctx, src):
    # an integer address as a void pointer (the buffers live in NumPy arrays the caller keeps)
    sig = types.voidptr(src)

    def codegen(cgctx, builder, sig, args):
        return builder.inttoptr(args[0], cgutils.voidptr_t)

    return sig, codegen


@_njit
def _buffers(user_data_):
    ud = numba.carray(user_data_, (4,), np.uint64)
    ints = numba.carray(_as_pointer(ud[0]), (int(ud[1]),), np.int64)
    floats = numba.carray(_as_pointer(ud[2]), (int(ud[3]),), np.float64)
    return ints, floats


_LOGP_SIG = types.int64(types.uint64, types.CPointer(types.double), types.CPointer(types.double),
                        types.CPointer(types.double), types.voidptr)
_EXPAND_SIG = types.int64(types.uint64, types.uint64, types.CPointer(types.double),
                          types.CPointer(types.double), types.voidptr)


@numba.cfunc(_LOGP_SIG, cache=True, error_model="numpy")
def logp_cfunc(dim, x_, out_, logp_, user_data_):
    """nutpie's log-density callback (return codes as nutpie's own: 3, 4 non-finite)."""
    ints, floats = _buffers(user_data_)
    if dim != ints[H_NX]:
        return -1
    x = numba.carray(x_, (dim,))
    out = numba.carray(out_, (dim,))
    logp = numba.carray(logp_, (1,))
    try:  # nothing may escape a C callback; nutpie reads a non-zero code as a failed step
        value, grad = logp_grad(x, ints, floats)
    except Exception:  # noqa: BLE001
        return 1
    logp[0] = value
    out[:] = grad
    if not np.isfinite(value):
        return 4
    return 0


@numba.cfunc(_EXPAND_SIG, cache=True, error_model="numpy")
def expand_cfunc(dim, expanded, x_, out_, user_data_):
    """nutpie's draw callback: the unconstrained point -> theta in structure.names order."""
    ints, floats = _buffers(user_data_)
    if dim != ints[H_NX] or expanded != ints[H_NPAR]:
        return -1
    x = numba.carray(x_, (dim,))
    out = numba.carray(out_, (expanded,))
    out[:] = natural(x, ints, floats)
    return 0
