"""Implied moments against closed forms worked by hand."""

import numpy as np
import pytest

import bayeslong as bl
from bayeslong.model.moments import moments_at
from bayeslong.model.structure import Block, Matrix, Structure, build_structure


def _theta(structure, **values):
    theta = np.zeros(structure.n_params)
    for name, v in values.items():
        theta[structure.position(name)] = v
    return theta


def test_linear_growth_covariance_closed_form():
    # Closed form of the linear latent growth curve with time scores t = 0..T-1
    # (worked by hand from y_t = level + t slope + e_t):
    #   E(y_t) = level_mean + t slope_mean
    #   Var(y_t) = level_var + 2 t level_slope_cov + t^2 slope_var + resid_var
    #   Cov(y_s, y_t) = level_var + (s + t) level_slope_cov + s t slope_var   (s != t)
    T = 5
    s = build_structure(bl.model("linear-growth"), outcomes=["y"], n_waves=T)
    th = _theta(s, level_mean=10.0, slope_mean=2.0, level_var=4.0, level_slope_cov=0.5,
                slope_var=0.3, resid_var=1.5)
    c, D, Sigma = moments_at(s, th)
    t = np.arange(T, dtype=float)
    expected = 4.0 + np.add.outer(t, t) * 0.5 + np.outer(t, t) * 0.3 + np.eye(T) * 1.5
    np.testing.assert_allclose(c, 10.0 + 2.0 * t)
    np.testing.assert_allclose(Sigma, expected, rtol=1e-12)
    assert D.shape == (T, 0)


def test_ar1_stationary_closed_form():
    # AR(1) with predetermined first wave: y_1 ~ N(m1, v1); y_t = a + r y_(t-1) + e_t.
    # By hand: Var(y_t) = r^2 Var(y_(t-1)) + s2, Cov(y_t, y_(t+h)) = r^h Var(y_t),
    # E(y_t) = a + r E(y_(t-1)).
    T, r, a, s2, m1, v1 = 4, 0.6, 2.0, 1.0, 5.0, 3.0
    s = build_structure(bl.model("ar"), outcomes=["y"], n_waves=T)
    c, _, Sigma = moments_at(s, _theta(s, intercept=a, lag=r, resid_var=s2, initial_mean=m1,
                                        initial_var=v1))
    mean, var = [m1], [v1]
    for _ in range(T - 1):
        mean.append(a + r * mean[-1])
        var.append(r * r * var[-1] + s2)
    expected = np.array([[var[min(i, j)] * r ** abs(i - j) for j in range(T)] for i in range(T)])
    np.testing.assert_allclose(c, mean)
    np.testing.assert_allclose(Sigma, expected, rtol=1e-12)


def test_covariate_slopes_and_factor_on_z():
    # Random effects with one x and one z: y_t = level + b x_t + e_t, level = m + g z + u.
    # By hand: D[y_t, x_s] = b 1(s = t); D[y_t, z] = g.
    T = 3
    spec = bl.model("random-effects")
    s = build_structure(spec, outcomes=["y"], n_waves=T, time_varying=["x"], time_invariant=["z"])
    _, D, _ = moments_at(s, _theta(s, **{"effect[x]": 0.7, "level_effect[z]": -0.4,
                                         "level_var": 1.0, "resid_var": 1.0}))
    np.testing.assert_allclose(D, np.hstack([0.7 * np.eye(T), np.full((T, 1), -0.4)]))


def test_ri_clpm_within_form():
    # RI-CLPM, two processes, T = 3 (Hamaker, Kuiper & Grasman 2015, Psychological Methods
    # 20(1), eqs. 1-3): y_t = mu_t + kappa + w_t, w_t = R w_(t-1) + zeta_t, kappa independent
    # of w_1. By hand: Cov(y) = Cov(kappa) (x) 1 1' + Cov(w) with Cov(w_t) = R Cov(w_(t-1)) R' + Q.
    T = 3
    s = build_structure(bl.model("ri-clpm", residuals="equal"), outcomes=["a", "b"], n_waves=T)
    R = np.array([[0.5, 0.2], [0.1, 0.4]])
    K = np.array([[2.0, 0.5], [0.5, 1.0]])
    W1 = np.array([[1.0, 0.3], [0.3, 1.5]])
    Q = np.array([[0.8, 0.1], [0.1, 0.6]])
    names = {"lag[a<-a]": R[0, 0], "lag[a<-b]": R[0, 1], "lag[b<-a]": R[1, 0], "lag[b<-b]": R[1, 1],
             "level_var[a]": K[0, 0], "level_cov[a,b]": K[0, 1], "level_var[b]": K[1, 1],
             "initial_var[a]": W1[0, 0], "initial_cov[a,b]": W1[0, 1], "initial_var[b]": W1[1, 1],
             "resid_var[a]": Q[0, 0], "resid_cov[a,b]": Q[0, 1], "resid_var[b]": Q[1, 1]}
    _, _, Sigma = moments_at(s, _theta(s, **names))
    # stack w over waves: Cov(w_t, w_s) = R^(t-s) Cov(w_s) for t >= s
    covw = [W1]
    for _ in range(T - 1):
        covw.append(R @ covw[-1] @ R.T + Q)
    full = np.zeros((2 * T, 2 * T))  # order (wave, process) here
    for t in range(T):
        for u in range(t + 1):
            block = np.linalg.matrix_power(R, t - u) @ covw[u]
            full[2 * t:2 * t + 2, 2 * u:2 * u + 2] = block
            full[2 * u:2 * u + 2, 2 * t:2 * t + 2] = block.T
    full += np.kron(np.ones((T, T)), K)
    order = [2 * t + k for k in range(2) for t in range(T)]  # to process-major, as the engine
    np.testing.assert_allclose(Sigma, full[np.ix_(order, order)], rtol=1e-12)


