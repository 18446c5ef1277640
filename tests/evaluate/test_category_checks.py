"""Predictive checks of categorical variables: shares per wave and wave-to-wave transitions.

Expected values: counts made by hand on a tiny panel (written out beside each), and the
probabilities of the random-intercept ordered probit and logit (Butler & Moffitt 1982,
Econometrica 50(3), 761-764) computed with scipy: the category probabilities
Phi((tau_c - m) / sqrt(v + 1)) and the bivariate normal rectangle probabilities of two
waves (scipy.stats.multivariate_normal.cdf), or for the logit scipy.integrate.quad over the
random intercept.
"""

from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest
from scipy import integrate, stats
from scipy.special import expit

import bayeslong as bl
from bayeslong.evaluate.category_checks import (
    category_ppc,
    category_shares,
    replicate_categories,
    transition_counts,
)
from bayeslong.model.thresholds import categorical_structure


def _tiny_panel():
    # 5 units x 3 waves, ratings "low" < "mid" < "high"; unit 5 misses wave 2
    rows = {1: ["low", "mid", "mid"], 2: ["low", "low", "high"], 3: ["mid", "mid", "mid"],
            4: ["high", "mid", "low"], 5: ["low", None, "high"]}
    df = pd.DataFrame([{"id": i, "wave": t + 1, "r": v} for i, vs in rows.items()
                       for t, v in enumerate(vs)])
    return bl.Panel.from_long(df, unit="id", wave="wave", outcomes=["r"],
                              categorical={"r": ["low", "mid", "high"]})


def test_shares_and_transitions_match_hand_counts():
    panel = _tiny_panel()
    y = panel.y[:, :, 0]
    shares = category_shares(y, 3)
    # wave 1: low 3 (units 1, 2, 5), mid 1 (3), high 1 (4) of 5 observed
    # wave 2: low 1 (2), mid 3 (1, 3, 4), high 0 of 4 observed (unit 5 missing)
    # wave 3: low 1 (4), mid 2 (1, 3), high 2 (2, 5) of 5
    np.testing.assert_allclose(shares, [[3 / 5, 1 / 5, 1 / 5], [1 / 4, 3 / 4, 0.0],
                                        [1 / 5, 2 / 5, 2 / 5]])
    moves = transition_counts(y, 3)
    # waves 1 -> 2, units 1-4: low->mid (1), low->low (2), mid->mid (3), high->mid (4)
    np.testing.assert_array_equal(moves[0], [[1, 1, 0], [0, 1, 0], [0, 1, 0]])
    # waves 2 -> 3, units 1-4: mid->mid (1, 3), low->high (2), mid->low (4)
    np.testing.assert_array_equal(moves[1], [[0, 0, 1], [1, 2, 0], [0, 0, 0]])


def _fake_fit(spec, panel, theta: dict, tau: dict, n_draws: int):
    """A fit whose every posterior draw is the same parameter vector (no sampling)."""
    cat = categorical_structure(spec, panel)
    vec = np.array([cat.pinned.get(n, theta.get(n, 0.0)) for n in cat.structure.names])
    thr = np.array([tau[n] for n in cat.thresholds])
    return SimpleNamespace(spec=spec, panel=panel, categorical=cat, structure=cat.structure,
                           theta_draws=lambda: np.tile(vec, (n_draws, 1)),
                           threshold_draws=lambda: np.tile(thr, (n_draws, 1)))


