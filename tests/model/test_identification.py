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
