"""The default pooling of the residual log-SDs over waves (infer/pooling.py).

References: the term's formula is docs/priors.md, "Pooled residual variances". The prior
draws are checked against the Gaussian algebra of that term with LogNormal SD priors (then
the log-SDs are jointly normal; derivation in ``test_prior_draws_follow_the_pooled_prior``).
The PyMC model and the generic kernel are each checked against the term computed on its own
(:func:`bayeslong.infer.pooling.log_density`) and against each other.
"""

import json
import types

import numpy as np
import pytest

import bayeslong as bl
from bayeslong.errors import SpecError
from bayeslong.infer import pooling
from bayeslong.infer.generic_kernel import natural
from bayeslong.infer.generic_logp import logp_function
from bayeslong.infer.priors import prior_draws, resolve_priors
from bayeslong.infer.sampling import stored_priors
from bayeslong.model.structure import build_structure, structure_for


def _design(name):
    """A random panel of 40 units at 5 waves (about 15% missing after wave 1)."""
    spec = bl.model(name)
    outcomes = ["y", "w"] if spec.processes == 2 else ["y"]
    rng = np.random.default_rng(0)
    y = rng.normal(size=(40, 5, len(outcomes))) + np.arange(5)[None, :, None]
    y[:, 1:][rng.uniform(size=y[:, 1:].shape) < 0.15] = np.nan
    return spec, bl.Panel(units=tuple(range(40)), waves=tuple(range(1, 6)),
                          outcomes=tuple(outcomes), y=y)


def _pymc_pair(spec, panel, priors=None):
    """The PyMC model's log density, its gradient, x -> its point, and the kernel."""
    from bayeslong.infer.pymc_model import build_model

    structure = structure_for(spec, panel)
    prior_set = resolve_priors(structure, panel, priors)
    model = build_model(spec, panel, prior_set)
    terms = model.compile_logp(sum=False, mode="FAST_COMPILE")
    dlogp = model.compile_dlogp(mode="FAST_COMPILE")
    ip = model.initial_point()
    parts = [(v.name, ip[v.name].shape) for v in model.value_vars]

    def point(x):
        out, pos = {}, 0
        for name, shape in parts:
            size = int(np.prod(shape))
            out[name] = x[pos:pos + size].reshape(shape)
            pos += size
        return out

    return (lambda p: float(sum(np.sum(t) for t in terms(p)))), dlogp, point, \
        logp_function(structure, prior_set, panel)


@pytest.mark.parametrize("name, groups", [
    ("alt", {"y": 4}), ("linear-growth", {}), ("bivariate-alt", {"y": 4, "w": 4}),
    ("ri-clpm", {"y": 4, "w": 4}), ("waves-free", {"y": 5}), ("clpm", {})])
def test_pooled_groups(name, groups):
    spec = bl.model(name)
    outcomes = ["y", "w"] if spec.processes == 2 else ["y"]
    s = build_structure(spec, outcomes=outcomes, n_waves=5)
    found = {o: len(m) for o, m in pooling.residual_groups(s)}
    assert found == groups
    for _, members in pooling.residual_groups(s):
        assert all(s.names[k].startswith("resid_var[") for k in members)


@pytest.mark.parametrize("name", ["alt", "bivariate-alt", "waves-free"])
def test_term_is_in_both_log_densities(name):
    """Default minus pooling off is the term, in the PyMC model and in the kernel; with
    bivariate-alt the pooled variances sit in covariance blocks (one per wave)."""
    spec, panel = _design(name)
    on = _pymc_pair(spec, panel)
    off = _pymc_pair(spec, panel, {"residual_pooling": None})
    half = _pymc_pair(spec, panel, {"residual_pooling": 0.5})
    structure = structure_for(spec, panel)
    pools = resolve_priors(structure, panel).pooling
    assert pools and all(g.tau == pooling.DEFAULT_TAU for g in pools)
    rng = np.random.default_rng(3)
    for _ in range(3):
        x = rng.normal(scale=0.5, size=on[3].layout.n_x)
        theta = natural(x, *on[3].layout.panel_buffers(panel))
        term = float(pooling.log_density(pools, theta))
        assert term < -1e-3  # the point is not pooled already: the check can fail
        assert on[0](on[2](x)) - off[0](off[2](x)) == pytest.approx(term, rel=1e-9)
        assert on[3](x)[0] - off[3](x)[0] == pytest.approx(term, rel=1e-9)
        scaled = term * (1 - pooling.DEFAULT_TAU ** 2 / 0.5 ** 2)
        assert on[3](x)[0] - half[3](x)[0] == pytest.approx(scaled, rel=1e-9)
        for pair in (on, half):  # value and gradient, kernel against PyMC
            value, grad = pair[3](x)
            assert value == pytest.approx(pair[0](pair[2](x)), rel=1e-10)
            ref = pair[1](pair[2](x))
            np.testing.assert_allclose(grad, ref, rtol=1e-10, atol=1e-10 * np.abs(ref).max())


