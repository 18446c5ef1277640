"""The optimiser's unconstrained parameterisation: round trip and chain rule."""

import numpy as np
import pytest

import bayeslong as bl
from bayeslong.model.structure import build_structure
from bayeslong.model.transform import Unconstrained


@pytest.mark.parametrize("name", ["linear-growth", "alt", "ri-clpm"])
def test_round_trip_and_chain_rule(name):
    K = 2 if name == "ri-clpm" else 1
    s = build_structure(bl.model(name), outcomes=["y", "v"][:K], n_waves=5)
    tr = Unconstrained(s)
    rng = np.random.default_rng(0)
    u = rng.normal(0, 0.5, s.n_params)
    theta = tr.to_natural(u)
    for b in s.blocks:  # every block positive definite
        assert np.linalg.eigvalsh(theta[b.index]).min() > 0
    np.testing.assert_allclose(tr.from_natural(theta), u, atol=1e-10)
    # chain rule against central differences of a linear functional a . theta(u)
    a = rng.normal(size=s.n_params)
    h = 1e-6
    fd = np.array([(a @ tr.to_natural(u + h * e) - a @ tr.to_natural(u - h * e)) / (2 * h)
                   for e in np.eye(s.n_params)])
    np.testing.assert_allclose(tr.grad_to_u(u, a), fd, rtol=1e-6, atol=1e-8)


def test_sampler_start_moves_each_value_by_the_documented_amount():
    # bayeslong.model.start.NUDGE: means by 0.05-0.1 outcome SDs, variances by a factor
    # exp(+-0.1 .. +-0.2), lags and effects by 0.025-0.05; never by zero
    import numpy as np
    import pandas as pd

    import bayeslong as bl
    from bayeslong.model.start import sampler_start, start_values
    from bayeslong.model.structure import structure_for

    rng = np.random.default_rng(0)
    df = pd.DataFrame({"id": np.repeat(np.arange(40), 5), "t": np.tile(np.arange(5), 40),
                       "y": rng.normal(size=200) * 2.0})
    panel = bl.Panel.from_long(df, unit="id", wave="t", outcomes=["y"])
    s = structure_for(bl.model("alt"), panel)
    base, moved = start_values(s, panel), sampler_start(s, panel, seed=4)
    sd = float(np.nanstd(panel.y))
    for name, kind, b, m in zip(s.names, s.kinds, base, moved, strict=True):
        if kind in ("mean", "intercept"):
            assert 0.05 * sd - 1e-12 <= abs(m - b) <= 0.1 * sd + 1e-12, name
        elif kind == "var":
            assert 0.1 - 1e-12 <= abs(np.log(m / b)) <= 0.2 + 1e-12, name
        elif kind in ("lag", "effect", "loading"):
            assert 0.025 - 1e-12 <= abs(m - b) <= 0.05 + 1e-12, name
        else:
            assert m == b, name

@pytest.mark.parametrize("name", ["linear-growth", "ri-clpm"])
def test_plain_cholesky_round_trip_jacobian_and_curvature(name):
    from bayeslong.model.transform import Cholesky

    K = 2 if name == "ri-clpm" else 1
    s = build_structure(bl.model(name), outcomes=["y", "v"][:K], n_waves=5)
    tr = Cholesky(s)
    rng = np.random.default_rng(1)
    u = rng.normal(0, 0.5, s.n_params)
    for _, rows, cols, slots in tr.blocks:  # a positive diagonal: the factor is unique
        u[slots[rows == cols]] = np.abs(u[slots[rows == cols]]) + 0.1
    theta = tr.to_natural(u)
    np.testing.assert_allclose(tr.from_natural(theta), u, atol=1e-10)
    # Jacobian and the second-order term of a . theta(u) against central differences
    a = rng.normal(size=s.n_params)
    h = 1e-5
    eye = np.eye(s.n_params)
    fd = np.array([(tr.to_natural(u + h * e) - tr.to_natural(u - h * e)) / (2 * h) for e in eye]).T
    np.testing.assert_allclose(tr.jacobian(u), fd, atol=1e-8)
    grad = lambda v: tr.jacobian(v).T @ a  # noqa: E731
    fd2 = np.array([(grad(u + h * e) - grad(u - h * e)) / (2 * h) for e in eye])
    np.testing.assert_allclose(tr.curvature(a), fd2, atol=1e-7)
