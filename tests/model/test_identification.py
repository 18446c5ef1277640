"""Local identification by the Jacobian rank (Rothenberg 1971, Econometrica 39(3))."""

import numpy as np
import pandas as pd
import pytest

import bayeslong as bl


def _design(n_waves=5, outcomes=("y",), time_varying=(), time_invariant=()):
    """A small random panel with the given design (identification uses only its design)."""
    rng = np.random.default_rng(0)
    rows = []
    for i in range(30):
        z = {name: rng.normal() for name in time_invariant}
        for t in range(n_waves):
            row = {"id": i, "t": t, **z}
            row.update({o: rng.normal() + t for o in outcomes})
            row.update({x: rng.normal() for x in time_varying})
            rows.append(row)
    return bl.Panel.from_long(pd.DataFrame(rows), unit="id", wave="t", outcomes=list(outcomes),
                              time_varying=list(time_varying), time_invariant=list(time_invariant))


@pytest.mark.parametrize("name", sorted(bl.catalog()))
def test_every_catalog_model_is_identified_at_five_waves(name):
    spec = bl.model(name)
    outcomes = ("y", "x") if spec.processes == 2 else ("y",)
    result = bl.identify(spec, _design(5, outcomes))
    assert result.identified, result.deficient
    assert result.rank == result.n_params


def test_fixed_effects_with_time_invariant_covariate_is_flagged():
    # Closed form: a level factor free to depend on z absorbs z's effect on every wave, so
    # effect[z] and level_on[z] enter the moments only through their sum.
    panel = _design(5, time_varying=("x",), time_invariant=("z",))
    result = bl.identify(bl.model("fixed-effects"), panel)
    assert not result.identified
    assert set(result.deficient) == {"effect[z]", "level_on[z]"}
    assert "leave z out" in result.advice
    assert bl.identify(bl.model("random-effects"), panel).identified


def test_too_few_waves_for_free_growth_lag_is_flagged():
    # Counting by hand: free-growth-lag at T = 3 has 11 parameters but only 3 means and
    # 6 covariances (9 moments), so it cannot be identified.
    result = bl.identify(bl.model("free-growth-lag"), _design(3))
    assert not result.identified
    assert result.n_moments == 9


# --- categorical variables ---------------------------------------------------------------
def _ordinal_panel(kind="ordinal", n_categories=4, n_waves=5, n_units=200, seed=1):
    # invented rating data: a rounded growth score (only the design and the categories count)
    rng = np.random.default_rng(seed)
    n_categories = 2 if kind == "binary" else n_categories
    score = rng.normal(size=(n_units, 1)) + 0.3 * np.arange(n_waves) + rng.normal(size=(n_units, n_waves))
    cuts = np.quantile(score, np.linspace(0, 1, n_categories + 1)[1:-1])
    codes = np.digitize(score, cuts) + 1
    df = pd.DataFrame({"id": np.repeat(np.arange(n_units), n_waves),
                       "t": np.tile(np.arange(1, n_waves + 1), n_units), "y": codes.ravel()})
    return bl.Panel.from_long(df, unit="id", wave="t", outcomes=["y"], categorical={"y": kind})


@pytest.mark.parametrize("name,options,kind", [
    ("linear-growth", {}, "ordinal"),
    ("alt", {"residuals": "equal"}, "ordinal"),
    ("alt", {"residuals": "equal"}, "binary"),
    ("waves-apart", {}, "ordinal"),
])
def test_categorical_models_with_the_documented_rules_are_identified(name, options, kind):
    r = bl.identify(bl.model(name, **options), _ordinal_panel(kind))
    assert r.identified and r.deficient == () and r.advice == ""


def test_categorical_saturated_model_lacks_exactly_the_scale():
    # Ordinal data identify the standardised thresholds and the polychoric correlations
    # only (Olsson 1979, Psychometrika 44(4); Muthen 1984, Psychometrika 49(1)): in the
    # saturated model with free covariances of the waves, one overall scale factor of the
    # latent responses and the thresholds is left (docs/model-family.md), a rank deficit of
    # exactly one, and the thresholds are among the parameters it moves
    r = bl.identify(bl.model("waves-free"), _ordinal_panel())
    assert not r.identified and r.n_params - r.rank == 1
    assert "threshold[y,2]" in r.deficient and "resid_var[3]" in r.deficient
    assert "standardised thresholds" in r.advice and "thresholds='equal'" in r.advice


def test_categorical_check_differs_from_the_continuous_one():
    # the same design read as continuous is identified in the saturated model: the
    # categorical check is not the continuous check under another name
    panel = _ordinal_panel()
    continuous = bl.Panel(units=panel.units, waves=panel.waves, outcomes=panel.outcomes,
                          y=panel.y.astype(float))
    assert bl.identify(bl.model("waves-free"), continuous).identified
    assert not bl.identify(bl.model("waves-free"), panel).identified