def test_overrides_table_and_errors(sleep_free):
    structure, panel = sleep_free
    default = resolve_priors(structure, panel)
    table = default.table()
    row = table.loc["residual_pooling[y]"]
    assert row["family"] == pooling.FAMILY
    assert row["arguments"] == f"tau={pooling.DEFAULT_TAU:.4g}"
    assert row["source"] == "default" and "resid_var[2]" in row["on"]
    assert default.user_spec() == {}
    mine = resolve_priors(structure, panel, {"residual_pooling": 0.5})
    assert mine.pooling[0].tau == 0.5 and mine.table().loc["residual_pooling[y]", "source"] == "user"
    assert mine.user_spec() == {"residual_pooling": (0.5,)}
    assert resolve_priors(structure, panel, mine.user_spec()).pooling[0].tau == 0.5
    off = resolve_priors(structure, panel, {"residual_pooling": "off"})
    assert off.pooling == () and "residual_pooling[y]" not in off.table().index
    assert resolve_priors(structure, panel, off.user_spec()).pooling == ()
    assert default.key != off.key and default.key == mine.key  # tau is a model input
    assert mine.hyper[-1] == 0.5
    for bad in (0, -0.3, float("inf"), "tight", ("normal", 0, 1), True):
        with pytest.raises(SpecError, match="residual_pooling"):
            resolve_priors(structure, panel, {"residual_pooling": bad})
    with pytest.raises(SpecError, match="categorical"):
        resolve_priors(structure, panel, {"residual_pooling": 0.5}, pooling=False)
    assert resolve_priors(structure, panel, pooling=False).pooling == ()


@pytest.fixture(scope="module")
def sleep_free():
    spec = bl.model("alt")
    panel = _design("alt")[1]
    return structure_for(spec, panel), panel


def test_equal_residuals_are_not_pooled():
    spec, panel = _design("linear-growth")
    ps = resolve_priors(structure_for(spec, panel), panel, {"residual_pooling": 0.5})
    assert ps.pooling == () and ps.user_spec() == {}


def test_prior_draws_follow_the_pooled_prior(sleep_free):
    """With LogNormal(0, s) priors on the SDs the log-SDs l are jointly normal with precision
    I / s^2 + (I - J / m) / tau^2: the mean direction keeps variance s^2 (so mean(l) has
    variance s^2 / m) and every deviation direction has variance 1 / (1 / s^2 + 1 / tau^2),
    so Var(l_i - l_j) = 2 / (1 / s^2 + 1 / tau^2)."""
    structure, panel = sleep_free
    s, tau = 1.0, 0.35
    names = [n for n in structure.names if n.startswith("resid_var[")]
    ps = resolve_priors(structure, panel, {**{n: ("lognormal", 0.0, s) for n in names},
                                           "residual_pooling": tau})
    theta = prior_draws(ps, draws=6000, seed=5)
    logsd = 0.5 * np.log(theta[:, [structure.names.index(n) for n in names]])
    diff = logsd[:, 0] - logsd[:, 2]
    want = 2.0 / (1.0 / s ** 2 + 1.0 / tau ** 2)
    se = want * np.sqrt(2.0 / len(diff))
    assert abs(diff.var() - want) < 4 * se
    assert abs(logsd.mean(axis=1).var() - s ** 2 / len(names)) < 4 * (s ** 2 / 4) * np.sqrt(2 / 6000)
    # without the pooling the same draws are the independent priors' (variance 2 s^2)
    off = prior_draws(resolve_priors(structure, panel, {n: ("lognormal", 0.0, s) for n in names}
                                     | {"residual_pooling": None}), draws=6000, seed=5)
    loff = 0.5 * np.log(off[:, [structure.names.index(n) for n in names]])
    assert abs((loff[:, 0] - loff[:, 2]).var() - 2 * s ** 2) < 4 * 2 * s ** 2 * np.sqrt(2 / 6000)


