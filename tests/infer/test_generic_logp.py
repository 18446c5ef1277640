"""The generic log posterior (one numba kernel for every structure) against the PyMC model.

Reference for every value here: the PyMC model of ``bayeslong.infer.pymc_model.build_model``
(today's sampler path), its ``compile_logp()`` and ``compile_dlogp()`` at the same
unconstrained point (PyMC's default transforms and log-Jacobians included); for the
gradient also central finite differences of the kernel's own log density.
"""

import warnings

import numpy as np
import pandas as pd
import pytest

import bayeslong as bl
from bayeslong.errors import ConvergenceWarning, SpecError
from bayeslong.infer.diagnostics import _arviz_numpy
from bayeslong.infer.generic_logp import layout, logp_function
from bayeslong.infer.priors import resolve_priors
from bayeslong.infer.sampling import _choose, fit
from bayeslong.model.structure import structure_for


def _panel(outcomes=("y",), time_varying=("x",), time_invariant=("z",), n=40, waves=5, seed=0):
    """A random panel with covariates and about 15% missing outcomes after wave 1."""
    rng = np.random.default_rng(seed)
    rows = []
    for i in range(n):
        z = {name: rng.normal() for name in time_invariant}
        for t in range(waves):
            row = {"id": i, "t": t, **z}
            row.update({o: (rng.normal() + t if t == 0 or rng.uniform() > 0.15 else np.nan)
                        for o in outcomes})
            row.update({x: rng.normal() for x in time_varying})
            rows.append(row)
    return bl.Panel.from_long(pd.DataFrame(rows), unit="id", wave="t", outcomes=list(outcomes),
                              time_varying=list(time_varying), time_invariant=list(time_invariant))


def _pymc_pair(spec, panel, priors=None):
    """PyMC's log density and gradient (today's model), and the generic kernel's."""
    from bayeslong.infer.pymc_model import build_model

    structure = structure_for(spec, panel)
    prior_set = resolve_priors(structure, panel, priors)
    model = build_model(spec, panel, prior_set)
    # the Python backend: the same graph without a C compile per model (tests stay quick);
    # its terms are summed here, since that backend's sum takes at most 32 terms at once
    terms = model.compile_logp(sum=False, mode="FAST_COMPILE")

    def logp(pt):
        return float(sum(np.sum(t) for t in terms(pt)))

    dlogp = model.compile_dlogp(mode="FAST_COMPILE")
    ip = model.initial_point()
    parts = [(v.name, ip[v.name].shape) for v in model.value_vars]
    generic = logp_function(structure, prior_set, panel)

    def point(x):
        out, pos = {}, 0
        for name, shape in parts:
            size = int(np.prod(shape))
            out[name] = x[pos:pos + size].reshape(shape)
            pos += size
        return out

    return logp, dlogp, point, generic, parts


def _design(name):
    spec = bl.model(name)
    outcomes = ("y", "w") if spec.processes == 2 else ("y",)
    # fixed-effects with z is not identified (tests/model/test_identification.py): leave z out
    invariant = () if name == "fixed-effects" else ("z",)
    return spec, _panel(outcomes, time_invariant=invariant)


@pytest.mark.parametrize("name", sorted(bl.catalog()))
def test_logp_and_gradient_equal_pymc_model(name):
    spec, panel = _design(name)
    logp, dlogp, point, generic, parts = _pymc_pair(spec, panel)
    # the layout is PyMC's: the same value variables in the same order and sizes
    assert [(n, int(np.prod(s))) for n, s in parts] == list(generic.layout.value_names)
    rng = np.random.default_rng(1)
    for _ in range(3):
        x = rng.normal(scale=0.3, size=generic.layout.n_x)
        ref, ref_grad = logp(point(x)), dlogp(point(x))
        value, grad = generic(x)
        assert value == pytest.approx(ref, rel=1e-10)
        np.testing.assert_allclose(grad, ref_grad, rtol=1e-10, atol=1e-10 * np.abs(ref_grad).max())


