"""Generate the ordinal worked example's data: ``examples/pain_interference.csv``.

The scenario is INVENTED for this package's worked example; no real patient, clinic or
study is behind it. 150 patients starting a pain programme answer one question in each of
five monthly visits: "How much did pain interfere with your daily activities in the past
week?", on five categories from "not at all" to "extremely". The answer is the category in
which a latent interference score falls (an ordered probit). That score follows the hybrid of
growth and carry-over (the ``alt`` model, residual variances equal over visits): each patient
has an own level and monthly trend (most improve), and last month's interference carries
over with a lag of 0.35. Some patients leave the programme early (monotone dropout).

The data come from ``bl.simulate`` with a fixed seed, so running this script again
reproduces the shipped CSV exactly::

    python examples/make_pain_data.py
"""

from pathlib import Path

import bayeslong as bl

SEED = 20261202
N_UNITS, N_WAVES = 150, 5
CATEGORIES = ["not at all", "a little", "moderately", "quite a bit", "extremely"]

#: True values on the latent scale (the probit error has variance 1; the first threshold,
#: between "not at all" and "a little", is 0 by definition: model/thresholds.py).
TRUE_PARAMS = {
    "initial_mean": 1.6,            # first visit: most patients report moderate interference
    "initial_var": 0.8,
    "level_mean": 1.0,              # with the lag below, a steady state near 1.5
    "slope_mean": -0.2,             # interference falls by 0.2 latent units a month
    "lag": 0.35,                    # carry-over from last month's interference
    "level_var": 0.4,
    "slope_var": 0.03,
    "level_slope_cov": -0.03,
    "initial_level_cov": 0.2,
    "initial_slope_cov": 0.0,
    "resid_var": 0.3,
    "threshold[interference,2]": 0.9,   # a little | moderately
    "threshold[interference,3]": 1.8,   # moderately | quite a bit
    "threshold[interference,4]": 2.8,   # quite a bit | extremely
}


def make(path: Path) -> None:
    """Simulate the panel and write it to ``path`` as CSV, categories as their labels."""
    df = bl.simulate(bl.model("alt", residuals="equal"), TRUE_PARAMS, N_UNITS, N_WAVES,
                     seed=SEED, outcomes=["interference"], categorical={"interference": 5},
                     missing={"dropout": 0.05})
    df = df.rename(columns={"unit": "patient", "wave": "visit"})
    df["interference"] = df["interference"].map(
        lambda c: None if c != c else CATEGORIES[int(c) - 1])
    df.to_csv(path, index=False)


if __name__ == "__main__":
    out = Path(__file__).with_name("pain_interference.csv")
    make(out)
    print(f"wrote {out}")
