"""Generate the worked examples' data: ``examples/shift_sleep.csv`` and
``examples/reading_motivation.csv``. Both scenarios are INVENTED; see the notes of each.

Shift sleep. The scenario is INVENTED for this package's worked example; no real person or study is
behind it. 120 shift workers rate their sleep quality (higher is better, roughly 0 to 10) in five consecutive
weeks. Each week's rating depends on the worker's own starting level and trend (growth
factors) and on last week's rating (a lag), and falls with the number of night shifts
worked that week (time-varying covariate); workers with more years on shift work start
lower and decline faster (time-invariant covariate). Some workers leave the study early
(monotone dropout) and a few weekly ratings are missing at random.

Reading motivation. Also INVENTED: 150 pupils rate their reading motivation at the end of
each of five school terms with three statements on a 0-10 slider: "I enjoy reading"
(``enjoys``), "I read in my free time by choice" (``chooses``) and "I keep reading when a
text gets hard" (``persists``). The three ratings are indicators of one latent motivation
per term (a measurement model with the ratings' loadings and intercepts equal over terms),
which follows growth and carry-over (the ``alt`` model): each pupil has an own level and
trend, motivation drifts down a little each term, and last term's motivation carries over.
Some pupils leave the study (monotone dropout), and single ratings are missing at random.

The data come from ``bl.simulate`` with fixed seeds, so running this script again
reproduces the shipped CSVs exactly::

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


READING_SEED = 20261202
READING_UNITS, READING_WAVES = 150, 5
READING_ITEMS = ["enjoys", "chooses", "persists"]

#: True values of the reading-motivation process: the ALT model on the latent motivation
#: (first term predetermined, disturbance variance equal over terms), scalar invariance, and
#: each rating's unique factors covarying over terms (the default measurement options).
READING_PARAMS = {
    "initial_mean": 6.5,          # term-1 motivation on the scale of `enjoys` (0-10 slider)
    "initial_var": 2.0,
    "level_mean": 4.4,            # with the lag below, a steady state near 6.3
    "slope_mean": -0.12,          # motivation drifts down by about 0.12 a term
    "lag": 0.3,                   # carry-over from last term's motivation
    "level_var": 0.5,
    "slope_var": 0.04,
    "level_slope_cov": -0.02,
    "initial_level_cov": 0.4,
    "initial_slope_cov": 0.0,
    "resid_var": 0.6,
    "loading[chooses]": 0.9,      # `chooses` moves 0.9 points per point of motivation
    "intercept[chooses]": -0.8,   # and sits lower: free reading is rarer than enjoying it
    "loading[persists]": 0.7,
    "intercept[persists]": 1.2,
    "unique_var": 0.8,            # each rating's own part, every term
    "unique_cov": 0.15,           # ... which recurs from term to term
}


def make_reading(path: Path) -> None:
    """Simulate the reading-motivation panel (three ratings a term) and write it as CSV."""
    spec = bl.model("alt", residuals="equal")
    df = bl.simulate(spec, READING_PARAMS, READING_UNITS, READING_WAVES, seed=READING_SEED,
                     outcomes=["motivation"], indicators={"motivation": READING_ITEMS},
                     missing={"dropout": 0.05, "intermittent": 0.02})
    rng = np.random.default_rng(READING_SEED + 1)
    for item in READING_ITEMS:  # a single rating skipped now and then (2%, after term 1)
        skipped = (rng.uniform(size=len(df)) < 0.02) & (df["wave"] > 1)
        df.loc[skipped, item] = np.nan
    df = df.rename(columns={"unit": "pupil", "wave": "term"})
    df[READING_ITEMS] = df[READING_ITEMS].round(2)
    df.to_csv(path, index=False)


if __name__ == "__main__":
    here = Path(__file__).parent
    for name, write in (("shift_sleep.csv", make), ("reading_motivation.csv", make_reading)):
        write(here / name)
        print(f"wrote {here / name}")