@pytest.mark.parametrize("link", ["probit", "logit"])
def test_replicated_shares_and_transitions_match_the_random_intercept_model(link):
    spec = bl.model("random-effects", link=link)
    m, v, tau2 = 0.3, 0.8, 1.1
    sim = bl.simulate(spec, {"level_mean": m, "level_var": v, "threshold[y,2]": tau2}, 60, 3,
                      seed=3, categorical={"y": 3})
    panel = bl.Panel.from_long(sim, unit="unit", wave="wave", outcomes=["y"],
                               categorical={"y": "ordinal"})
    fit = _fake_fit(spec, panel, {"level_mean": m, "level_var": v}, {"threshold[y,2]": tau2}, 3000)
    rep = replicate_categories(fit, draws=3000, seed=1)
    assert rep.shape == (3000, 60, 3, 1)
    shares = category_shares(rep[..., 0], 3).mean(axis=0)  # (T, C), 180000 draws per wave
    moves = transition_counts(rep[..., 0], 3).mean(axis=0) / 60  # (T-1, C, C) probabilities
    cuts = np.array([-np.inf, 0.0, tau2, np.inf])
    if link == "probit":
        # y* = level + eps, level ~ N(m, v), eps ~ N(0, 1): y* ~ N(m, v + 1) and two waves
        # share the level: correlation v / (v + 1)
        sd = np.sqrt(v + 1.0)
        p = np.diff(stats.norm.cdf((cuts - m) / sd))
        biv = stats.multivariate_normal([m, m], [[v + 1, v], [v, v + 1]])

        def box(a, b):  # P(cuts[a] < y1 <= cuts[a+1], cuts[b] < y2 <= cuts[b+1])
            lo = np.clip([cuts[a], cuts[b]], -50, 50)
            hi = np.clip([cuts[a + 1], cuts[b + 1]], -50, 50)
            return (biv.cdf(hi) - biv.cdf([lo[0], hi[1]]) - biv.cdf([hi[0], lo[1]])
                    + biv.cdf(lo))
    else:
        # logistic eps: P(y = c | level) = expit(cut_c - level) - expit(cut_{c-1} - level),
        # averaged over level ~ N(m, v) by scipy's adaptive quadrature
        def given(c, x):
            return expit(cuts[c + 1] - x) - expit(cuts[c] - x)

        dens = stats.norm(m, np.sqrt(v)).pdf
        p = np.array([integrate.quad(lambda x: given(c, x) * dens(x), -np.inf, np.inf)[0]
                      for c in range(3)])

        def box(a, b):
            return integrate.quad(lambda x: given(a, x) * given(b, x) * dens(x),
                                  -np.inf, np.inf)[0]
    expected = np.array([[box(a, b) for b in range(3)] for a in range(3)])
    # Monte Carlo: 180000 replicated entries per wave, SE of a share <= 0.0012; 0.006 is 5 SE
    np.testing.assert_allclose(shares, np.tile(p, (3, 1)), atol=0.006)
    for t in range(2):
        np.testing.assert_allclose(moves[t], expected, atol=0.006)


def test_category_ppc_tables_label_categories_and_keep_missing_entries():
    panel = _tiny_panel()
    spec = bl.model("random-effects")
    fit = _fake_fit(spec, panel, {"level_mean": 0.2, "level_var": 0.5},
                    {"threshold[r,2]": 1.0}, 50)
    fit.spec = spec
    out = category_ppc(fit, draws=40, seed=2)
    shares, moves = out["shares"], out["transitions"]
    assert len(shares) == 3 * 3 and len(moves) == 2 * 3 * 3
    row = shares[(shares["wave"] == 2) & (shares["category"] == "mid")].iloc[0]
    assert row["observed"] == pytest.approx(3 / 4)  # hand count above
    assert row["rep_q05"] <= row["rep_mean"] <= row["rep_q95"]
    # replicates keep the data's missing entry: 4 units observed at wave 2 in every replicate
    moved = moves[(moves["wave"] == 2)].groupby("wave")["rep_mean"].sum()
    assert moved.iloc[0] == pytest.approx(4.0)
    assert shares.attrs["draws"] == 40
    # stayed: the diagonal of the hand-counted tables, 2 (waves 1 -> 2) and 2 (2 -> 3)
    assert out["stayed"]["observed"].tolist() == [2.0, 2.0]
    assert set(moves.columns) >= {"from", "to", "from_wave", "p_value", "flag"}


def test_category_ppc_refuses_a_continuous_fit():
    with pytest.raises(bl.DataError, match="needs a fit of a panel with categorical variables"):
        category_ppc(SimpleNamespace(spec=None, panel=None), draws=10)


def test_category_share_figure_has_one_panel_per_variable_and_category():
    panel = _tiny_panel()
    spec = bl.model("random-effects")
    fit = _fake_fit(spec, panel, {"level_mean": 0.2, "level_var": 0.5},
                    {"threshold[r,2]": 1.0}, 30)
    shares = category_ppc(fit, draws=20, seed=0)["shares"]
    from bayeslong.evaluate.plots import plot_category_shares

    fig = plot_category_shares(shares)
    visible = [ax for ax in fig.axes if ax.get_visible()]
    assert [ax.get_title() for ax in visible] == ["r = low", "r = mid", "r = high"]
    # the observed line of "mid" holds the hand-counted shares 1/5, 3/4, 2/5
    np.testing.assert_allclose(visible[1].lines[0].get_ydata(), [1 / 5, 3 / 4, 2 / 5])
    with pytest.raises(bl.DataError, match="plot_category_shares: the table lacks the column"):
        plot_category_shares(shares.drop(columns="category"))
