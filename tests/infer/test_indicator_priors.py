"""Default priors of the measurement part, by the rule written in docs/priors.md."""

import numpy as np
import pytest

import bayeslong as bl
from bayeslong.infer.priors import default_priors
from bayeslong.model.structure import structure_for

TRUTH = {"level_mean": 2.0, "slope_mean": 0.5, "lag": 0.4, "initial_mean": 2.0, "level_var": 1.0,
         "level_slope_cov": 0.1, "slope_var": 0.1, "initial_level_cov": 0.3,
         "initial_slope_cov": 0.0, "initial_var": 1.5, "resid_var": 0.5,
         "loading[b]": 0.8, "loading[c]": 1.2, "intercept[b]": 1.0, "intercept[c]": -0.5,
         "unique_var": 1.0, "unique_cov": 0.1}


@pytest.fixture(scope="module")
def frame_and_panel():
    df = bl.simulate(bl.model("alt"), TRUTH, 150, 4, seed=2, indicators={"y": ["a", "b", "c"]})
    return df, bl.Panel.from_long(df, unit="unit", wave="wave", outcomes={"y": ["a", "b", "c"]})


def test_indicator_priors_follow_the_documented_rule(frame_and_panel):
    df, panel = frame_and_panel
    priors = {p.parameter: p for p in default_priors(structure_for(bl.model("alt"), panel), panel)}
    # the rule (docs/priors.md), with m_j, s_j computed here from the frame: m_j the
    # first-wave mean, s_j the SD (ddof 1) pooled over units and waves
    m_b = df.loc[df["wave"] == 1, "b"].mean()
    s_b, s_c = df["b"].std(ddof=1), df["c"].std(ddof=1)
    s_a = df["a"].std(ddof=1)  # the process takes its first indicator's scale
    assert (priors["loading[b]"].family, priors["loading[b]"].args) == ("normal", (1.0, 1.0))
    assert priors["intercept[b]"].family == "normal"
    np.testing.assert_allclose(priors["intercept[b]"].args, (0.0, 3 * s_b + abs(m_b)), rtol=1e-12)
    assert priors["unique_var[c,2]"].family == "halfnormal" and priors["unique_var[c,2]"].target == "sd"
    np.testing.assert_allclose(priors["unique_var[c,2]"].args, (s_c,), rtol=1e-12)
    assert priors["unique_cov[c,1,3]"].family == "lkj"
    np.testing.assert_allclose(priors["resid_var[2]"].args, (s_a,), rtol=1e-12)


def test_strict_with_unique_covariances_has_one_sd_per_indicator(frame_and_panel):
    # strict invariance holds unique_var[j] equal at every wave, inside the block of j's
    # unique covariances over waves: the prior is one SD (the rule above, HalfNormal(s_j))
    # times the block's LKJ correlation matrix (docs/priors.md)
    from bayeslong.infer.generic_logp import layout
    from bayeslong.infer.priors import resolve_priors

    df, panel = frame_and_panel
    structure = structure_for(bl.model("alt", invariance="strict"), panel)
    prior_set = resolve_priors(structure, panel)
    np.testing.assert_allclose(prior_set["unique_var[b]"].args, (df["b"].std(ddof=1),), rtol=1e-12)
    sizes = dict(layout(structure, prior_set).value_names)
    assert sizes["lkj__unique_var[b]__unique_var[b]__unique_var[b]__unique_var[b]__sd_log__"] == 1
    assert sizes["lkj__unique_var[b]__unique_var[b]__unique_var[b]__unique_var[b]_cpc__"] == 6