#: Invented values for a process measured by three indicators (ALT, scalar invariance).
_ITEMS = ("a", "b", "c")
_ITEM_TRUTH = {"level_mean": 2.0, "slope_mean": 0.5, "lag": 0.4, "initial_mean": 2.0,
               "level_var": 1.0, "level_slope_cov": 0.1, "slope_var": 0.1,
               "initial_level_cov": 0.3, "initial_slope_cov": 0.0, "initial_var": 1.5,
               "resid_var": 0.5, "loading[b]": 0.8, "loading[c]": 1.2, "intercept[b]": 1.0,
               "intercept[c]": -0.5, "unique_var": 0.5, "unique_cov": 0.1}


def _indicator_panel():
    """Three indicators at four waves, about 10% of the indicator entries missing."""
    df = bl.simulate(bl.model("alt"), _ITEM_TRUTH, 50, 4, seed=4, indicators={"y": list(_ITEMS)})
    gone = np.random.default_rng(5).uniform(size=(len(df), 3)) < 0.1
    for j, item in enumerate(_ITEMS):
        df.loc[gone[:, j] & (df["wave"] > 1), item] = np.nan
    return bl.Panel.from_long(df, unit="unit", wave="wave", outcomes={"y": list(_ITEMS)})


@pytest.mark.parametrize("name, options", [
    ("alt", {}),                                   # default: scalar, same-indicator covariances
    ("alt", {"invariance": "metric"}),
    ("waves-apart", {"invariance": "configural"}),  # identified at every level (model-family.md)
    ("alt", {"scale": "effects"}),                 # linear-combination entries (Matrix.terms)
    ("alt", {"invariance": "strict", "unique_covariance": "none"}),
    ("alt", {"invariance": "strict"}),             # one SD per unique-covariance block
    ("alt", {"invariance": "approximate"}),        # common + deviation entries
    ("alt", {"invariance": "approximate", "scale": "effects", "release": {"intercept": ["c"]}}),
], ids=["scalar", "metric", "configural", "effects", "strict", "strict-covariances", "approximate",
     "approx-effects"])
def test_indicator_models_equal_pymc_model(name, options):
    spec, panel = bl.model(name, **options), _indicator_panel()
    logp, dlogp, point, generic, parts = _pymc_pair(spec, panel)
    assert [(n, int(np.prod(s))) for n, s in parts] == list(generic.layout.value_names)
    x = np.random.default_rng(6).normal(scale=0.3, size=generic.layout.n_x)
    value, grad = generic(x)
    assert value == pytest.approx(logp(point(x)), rel=1e-10)
    ref_grad = dlogp(point(x))
    np.testing.assert_allclose(grad, ref_grad, rtol=1e-10, atol=1e-10 * np.abs(ref_grad).max())


def _within_indicator_panel():
    """Two processes with two indicators each at three waves, person effects by indicator."""
    items = {"s": ["a", "b"], "m": ["d", "e"]}
    rng = np.random.default_rng(7)
    person = rng.normal(size=(40, 4))
    rows = [{"id": i, "t": t, **{j: person[i, n] + rng.normal() for n, j in enumerate("abde")}}
            for i in range(40) for t in range(3)]
    return bl.Panel.from_long(pd.DataFrame(rows), unit="id", wave="t", outcomes=items)


def test_within_form_with_indicators_equals_pymc_model():
    # the multiple-indicator RI-CLPM (docs/model-family.md): one random intercept per
    # indicator, a block of correlated random intercepts across processes, the within
    # factors' wave intercepts; the kernel takes it through the existing structure arrays.
    # The log density against the PyMC model's; the gradient against central differences of
    # the kernel's own density (step 1e-5: error O(h^2) ~ 1e-9 relative), since compiling
    # PyMC's gradient graph for this model takes 20-40 s (that check: the slow test below)
    from bayeslong.infer.pymc_model import build_model

    spec, panel = bl.model("ri-clpm"), _within_indicator_panel()
    structure = structure_for(spec, panel)
    prior_set = resolve_priors(structure, panel)
    model = build_model(spec, panel, prior_set)
    terms = model.compile_logp(sum=False, mode="FAST_COMPILE")
    ip = model.initial_point()
    parts = [(v.name, ip[v.name].shape) for v in model.value_vars]
    f = logp_function(structure, prior_set, panel)
    assert [(n, int(np.prod(s))) for n, s in parts] == list(f.layout.value_names)
    x = np.random.default_rng(6).normal(scale=0.3, size=f.layout.n_x)
    point, pos = {}, 0
    for name, shape in parts:
        point[name] = x[pos:pos + int(np.prod(shape))].reshape(shape)
        pos += int(np.prod(shape))
    value, grad = f(x)
    assert value == pytest.approx(float(sum(np.sum(t) for t in terms(point))), rel=1e-10)
    h = 1e-5
    fd = np.array([(f(x + h * e)[0] - f(x - h * e)[0]) / (2 * h) for e in np.eye(len(x))])
    np.testing.assert_allclose(grad, fd, rtol=1e-5, atol=1e-6 * np.abs(fd).max())


