# %% [markdown]
# # A tour of bayeslong through the Python API
#
# The worked example, step by step: the same job `bayeslong run examples/shift_sleep.toml`
# does from the command line. The data are INVENTED (simulated once by
# `examples/make_example_data.py`): 120 shift workers rate their sleep quality in five
# consecutive weeks; `night_shifts` (that week) is a time-varying covariate and
# `years_on_shifts` a time-invariant one; some workers drop out.
#
# Run it as a script (`python examples/tour.py`) or cell by cell in an editor that
# understands `# %%` cells. It writes its figures and report to `examples/tour-output/`.

# %%
from pathlib import Path

import pandas as pd

import bayeslong as bl

HERE = Path(__file__).resolve().parent
OUT = HERE / "tour-output"
OUT.mkdir(exist_ok=True)
SAMPLING = dict(draws=1000, tune=1000, chains=4, seed=2026)  # as in shift_sleep.toml

# %% [markdown]
# ## 1. Read the panel
# `Panel.from_long` checks the data and says what to fix; `describe()` shows the
# missing-data patterns (o observed, . missing).

# %%
df = pd.read_csv(HERE / "shift_sleep.csv")
panel = bl.Panel.from_long(df, unit="worker", wave="week", outcomes=["quality"],
                           time_varying=["night_shifts"], time_invariant=["years_on_shifts"])
print(panel)
print(panel.describe()["patterns"])

# %% [markdown]
# ## 2. Candidate models, and whether each is identified on this design

# %%
specs = {  # residual variances equal over weeks in all three, as in shift_sleep.toml
    "alt (growth + lag)": bl.model("alt", residuals="equal"),
    "growth only": bl.model("linear-growth"),
    "lag only": bl.model("ar"),
}
for label, spec in specs.items():
    result = bl.identify(spec, panel)
    print(f"{label:28s} identified: {result.identified}")

# %% [markdown]
# ## 3. Fit each candidate by NUTS
# Priors default to weakly informative ones on the data's scale; `fit.priors()` lists
# them. Here the lag's prior is overridden by name wherever a model has a lag.

# %%
fits = {}
for label, spec in specs.items():
    priors = {"lag": ("normal", 0.2, 0.4)} if spec.has_lag else None
    fits[label] = bl.fit(spec, panel, priors=priors, **SAMPLING)
    print(label, "\n", fits[label].summary()[["mean", "sd", "r_hat", "flag"]].head(6))

print(fits["alt (growth + lag)"].priors())

# %% [markdown]
# ## 4. Compare the candidates by how well they predict a new worker (PSIS-LOO)
# A difference within about two standard errors is not a preference; better prediction is
# not causation.

# %%
table = bl.compare(fits)
print(table[["elpd_loo", "se", "elpd_diff", "dse", "weight"]])
print(table.attrs["reading"])

# %% [markdown]
# ## 5. Posterior predictive checks of the best model

# %%
best = table.index[0]
checks = bl.ppc(fits[best], draws=100, seed=1)
print(checks[checks["flag"]])
bl.plot_ppc(checks, statistics=("mean", "sd", "lag1_cor")).savefig(OUT / "ppc.png", dpi=120)
bl.plot_trajectories(fits[best], max_units=6, draws=100).savefig(OUT / "trajectories.png", dpi=120)

# %% [markdown]
# ## 6. How much does the lag depend on the model and on the first-wave treatment?
# Every setting starts from the same prior override; settings equal to a fit made above are
# read from it (`fits=`), so only the other first-wave treatment is refitted.

# %%
sens = bl.lag_sensitivity(panel, models=[specs["alt (growth + lag)"], specs["lag only"]],
                          prior_grid=False, variance_scales=False, initial=True,
                          specification=True, power_scaling=False,
                          fit_kwargs={**SAMPLING, "progressbar": False},
                          priors={"lag": ("normal", 0.2, 0.4)}, fits=list(fits.values()))
print("read from the fits above:", sens.reused)
print(sens.table[["axis", "setting", "mean", "q5", "q95", "flag"]])
sens.plot().savefig(OUT / "lag-sensitivity.png", dpi=120)

# %% [markdown]
# ## 7. The same job from the study file, with the full report
# `run_study` saves every fit under the study's output folder and reuses it while the study
# and data are unchanged, so running this cell twice samples only once.

# %%
study = bl.load_study(HERE / "shift_sleep.toml")
# workers=1: the study file samples its candidates in worker processes, which would import
# (and so run) this unguarded script again; here they are sampled in this process
results = bl.run_study(study, workers=1)
paths = bl.write_report(results, study.output)
print("report:", paths["html"])