def test_two_indicators_per_wave_hand_worked():
    # One factor measured by two indicators at each of 2 waves, no growth (hand-made
    # structure): eta_1 ~ N(0, phi), eta_2 = r eta_1 + zeta (psi); y_j,t = nu_j + lam_j eta_t + e_j,t.
    # By hand: Var(eta_2) = r^2 phi + psi; Cov(y_j1, y_k2) = lam_j lam_k r phi;
    # Var(y_jt) = lam_j^2 Var(eta_t) + theta_j; E(y_jt) = nu_j.
    lam2, nu2, r, phi, psi, th1, th2 = 0.8, 3.0, 0.5, 2.0, 1.0, 0.4, 0.6
    names = ("nu2", "lam2", "r", "phi", "psi", "th1", "th2")
    theta = np.array([nu2, lam2, r, phi, psi, th1, th2])
    M = {k: Matrix.zeros(*shape) for k, shape in
         {"a": (2,), "B": (2, 2), "G": (2, 0), "Psi": (2, 2), "nu": (4,), "Lam": (4, 2),
          "Theta": (4, 4)}.items()}
    # observed order: (y1,t1), (y2,t1), (y1,t2), (y2,t2)
    M["Lam"].fixed[0, 0] = M["Lam"].fixed[2, 1] = 1.0   # marker indicator
    M["Lam"].index[1, 0] = M["Lam"].index[3, 1] = 1     # lam2, equal over waves
    M["nu"].index[1] = M["nu"].index[3] = 0              # nu2
    M["B"].index[1, 0] = 2
    M["Psi"].index[0, 0], M["Psi"].index[1, 1] = 3, 4
    for i, k in enumerate([5, 6, 5, 6]):
        M["Theta"].index[i, i] = k
    s = Structure(spec=bl.model("ar"), names=names, kinds=("intercept", "loading", "lag", "var",
                  "var", "var", "var"), latents=("eta1", "eta2"),
                  observed=("y1[1]", "y2[1]", "y1[2]", "y2[2]"), covariates=(), matrices=M,
                  blocks=tuple(Block(np.array([[i]])) for i in (3, 4, 5, 6)), n_waves=2,
                  outcomes=("y",))
    c, _, Sigma = moments_at(s, theta)
    lam = np.array([1.0, lam2])
    v1, v2 = phi, r * r * phi + psi
    expected = np.block([[np.outer(lam, lam) * v1, np.outer(lam, lam) * r * phi],
                         [np.outer(lam, lam) * r * phi, np.outer(lam, lam) * v2]])
    expected += np.diag([th1, th2, th1, th2])
    np.testing.assert_allclose(c, [0.0, nu2, 0.0, nu2])
    np.testing.assert_allclose(Sigma, expected, rtol=1e-12)


@pytest.mark.parametrize("initial", ["predetermined", "endogenous"])
def test_alt_first_wave_forms_are_valid_covariances(initial):
    s = build_structure(bl.model("alt", initial=initial), outcomes=["y"], n_waves=6)
    th = np.zeros(s.n_params)
    for i, k in enumerate(s.kinds):
        th[i] = 1.0 if k == "var" else 0.0
    th[s.position("lag")] = 0.4
    _, _, Sigma = moments_at(s, th)
    assert np.linalg.eigvalsh(Sigma).min() > 0
    # the endogenous first wave loads on the growth factors; the predetermined one does not
    row = s.matrices["B"].index[s.latents.index("eta[1]"), :2]
    assert ((row >= 0).all() if initial == "endogenous" else (row < 0).all())