@pytest.mark.slow
def test_within_form_with_indicators_gradient_equals_pymc_model():
    # the same model's gradient against PyMC's compiled gradient (20-40 s of compiling)
    logp, dlogp, point, generic, parts = _pymc_pair(bl.model("ri-clpm"), _within_indicator_panel())
    x = np.random.default_rng(6).normal(scale=0.3, size=generic.layout.n_x)
    value, grad = generic(x)
    assert value == pytest.approx(logp(point(x)), rel=1e-10)
    ref_grad = dlogp(point(x))
    np.testing.assert_allclose(grad, ref_grad, rtol=1e-10, atol=1e-10 * np.abs(ref_grad).max())


def test_every_prior_family_equals_pymc_model():
    # every family of priors.FAMILIES on a value or an SD, and a non-default LKJ shape
    spec = bl.model("alt", residuals="equal")
    panel = _panel(time_varying=(), time_invariant=())
    priors = {"lag": ("student_t", 4.0, 0.2, 0.5), "slope_mean": ("uniform", -3.0, 5.0),
              "level_mean": ("normal", 1.0, 4.0), "initial_mean": ("student_t", 3.0, 0.0, 10.0),
              "level_var": ("halfstudent_t", 3.0, 2.0), "slope_var": ("halfstudent_t", 3.0, 0.5),
              "initial_var": ("halfstudent_t", 3.0, 1.0), "level_slope_cov": ("lkj", 4.0),
              "resid_var": ("gamma", 2.0, 1.5)}
    cases = [priors, {"resid_var": ("lognormal", 0.0, 1.0)}, {"resid_var": ("exponential", 2.0)},
             {"resid_var": ("uniform", 0.0, 10.0)}, {"lag": ("halfnormal", 1.0)},
             # the SD priors of an LKJ block's members
             {v: ("uniform", 0.0, 20.0) for v in ("level_var", "slope_var", "initial_var")},
             {v: ("lognormal", 0.5, 1.0) for v in ("level_var", "slope_var", "initial_var")},
             {v: ("exponential", 0.7) for v in ("level_var", "slope_var", "initial_var")},
             {v: ("gamma", 2.0, 1.0) for v in ("level_var", "slope_var", "initial_var")}]
    rng = np.random.default_rng(2)
    for case in cases:
        logp, dlogp, point, generic, _ = _pymc_pair(spec, panel, case)
        for _ in range(2):
            x = rng.normal(scale=0.3, size=generic.layout.n_x)
            value, grad = generic(x)
            assert value == pytest.approx(logp(point(x)), rel=1e-10), case
            ref_grad = dlogp(point(x))
            np.testing.assert_allclose(grad, ref_grad, rtol=1e-10, atol=1e-10 * np.abs(ref_grad).max())


@pytest.mark.parametrize("name", ["alt", "bivariate-alt", "dual-change"])
def test_start_point_equals_pymc_path(name):
    # reference: the PyMC path's start (sampling._start_point, transformed by PyMC's
    # initial-point function as sampling._sample_nutpie does)
    from pymc.initial_point import make_initial_point_fn

    from bayeslong.infer.generic_logp import start_x
    from bayeslong.infer.pymc_model import build_model
    from bayeslong.infer.sampling import _start_point

    spec, panel = _design(name)
    structure = structure_for(spec, panel)
    prior_set = resolve_priors(structure, panel)
    model = build_model(spec, panel, prior_set)
    start = _start_point(model, structure, panel, prior_set)
    ip = make_initial_point_fn(model=model, overrides=start, jitter_rvs=set(),
                               return_transformed=True)(0)
    old = np.concatenate([np.ravel(ip[model.rvs_to_values[rv].name]) for rv in model.free_RVs])
    np.testing.assert_allclose(start_x(layout(structure, prior_set), panel), old, rtol=1e-12)


