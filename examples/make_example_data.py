"""Generate the worked example's data: ``examples/shift_sleep.csv``.

The scenario is INVENTED for this package's worked example; no real person or study is
behind it. 120 shift workers rate their sleep quality (higher is better, roughly 0 to 10) in five consecutive
weeks. Each week's rating depends on the worker's own starting level and trend (growth
factors) and on last week's rating (a lag), and falls with the number of night shifts
worked that week (time-varying covariate); workers with more years on shift work start
lower and decline faster (time-invariant covariate). Some workers leave the study early
(monotone dropout) and a few weekly ratings are missing at random.

The data come from ``bl.simulate`` with a fixed seed, so running this script again
reproduces the shipped CSV exactly::

    python examples/make_example_data.py
"""

from pathlib import Path

import numpy as np

import bayeslong as bl

SEED = 20261201
N_UNITS, N_WAVES = 120, 5

#: True values of the hybrid (growth + lag) process: the ALT model, first wave predetermined.
TRUE_PARAMS = {
    "initial_mean": 7.5,                      # week-1 mean rating for a worker with 0 years, 0 nights
    "initial_effect[night_shifts]": -0.25,    # each night shift in week 1 costs a quarter point
    "initial_effect[years_on_shifts]": -0.06,
    "initial_var": 1.0,
    "level_mean": 5.0,                        # with the lag below, a steady state near 7
    "slope_mean": -0.15,                      # ratings drift down by 0.15 a week
    "lag": 0.4,                               # carry-over from last week's rating
    "effect[night_shifts]": -0.25,
    "level_effect[years_on_shifts]": -0.04,
    "slope_effect[years_on_shifts]": -0.01,
    "level_var": 0.4,
    "slope_var": 0.02,
    "level_slope_cov": -0.02,
    "initial_level_cov": 0.2,
    "initial_slope_cov": 0.0,
    "resid_var": 0.5,
}


def make(path: Path) -> None:
    """Simulate the panel and write it to ``path`` as CSV."""
    rng = np.random.default_rng(SEED)
    # whole numbers, as a roster would record them, passed to simulate as fixed values
    nights = rng.integers(0, 6, size=(N_UNITS, N_WAVES)).astype(float)
    years = rng.integers(1, 21, size=N_UNITS).astype(float)
    df = bl.simulate(
        bl.model("alt"), TRUE_PARAMS, N_UNITS, N_WAVES, seed=SEED,
        covariates={"night_shifts": nights}, time_invariant={"years_on_shifts": years},
        outcomes=["quality"], missing={"dropout": 0.06, "intermittent": 0.03},
    )
    df = df.rename(columns={"unit": "worker", "wave": "week"})
    df["quality"] = df["quality"].round(3)
    df.to_csv(path, index=False)


if __name__ == "__main__":
    out = Path(__file__).with_name("shift_sleep.csv")
    make(out)
    print(f"wrote {out}")
