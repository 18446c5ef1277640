"""The sampler's log-likelihood node: one PyTensor Op with an analytic gradient.

The model graph (:mod:`bayeslong.infer.pymc_model`) ends in ``PatternLogLik()(c, D, Sigma, counts,
cross, masks)``: the total pattern-grouped log-likelihood of docs/engine.md and its
derivatives with respect to the moments. Its gradient with respect to the parameters is
PyTensor's chain rule through :func:`bayeslong.model.moments.implied_moments`.

Two kernels compute the same numbers:

- ``perform`` (PyTensor's C and Python backends, so PyMC's NUTS) calls
  :func:`bayeslong.infer.likelihood.loglik_terms`, the NumPy function maximum likelihood uses;
- the numba backend (nutpie) compiles :func:`_kernel`, the same formulas as explicit loops.

Why an Op and not the batched graph written with PyTensor's linear algebra: measured on
``alt`` (N = 500, T = 6, load 3-5), the batched graph cost 56-71 us per evaluation in
numba with complete data and 317 us with 20 missing-data patterns (its batched Cholesky
and inverse loop per pattern), and 2.9-7.8 ms in PyTensor's C backend; the Op cost 30-54
and 84 us in numba and 0.5-1.2 ms in C, and its cached numba compile took 19 s against 59 s.
Tests hold both kernels to ``scipy.stats.multivariate_normal`` and to each other.

The graph keeps the pattern axis and masks as data inputs, so it has one structure per
spec and number of waves, and refits reuse the compiled function (docs/engine.md).
"""

from __future__ import annotations

import numpy as np
import pytensor.tensor as pt
from pytensor.graph.basic import Apply
from pytensor.graph.op import Op

from bayeslong.infer.likelihood import loglik_terms
from bayeslong.model.moments import implied_moments


class PatternLogLik(Op):
    """``(c, D, Sigma, counts, cross, masks) -> (loglik, dL/dc, dL/dD, dL/dSigma)``.

    Only the first output is meant to be used; the gradient of the log-likelihood with
    respect to ``c``, ``D`` and ``Sigma`` is read off the other three. The data inputs
    (``counts``, ``cross``, ``masks``) have no gradient. A covariance that is not positive
    definite gives ``-inf`` and a zero gradient, never an exception (an exception inside a
    sampler's log density cannot be pickled across processes).
    """

    __props__ = ()

    def make_node(self, c, D, Sigma, counts, cross, masks):
        inputs = [pt.as_tensor_variable(x).astype("float64")
                  for x in (c, D, Sigma, counts, cross, masks)]
        outputs = [pt.dscalar(), inputs[0].type(), inputs[1].type(), inputs[2].type()]
        return Apply(self, inputs, outputs)

    def perform(self, node, inputs, output_storage):
        c, D, Sigma, counts, cross, masks = inputs
        with np.errstate(all="ignore"):
            loglik, gc, gD, gS = loglik_terms(c, D, Sigma, counts, cross, masks)
        if gc is None:
            gc, gD, gS = np.zeros_like(c), np.zeros_like(D), np.zeros_like(Sigma)
        output_storage[0][0] = np.asarray(loglik, dtype=float)
        output_storage[1][0], output_storage[2][0], output_storage[3][0] = gc, gD, gS

    def infer_shape(self, fgraph, node, shapes):
        return [(), shapes[0], shapes[1], shapes[2]]

    def L_op(self, inputs, outputs, output_grads):
        from pytensor.gradient import DisconnectedType, grad_undefined

        g = output_grads[0]
        if isinstance(g.type, DisconnectedType):
            g = pt.constant(0.0)
        return [g * outputs[1], g * outputs[2], g * outputs[3]] + [
            grad_undefined(self, k, inputs[k], "data input") for k in range(3, 6)]

    def connection_pattern(self, node):
        return [[True, False, False, False]] * 6


def pattern_loglik(c, D, Sigma, counts, cross, masks):
    """Symbolic total log-likelihood over the patterns (a PyTensor scalar).

    The sampler's likelihood term: :class:`PatternLogLik`, whose value and gradient are
    :func:`bayeslong.infer.likelihood.loglik_terms` in PyTensor's C backend and the same
    formulas as a numba kernel in nutpie's backend.

    Parameters
    ----------
    c, D, Sigma : tensors from :func:`bayeslong.model.moments.implied_moments`
    counts : (P,) tensor, units per pattern
    cross : (P, U, U) tensor, augmented cross-products per pattern
    masks : (P, Y) tensor of 0/1, observed outcome entries per pattern
    """
    return PatternLogLik()(c, D, Sigma, counts, cross, masks)[0]


_LOGLIK: dict = {}


def compiled_loglik_function(structure, mode: str | None = None):
    """Compiled PyTensor ``f(theta, counts, cross, masks) -> (loglik, gradient)``.

    The graph the sampler differentiates (:func:`pattern_loglik` on
    :func:`bayeslong.model.moments.implied_moments`), compiled once per structure and mode; data
    are inputs, so every panel of the same design reuses it (docs/engine.md).
    ``mode="NUMBA"`` compiles it the way nutpie does (the numba kernel of the Op).
    """
    import pytensor
    import pytensor.tensor as pt

    key = (structure, mode)
    if key not in _LOGLIK:
        theta = pt.dvector("theta")
        counts, cross, masks = pt.dvector("counts"), pt.dtensor3("cross"), pt.dmatrix("masks")
        c, D, Sigma = implied_moments(structure, theta)
        total = pattern_loglik(c, D, Sigma, counts, cross, masks)
        _LOGLIK[key] = pytensor.function(
            [theta, counts, cross, masks], [total, pytensor.grad(total, theta)],
            on_unused_input="ignore", mode=mode)
    return _LOGLIK[key]


def _kernel_source():
    # the numba kernel (bayeslong.infer.generic_kernel.pattern_kernel, the one the generic
    # sampler also calls), imported on first use: numba's import costs seconds and only
    # the numba backend needs it; numba caches its machine code on disk
    from bayeslong.infer.generic_kernel import pattern_kernel

    return pattern_kernel


_KERNEL: list = []


def _kernel():
    if not _KERNEL:
        _KERNEL.append(_kernel_source())
    return _KERNEL[0]


try:  # the numba backend (nutpie) inlines the kernel instead of calling back into Python
    from pytensor.link.numba.dispatch.basic import (
        numba_njit,
        register_funcify_default_op_cache_key,
    )

    @register_funcify_default_op_cache_key(PatternLogLik)
    def _numba_pattern_loglik(op, node, **kwargs):
        kernel = _kernel()

        @numba_njit
        def pattern_loglik_numba(c, D, Sigma, counts, cross, masks):
            total, gc, gD, gS = kernel(np.ascontiguousarray(c), np.ascontiguousarray(D),
                                       np.ascontiguousarray(Sigma), np.ascontiguousarray(counts),
                                       np.ascontiguousarray(cross), np.ascontiguousarray(masks))
            return np.asarray(total), gc, gD, gS

        return pattern_loglik_numba
except ImportError:  # pragma: no cover - a PyTensor without the numba dispatcher
    pass