@pytest.mark.parametrize("name", ["alt", "bivariate-alt", "dual-change", "free-growth-lag"])
def test_gradient_equals_finite_differences(name):
    # central differences of the kernel's own log density, step 1e-5: error O(h^2) ~ 1e-9
    # relative, far inside the tolerance
    spec, panel = _design(name)
    structure = structure_for(spec, panel)
    f = logp_function(structure, resolve_priors(structure, panel), panel)
    x = np.random.default_rng(3).normal(scale=0.3, size=f.layout.n_x)
    _, grad = f(x)
    h = 1e-5
    fd = np.array([(f(x + h * e)[0] - f(x - h * e)[0]) / (2 * h) for e in np.eye(len(x))])
    np.testing.assert_allclose(grad, fd, rtol=1e-5, atol=1e-6 * np.abs(fd).max())


@pytest.mark.parametrize("fill", [800.0, -800.0])
def test_no_finite_density_gives_minus_inf_without_error(fill):
    # exp(800) overflows, exp(-800) underflows to a zero variance: no finite density
    spec, panel = _design("alt")
    structure = structure_for(spec, panel)
    f = logp_function(structure, resolve_priors(structure, panel), panel)
    value, grad = f(np.full(f.layout.n_x, fill))
    assert value == -np.inf and np.all(grad == 0)


def test_python_callback_gives_the_same_draws(sleep_panel):
    # nutpie's public Python-function interface around the same kernel (the route taken
    # when its C interface is missing): the same log density, so the same seeded draws
    from bayeslong.infer.generic_logp import sample

    structure = structure_for(bl.model("linear-growth"), sleep_panel)
    prior_set = resolve_priors(structure, sleep_panel)
    runs = [sample(structure, prior_set, sleep_panel, draws=50, tune=50, chains=1, cores=1,
                   seed=3, progressbar=False, callback=cb)[0] for cb in ("c", "python")]
    for name in structure.names:
        np.testing.assert_allclose(runs[1].posterior[name].values, runs[0].posterior[name].values,
                                   rtol=1e-12)


def test_nutpie_start_failure_falls_back_to_pymc(sleep_panel, monkeypatch):
    # the fallback of sampling.fit: nutpie refusing to start goes on with PyMC's NUTS
    from bayeslong.infer import generic_logp

    def refuse(*args, **kwargs):
        raise RuntimeError("Failed to initialize the sampler: bad initial gradient")

    monkeypatch.setattr(generic_logp, "sample", refuse)
    with pytest.warns(UserWarning, match="sampling with PyMC's NUTS instead"), \
            warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        result = fit(bl.model("linear-growth"), sleep_panel, draws=30, tune=30, chains=1,
                     seed=1, progressbar=False)
    assert result.sampler == "pymc"


def test_new_structure_compiles_nothing():
    # numba reports every compilation as a "numba:compile" event. Fitting a structure never
    # fitted before in this process (other model, options, data size, covariates) must
    # compile nothing of ours once the kernel is loaded; the first fit may compile ArviZ's
    # own numba helpers (once per process, whatever the structure), the second nothing.
    from numba.core import event

    from bayeslong.infer import generic_kernel  # noqa: F401  (load the cached kernel first)

    designs = [(bl.model("level-lag", lag="time-varying"), _panel(n=25, waves=4, seed=5)),
               (bl.model("clpm", residuals="free"), _panel(("y", "w"), n=30, waves=6, seed=6))]
    compiled = []
    for spec, panel in designs:
        with event.install_recorder("numba:compile") as recorder, warnings.catch_warnings():
            warnings.simplefilter("ignore")
            result = fit(spec, panel, draws=30, tune=30, chains=1, seed=1, sampler="generic",
                         progressbar=False)
        compiled.append([getattr(e.data.get("dispatcher"), "py_func", None) for _, e in recorder.buffer])
        assert result.sampler == "generic"
        assert set(result.idata.posterior.data_vars) == set(result.structure.names)
        assert result.idata.log_likelihood["y"].dims == ("chain", "draw", "unit")
    assert not [f for f in compiled[0] if f is not None and f.__module__.startswith("bayeslong")]
    assert compiled[1] == []
    assert "pytensor" not in {m.split(".")[0] for m in _modules_loaded_by_generic_fit()}