def test_auxiliary_mean_draws_follow_the_pooled_prior(sleep_free):
    """The sampler for many waves (pooling.mean_draws) against the same closed form as the
    test above (LogNormal SD priors: the log-SDs are jointly normal), and against the exact
    rejection sampler under the default HalfNormal SD priors (two-sample Kolmogorov-Smirnov,
    scipy.stats.ks_2samp; p above 0.001 for each log-SD and for their spread)."""
    from scipy import stats

    from bayeslong.infer.priors import family_dist

    structure, panel = sleep_free
    s, tau = 1.0, 0.35
    names = [n for n in structure.names if n.startswith("resid_var[")]
    ps = resolve_priors(structure, panel, {**{n: ("lognormal", 0.0, s) for n in names},
                                           "residual_pooling": tau})
    logsd = np.log(pooling.mean_draws(ps.pooling[0], ps.priors, 6000, np.random.default_rng(4),
                                      family_dist))
    diff = logsd[:, 0] - logsd[:, 2]
    want = 2.0 / (1.0 / s ** 2 + 1.0 / tau ** 2)
    assert abs(diff.var() - want) < 4 * want * np.sqrt(2.0 / len(diff))
    assert abs(logsd.mean(axis=1).var() - s ** 2 / len(names)) < 4 * (s ** 2 / 4) * np.sqrt(2 / 6000)

    ps = resolve_priors(structure, panel, None)  # HalfNormal SD priors, tau 0.25
    aux = np.log(pooling.mean_draws(ps.pooling[0], ps.priors, 4000, np.random.default_rng(1),
                                    family_dist))
    rej = pooling.sd_draws(ps.pooling, ps.priors, 4000, np.random.default_rng(2), family_dist)
    rej = np.log(np.column_stack([rej[ps.priors[k].rv_name] for k in ps.pooling[0].members]))
    for j in range(aux.shape[1]):
        assert stats.ks_2samp(aux[:, j], rej[:, j]).pvalue > 1e-3
    assert stats.ks_2samp(aux.std(axis=1), rej.std(axis=1)).pvalue > 1e-3


def test_prior_draws_on_many_waves():
    # 13 pooled residual variances: rejection would need about 1e10 candidates for 300
    # draws at tau 0.25, so the auxiliary mean draws them
    rng = np.random.default_rng(3)
    panel = bl.Panel(units=tuple(range(30)), waves=tuple(range(1, 15)), outcomes=("y",),
                     y=rng.normal(size=(30, 14, 1)) + np.arange(14)[None, :, None])
    structure = structure_for(bl.model("alt"), panel)
    ps = resolve_priors(structure, panel, None)
    assert len(ps.pooling[0].members) == 13
    theta = prior_draws(ps, draws=300, seed=1)
    logsd = 0.5 * np.log(theta[:, list(ps.pooling[0].members)])
    assert np.isfinite(logsd).all()
    # the pooling shrinks the log-SDs towards their mean: the within-draw spread is far
    # below that of the independent HalfNormal priors (a HalfNormal SD's log has SD
    # sqrt(pi^2 / 8) = 1.11, the variance of log|Z| for a standard normal Z: a closed form)
    off = prior_draws(resolve_priors(structure, panel, {"residual_pooling": None}), draws=300,
                      seed=1)
    loff = 0.5 * np.log(off[:, list(ps.pooling[0].members)])
    assert logsd.std(axis=1).mean() < 0.5 * loff.std(axis=1).mean()


def test_log_prior_draws_include_the_term(sleep_free):
    from bayeslong.evaluate.power_scaling import log_prior_draws

    structure, panel = sleep_free
    theta = prior_draws(resolve_priors(structure, panel), draws=8, seed=2)
    post = types.SimpleNamespace(sizes={"chain": 2, "draw": 4})

    def fake(prior_set):
        return types.SimpleNamespace(prior_set=prior_set, structure=structure, panel=panel,
                                     idata=types.SimpleNamespace(posterior=post),
                                     theta_draws=lambda: theta)

    on = log_prior_draws(fake(resolve_priors(structure, panel)))
    off = log_prior_draws(fake(resolve_priors(structure, panel, {"residual_pooling": None})))
    term = pooling.log_density(resolve_priors(structure, panel).pooling, theta).reshape(2, 4)
    assert np.all(term < 0)
    np.testing.assert_allclose(on - off, term, rtol=1e-9)


def test_saved_fits_keep_their_pooling(sleep_free):
    structure, panel = sleep_free
    for given in ({}, {"residual_pooling": 0.5}, {"residual_pooling": None}):
        ps = resolve_priors(structure, panel, given)
        attrs = {"bayeslong_priors": json.dumps({k: list(v) for k, v in ps.user_spec().items()}),
                 "bayeslong_prior_table": json.dumps(ps.to_dict())}
        again = resolve_priors(structure, panel, stored_priors(attrs, "x.nc"))
        assert [g.tau for g in again.pooling] == [g.tau for g in ps.pooling]
    # a fit saved before the pooling was a default has no pooling row: it stays unpooled
    old = {k: v for k, v in resolve_priors(structure, panel).to_dict().items()
           if not k.startswith("residual_pooling")}
    attrs = {"bayeslong_priors": "{}", "bayeslong_prior_table": json.dumps(old)}
    assert resolve_priors(structure, panel, stored_priors(attrs, "x.nc")).pooling == ()


def test_kernel_gradient_of_the_term_by_finite_differences(sleep_free):
    structure, panel = sleep_free
    f = logp_function(structure, resolve_priors(structure, panel, {"residual_pooling": 0.2}), panel)
    x = np.random.default_rng(4).normal(scale=0.5, size=f.layout.n_x)
    grad = f(x)[1]
    h = 1e-6
    num = np.array([(f(x + h * e)[0] - f(x - h * e)[0]) / (2 * h) for e in np.eye(len(x))])
    np.testing.assert_allclose(grad, num, rtol=1e-5, atol=1e-5)