def test_kernel_cached_reads_numbas_own_cache_index(tmp_path, monkeypatch):
    # numba's own cache decides: the kernel loaded in this process (compiled or loaded,
    # either way written to numba's cache) is found; with numba's cache directory pointed
    # at an empty folder (what NUMBA_CACHE_DIR does on a fresh machine) it is not
    import numba.core.config

    from bayeslong.infer import generic_kernel  # noqa: F401
    from bayeslong.infer.generic_logp import kernel_cached

    assert kernel_cached() is True
    monkeypatch.setattr(numba.core.config, "CACHE_DIR", str(tmp_path))
    assert kernel_cached() is False


def _modules_loaded_by_generic_fit():
    # the generic path imports neither PyMC nor PyTensor: checked in a fresh interpreter
    import subprocess
    import sys

    code = ("import warnings, sys; warnings.simplefilter('ignore'); import bayeslong as bl; "
            "from bayeslong.infer.sampling import fit; "
            "p = bl.Panel.from_long(__import__('pandas').DataFrame({'i': [0,0,0,1,1,1,2,2,2], "
            "'t': [0,1,2]*3, 'y': [1.,2,3,2,2,4,0,1,1]}), unit='i', wave='t', outcomes=['y']); "
            "fit(bl.model('linear-growth'), p, draws=20, tune=20, chains=1, progressbar=False); "
            "print(' '.join(sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    return out.stdout.split()


def test_posterior_agrees_with_pymc_path(sleep_panel):
    # today's PyMC model (sampled by PyMC's NUTS, which needs no numba compile) and the
    # generic kernel sample the same posterior: each posterior mean and SD differs by less
    # than 4 combined Monte Carlo standard errors (ArviZ's mcse of the mean and of the SD)
    import arviz as az

    spec = bl.model("linear-growth")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        fits = [fit(spec, sleep_panel, draws=200, tune=200, chains=2, seed=s, sampler=which,
                    progressbar=False) for s, which in ((1, "generic"), (2, "pymc"))]
    names = list(fits[0].structure.names)
    for stat, method in (("mean", "mean"), ("std", "sd")):
        values = [getattr(f.idata.posterior[names], stat)(("chain", "draw")) for f in fits]
        with _arviz_numpy():  # ArviZ's numba path of the SD's mcse fails on NumPy 2
            mcse = [az.mcse(f.idata, var_names=names, method=method) for f in fits]
        for name in names:
            diff = abs(float(values[0][name]) - float(values[1][name]))
            bound = 4.0 * np.hypot(float(mcse[0][name]), float(mcse[1][name]))
            assert diff < bound, (stat, name, diff, bound)
    assert fits[0].idata.groups() == fits[1].idata.groups()


def test_prior_factory_falls_back_to_pymc_model(sleep_panel):
    import pymc as pm

    spec = bl.model("linear-growth")
    structure = structure_for(spec, sleep_panel)
    plain = resolve_priors(structure, sleep_panel)
    factory = resolve_priors(structure, sleep_panel, {"slope_mean": lambda n: pm.Normal(n, 0, 20)})
    assert _choose("auto", plain) == "generic"
    assert _choose("auto", factory) == "nutpie"
    with pytest.raises(SpecError, match="factory"):
        _choose("generic", factory)
    with pytest.raises(SpecError, match="factory"):
        layout(structure, factory)


def test_packing_and_kernel_agree_on_codes():
    # the packer (no numba import) and the kernel name the same header size, family codes
    # and every family of priors.FAMILIES but the LKJ (which has its own block table)
    from bayeslong.infer import generic_kernel, generic_logp
    from bayeslong.infer.priors import FAMILIES

    assert generic_logp.HEADER_SIZE == generic_kernel.HEADER_SIZE
    assert set(generic_logp.FAMILY_CODES) == set(FAMILIES) - {"lkj"}
    assert generic_logp.FAMILY_CODES["gamma"] == generic_kernel.GAMMA
    assert generic_logp.FAMILY_CODES["normal"] == generic_kernel.NORMAL
