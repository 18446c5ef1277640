"""The generic log posterior: a model structure, its priors and its data packed as arrays.

:mod:`bayeslong.infer.generic_kernel` holds one numba log density with its analytic
gradient, compiled once per machine (numba's on-disk cache). This module turns a
:class:`~bayeslong.model.structure.Structure`, a :class:`~bayeslong.infer.priors.PriorSet`
and a panel's pattern cross-products into the two flat buffers that function reads
(``ints``, ``floats``), and hands it to nutpie as a compiled C callback. Nothing here is
compiled per model structure: a new structure, option, data size or prior value only
fills new buffers (docs/engine.md, "Compile once per machine").

The unconstrained vector has the layout of the PyMC model of
:func:`bayeslong.infer.pymc_model.build_model`: first one entry per scalar random variable
(parameters with a ``value`` prior, and the SDs of variances outside LKJ blocks, in prior
order; PyMC's default transform for the family's support: none, log, or log-odds for
uniform), then per covariance block its SDs (one, when the block's variances are one parameter) and
its canonical partial correlations (atanh scale). The log density is the PyMC model's term for term, so the posterior is the same.
A prior given as a PyMC factory (a callable) has no array form: :func:`supported` is False
and :func:`bayeslong.infer.sampling.fit` takes the PyMC path.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from bayeslong.errors import SpecError
from bayeslong.infer.likelihood import pattern_arrays
from bayeslong.infer.priors import CPC_TRANSFORM, PriorSet, lkj_name, lkj_sd_name
from bayeslong.model.structure import Structure

#: Family name -> code of :func:`bayeslong.infer.generic_kernel.family_logp`.
FAMILY_CODES = {"normal": 0, "student_t": 1, "uniform": 2, "halfnormal": 3, "halfstudent_t": 4,
                "exponential": 5, "lognormal": 6, "gamma": 7}
_IDENTITY, _LOG, _INTERVAL = range(3)
_MATRICES = ("a", "B", "G", "Psi", "nu", "Lam", "Theta")
HEADER_SIZE = 36  # generic_kernel.HEADER_SIZE (that module imports numba; this one need not)
BLOCK_ROW = 6     # generic_kernel.BLOCK_ROW


def _transform(family: str) -> int:
    # PyMC's default transform for the support of the family
    if family in ("normal", "student_t"):
        return _IDENTITY
    return _INTERVAL if family == "uniform" else _LOG


def block_to_x(S: np.ndarray, tr: int, lo=None, hi=None) -> np.ndarray:
    """The unconstrained values of a covariance block ``S``: its SDs on the transform ``tr``'s
    scale (``lo``, ``hi``: the bounds of a uniform prior per member), then the canonical
    partial correlations' ``atanh`` (docs/engine.md); ``S`` is made PD if it is not."""
    w, v = np.linalg.eigh(S)
    S = (v * np.maximum(w, 1e-8 * max(w.max(), 1e-12))) @ v.T
    sd = np.sqrt(np.diag(S))
    L = np.linalg.cholesky(S / np.outer(sd, sd))
    q = len(sd)
    if tr == _LOG:
        head = np.log(sd)
    elif tr == _INTERVAL:
        u = np.clip((sd - lo) / (hi - lo), 1e-9, 1 - 1e-9)
        head = np.log(u / (1 - u))
    else:
        head = sd
    cpc = []
    for r in range(1, q):
        rest = 1.0
        for c in range(r):
            z = np.clip(L[r, c] / np.sqrt(rest), -1 + 1e-12, 1 - 1e-12)
            cpc.append(np.arctanh(z))
            rest -= L[r, c] ** 2
    return np.concatenate([head, cpc])


def supported(prior_set: PriorSet) -> bool:
    """True when every prior has an array form (no PyMC factory)."""
    return not prior_set.has_callable


def lkj_norm(n: int) -> float:
    """log normalising constant of LKJ(eta = 1) over n x n correlation matrices.

    PyMC's ``LKJCorr`` (the model draws the matrix with eta = 1 and adds
    (eta - 1) log det C as a potential) adds this constant; the formula is the eta = 1
    case of Lewandowski, Kurowicka & Joe (2009), as PyMC writes it. PyMC's graph types
    some of its number constants as single precision, so some terms are rounded to
    float32 there; the same rounding is reproduced here so that the two log densities
    agree to double-precision rounding (the difference would be a constant, without
    effect on the posterior).
    """
    from scipy.special import gammaln

    f32 = np.float32
    result = float(np.sum(gammaln(2.0 * np.arange(1, int((n - 1) / 2) + 1))))
    log2 = np.log(f32(2.0))
    if n % 2 == 1:
        result += (0.25 * (n**2 - 1) * math.log(math.pi) - float(f32(0.25 * (n - 1) ** 2) * log2)
                   - float(f32(n - 1) * f32(gammaln(int((n + 1) / 2)))))
    else:
        result += (0.25 * n * (n - 2) * math.log(math.pi) + float(f32(0.25 * (3 * n**2 - 4 * n)) * log2)
                   + float(f32(n) * f32(gammaln(f32(n / 2)))) - float(f32(n - 1) * f32(gammaln(n))))
    return float(result)


@dataclass(frozen=True, eq=False)
class Layout:
    """The structure and prior part of the buffers (no data), and the unconstrained layout.

    Attributes
    ----------
    ints, floats : numpy arrays
        Everything but the pattern data; :meth:`buffers` appends those.
    n_x : int
        Length of the unconstrained vector.
    value_names : list of (str, int)
        The PyMC model's value-variable name and size of each part of x, in order.
    """

    structure: Structure
    prior_set: PriorSet
    ints: np.ndarray
    floats: np.ndarray
    n_x: int
    value_names: tuple

    def buffers(self, counts, cross, masks) -> tuple[np.ndarray, np.ndarray]:
        """``(ints, floats)`` with the pattern data appended (float64, C order)."""
        ints = self.ints.copy()
        base = len(self.floats)
        # header slots (generic_kernel): 8 number of patterns; 27, 28, 29 where counts,
        # cross-products and masks start in floats
        counts, cross, masks = (np.ascontiguousarray(a, dtype=float) for a in (counts, cross, masks))
        ints[8] = len(counts)
        ints[27], ints[28], ints[29] = base, base + counts.size, base + counts.size + cross.size
        floats = np.concatenate([self.floats, counts.ravel(), cross.ravel(), masks.ravel()])
        return np.ascontiguousarray(ints), np.ascontiguousarray(floats)

    def panel_buffers(self, panel):
        return self.buffers(*pattern_arrays(panel.patterns()))

    def to_x(self, theta: np.ndarray) -> np.ndarray:
        """The unconstrained point of a natural parameter vector (blocks made PD if needed)."""
        theta = np.asarray(theta, dtype=float)
        x = np.zeros(self.n_x)
        n_scalar, so, sf = self.ints[6], self.ints[23], self.ints[24]
        for j in range(n_scalar):
            xp, k, _, target, tr = self.ints[so + 5 * j: so + 5 * j + 5]
            v = np.sqrt(max(theta[k], 1e-12)) if target == 1 else theta[k]
            lo, hi = self.floats[sf + 3 * j], self.floats[sf + 3 * j + 1]
            if tr == _LOG:
                v = math.log(max(v, 1e-300))
            elif tr == _INTERVAL:
                s = min(max((v - lo) / (hi - lo), 1e-9), 1 - 1e-9)
                v = math.log(s / (1 - s))
            x[xp] = v
        bo = self.ints[25]
        for b in range(self.ints[7]):
            off, q, _, mo, tr, nsd = self.ints[bo + BLOCK_ROW * b: bo + BLOCK_ROW * (b + 1)]
            idx = self.ints[mo + q: mo + q + q * q].reshape(q, q)
            h = self.ints[26] + sum(2 + 3 * self.ints[bo + BLOCK_ROW * k + 1] for k in range(b))
            lo, hi = self.floats[h + 2: h + 2 + 3 * q: 3], self.floats[h + 3: h + 3 + 3 * q: 3]
            head = block_to_x(theta[idx], tr, lo, hi)
            # one shared SD (strict invariance): the members' SDs are equal, keep one
            x[off: off + nsd + q * (q - 1) // 2] = head if nsd == q else np.r_[head[:1], head[q:]]
        return x


def layout(structure: Structure, prior_set: PriorSet) -> Layout:
    """The :class:`Layout` of a structure and prior set (raises SpecError for factories)."""
    if not supported(prior_set):
        raise SpecError("a prior given as a PyMC factory has no array form; the generic "
                        "kernel cannot take it (sampler='nutpie' or 'pymc' can)")
    return _build_layout(structure, prior_set)


def _build_layout(structure: Structure, prior_set: PriorSet) -> Layout:
    nL, nY, nW = len(structure.latents), len(structure.observed), len(structure.covariates)
    ints: list[int] = [0] * HEADER_SIZE
    floats: list[float] = []
    ints[1], ints[2], ints[3], ints[4], ints[5] = structure.n_params, nL, nY, nW, structure.path_depth
    for m, name in enumerate(_MATRICES):
        mat = structure.matrices[name]
        ints[9 + m] = len(ints)
        ints.extend(int(v) for v in mat.index.ravel())
        ints[16 + m] = len(floats)
        floats.extend(float(v) for v in mat.fixed.ravel())
    # entries that are linear combinations of parameters (Matrix.terms): matrix code, flat
    # position, parameter; their coefficients in floats (generic_kernel._fill)
    terms = [(m, int(pos), int(k), float(coef)) for m, name in enumerate(_MATRICES)
             for pos, k, coef in structure.matrices[name].terms]
    ints[30], ints[31], ints[32] = len(terms), len(ints), len(floats)
    ints.extend(v for m, pos, k, _ in terms for v in (m, pos, k))
    floats.extend(coef for *_, coef in terms)
    in_lkj = {int(i) for b in prior_set.blocks for i in np.diag(structure.blocks[b].index)}
    scalars, hyper, names = [], [], []
    for i, p in enumerate(prior_set.priors):
        if p.target == "correlation" or i in in_lkj:
            continue
        tr = _transform(p.family)
        scalars.append([len(scalars), i, FAMILY_CODES[p.family], 1 if p.target == "sd" else 0, tr])
        hyper.extend(list(p.args) + [0.0] * (3 - len(p.args)))
        names.append((p.rv_name + {_IDENTITY: "", _LOG: "_log__", _INTERVAL: "_interval__"}[tr], 1))
    n_x = len(scalars)
    ints[6] = len(scalars)
    ints[23] = len(ints)
    ints.extend(v for row in scalars for v in row)
    ints[24] = len(floats)
    floats.extend(hyper)
    table, members, bfloats = [], [], []
    suffix = {_IDENTITY: "", _LOG: "_log__", _INTERVAL: "_interval__"}
    for b in prior_set.blocks:
        idx = structure.blocks[b].index
        q = len(idx)
        diag = [int(i) for i in np.diag(idx)]
        family = prior_set.priors[diag[0]].family
        tr = _transform(family)
        nsd = 1 if len(set(diag)) == 1 else q  # one shared SD: the variances are one parameter
        table.append([n_x, q, FAMILY_CODES[family], -1, tr, nsd])
        members.append(diag + [int(v) for v in idx.ravel()])
        bfloats.extend([prior_set.lkj_eta(b), lkj_norm(q)])
        for i in diag:
            bfloats.extend(list(prior_set.priors[i].args) + [0.0] * (3 - len(prior_set.priors[i].args)))
        names.append((lkj_sd_name(prior_set, b) + suffix[tr], nsd))
        names.append((lkj_name(prior_set, b) + "_" + CPC_TRANSFORM + "__", q * (q - 1) // 2))
        n_x += nsd + q * (q - 1) // 2
    ints[7] = len(table)
    ints[25] = len(ints)
    member_start = len(ints) + BLOCK_ROW * len(table)
    for row, mem in zip(table, members):
        row[3] = member_start
        member_start += len(mem)
    ints.extend(v for row in table for v in row)
    for mem in members:
        ints.extend(mem)
    ints[26] = len(floats)
    floats.extend(bfloats)
    # pooling of residual log-SDs (header 33-35): per term its members, then the taus
    ints[33], ints[34] = len(prior_set.pooling), len(ints)
    for g in prior_set.pooling:
        ints.extend([len(g.members), *g.members])
    ints[35] = len(floats)
    floats.extend(g.tau for g in prior_set.pooling)
    ints[0] = n_x
    return Layout(structure=structure, prior_set=prior_set, ints=np.asarray(ints, dtype=np.int64),
                  floats=np.asarray(floats, dtype=float), n_x=n_x, value_names=tuple(names))


def logp_function(structure: Structure, prior_set: PriorSet, panel):
    """``f(x) -> (logp, gradient)`` of the posterior at the unconstrained point ``x``.

    Calls the cached numba kernel: no compilation per structure. For tests and benchmarks;
    the sampler calls the same kernel through its C callback.
    """
    from bayeslong.infer.generic_kernel import logp_grad

    lay = layout(structure, prior_set)
    ints, floats = lay.panel_buffers(panel)

    def f(x):
        return logp_grad(np.ascontiguousarray(x, dtype=float), ints, floats)

    f.layout = lay
    return f


def start_x(lay: Layout, panel, seed: int = 0) -> np.ndarray:
    """The start point: :func:`bayeslong.model.start.sampler_start` (the data-based values
    moved a little off the data's centre), correlations at 0, as the PyMC path starts
    (``sampling._start_point``)."""
    from bayeslong.model.start import sampler_start

    theta = np.array(sampler_start(lay.structure, panel, seed), dtype=float)
    theta = np.where(np.isin(np.arange(len(theta)), lay.structure.variance_params),
                     np.maximum(theta, 1e-6), theta)
    for b in lay.prior_set.blocks:  # correlations at 0
        idx = lay.structure.blocks[b].index
        off = ~np.eye(len(idx), dtype=bool)
        theta[idx[off]] = 0.0
    return lay.to_x(theta)


def nutpie_model(lay: Layout, panel, callback: str = "c", seed: int = 0):
    """A ``nutpie.sample``-able model of ``lay`` on ``panel``; nothing is compiled here.

    ``callback="c"``: nutpie calls the kernel's C callbacks directly (its compiled-model
    interface, as its PyMC front end does; no Python, no GIL per evaluation).
    ``callback="python"``: nutpie's public Python-function interface (``from_pyfunc``)
    around the same kernel, used when the C interface is not there (another nutpie
    version); each evaluation then goes through Python and holds the GIL.
    """
    ints, floats = lay.panel_buffers(panel)
    init = start_x(lay, panel, seed)
    names = list(lay.structure.names)
    try:
        from nutpie import _lib
        from nutpie.sample import CompiledModel

        c_interface = all(hasattr(_lib, n) for n in ("LogpFunc", "ExpandFunc", "PyMcModel"))
    except ImportError:  # pragma: no cover - nutpie without its extension module
        c_interface = False
    if callback == "python" or not c_interface:
        return _pyfunc_model(lay, ints, floats, init, names), init
    from bayeslong.infer import generic_kernel as gk

    user_data = np.array([ints.ctypes.data, ints.size, floats.ctypes.data, floats.size],
                         dtype=np.uint64)

    class _Compiled(CompiledModel):
        # nutpie's compiled-model protocol (a dataclass with ``dims``): n_dim, shapes,
        # coords, _make_sampler

        @property
        def n_dim(self):
            return lay.n_x

        @property
        def shapes(self):
            return {name: () for name in names}

        @property
        def coords(self):
            return {}

        def _make_model(self, init_mean):
            # the callbacks read the buffers through raw addresses: nutpie holds ``keep``
            # (the buffers and the address array) for as long as it holds the callbacks
            keep = (ints, floats, user_data, self)
            logp = _lib.LogpFunc(gk.logp_cfunc.address, user_data.ctypes.data, keep)
            expand = _lib.ExpandFunc(lay.n_x, len(names), gk.expand_cfunc.address,
                                     user_data.ctypes.data, keep)
            variables = _lib.PyVariable.new_variables(names, ["float64"] * len(names),
                                                      [()] * len(names), {}, {})

            def make_adapter(*args, **kwargs):
                from nutpie.transform_adapter import make_transform_adapter

                return make_transform_adapter()(*args, **kwargs, logp_fn=None)

            return _lib.PyMcModel(logp, expand, variables, lay.n_x, {}, {},
                                  lambda seed: init.copy(), make_adapter)

        def _make_sampler(self, settings, init_mean, cores, progress_type, store):
            return _lib.PySampler.from_pymc(settings, cores, self._make_model(init_mean),
                                            progress_type, store)

    return _Compiled(dims={}), init


def _pyfunc_model(lay: Layout, ints, floats, init, names):
    # nutpie's public interface: make_logp_fn() -> f(x) -> (logp, grad); the expand
    # function maps a draw to the named parameters
    from nutpie.compiled_pyfunc import from_pyfunc

    from bayeslong.infer.generic_kernel import logp_grad, natural

    def make_logp_fn():
        def logp(x, **_):
            value, grad = logp_grad(np.ascontiguousarray(x, dtype=float), ints, floats)
            return float(value), grad

        return logp

    def make_expand_fn(*_):
        def expand(x, **_):
            theta = natural(np.ascontiguousarray(x, dtype=float), ints, floats)
            return {name: np.asarray(theta[i]) for i, name in enumerate(names)}

        return expand

    return from_pyfunc(lay.n_x, make_logp_fn, make_expand_fn, [np.dtype("float64")] * len(names),
                       [()] * len(names), names, make_initial_point_fn=lambda seed: init.copy())


#: The kernel's entry points that numba compiles when :mod:`~bayeslong.infer.generic_kernel` is
#: imported (``cfunc(cache=True)``; the rest compiles with them).
KERNEL_ENTRIES = ("logp_cfunc", "expand_cfunc")
_KERNEL_MODULE = "bayeslong.infer.generic_kernel"


def kernel_cached() -> bool | None:
    """Whether numba's on-disk cache holds the kernel for this source, numba version and CPU.

    Reads the cache index of each of :data:`KERNEL_ENTRIES` where numba itself looks
    (``NUMBA_CACHE_DIR``, the ``__pycache__`` beside the module, or numba's user-wide cache
    directory) without importing the kernel, which would compile it on a cache miss. An
    index counts when numba would trust it: written by this numba version for the current
    source file (numba's stamp: modification time and size) and holding an entry for this
    CPU. Returns None when numba's cache layout is not the one expected (another numba
    version): then nothing can be said cheaply. docs/engine.md, "Compile once per machine".
    """
    import importlib.util
    import types

    try:
        from numba.core.caching import FunctionCache
        from numba.core.registry import cpu_target

        path = importlib.util.find_spec(_KERNEL_MODULE).origin
        with open(path, encoding="utf-8") as f:
            lines = f.read().splitlines()
        cpu = cpu_target.target_context.codegen().magic_tuple()
        for name in KERNEL_ENTRIES:
            line = next(i + 1 for i, text in enumerate(lines) if text.startswith(f"def {name}("))
            while line > 1 and lines[line - 2].startswith("@"):  # numba names the cache files
                line -= 1                                       # by the first decorator's line
            # a stand-in with the entry's file, name and first line: numba's cache for it is
            # the entry's own (its locator and file names depend on nothing else)
            code = compile(f"def {name}():\n    pass\n", path, "exec").co_consts[0]
            stand_in = types.FunctionType(code.replace(co_firstlineno=line), {})
            index = FunctionCache(stand_in)._cache_file._load_index()
            if not any(key[1] == cpu for key in index):
                return False
        return True
    except Exception:  # noqa: BLE001 - numba's private cache layout changed: cannot tell
        return None


def announce_compile(progressbar) -> bool:
    """Tell a ``progressbar`` callable that the kernel is about to be compiled, when it is.

    Sends one :class:`~bayeslong.infer.progress.SamplingProgress` with stage ``"compiling"``
    and sampler ``"generic"`` when the kernel is not loaded in this process yet and numba's
    cache has no entry for it (:func:`kernel_cached` is False): numba then compiles it
    (about half a minute, once per machine). Returns whether it sent one.
    """
    import sys

    if not callable(progressbar) or _KERNEL_MODULE in sys.modules or kernel_cached() is not False:
        return False
    from bayeslong.infer.progress import SamplingProgress

    progressbar(SamplingProgress(stage="compiling", sampler="generic"))
    return True


def sample(structure: Structure, prior_set: PriorSet, panel, *, draws, tune, chains, cores, seed,
           progressbar, names=None, callback: str = "c", target_accept: float = 0.8):
    """NUTS with nutpie on the generic kernel: ``(idata, compile seconds, sample seconds)``.

    "Compile" is loading the kernel: importing :mod:`bayeslong.infer.generic_kernel` loads
    its callbacks from numba's on-disk cache (or, once per machine, compiles them).
    Settings as :func:`bayeslong.infer.sampling.fit`; the low-rank-modified mass matrix is
    the one the PyMC path uses (see ``sampling._sample_nutpie`` for why).
    """
    import time

    announce_compile(progressbar)
    t0 = time.perf_counter()
    from bayeslong.infer import generic_kernel  # noqa: F401  (loads or compiles the kernel)

    compile_s = time.perf_counter() - t0
    compiled, init = nutpie_model(layout(structure, prior_set), panel, callback, seed)
    from bayeslong.infer.progress import run_nutpie

    t0 = time.perf_counter()
    idata = run_nutpie(compiled, draws=draws, tune=tune, chains=chains, cores=cores, seed=seed,
                       init_mean=init, progressbar=progressbar, target_accept=target_accept)
    return idata, compile_s, time.perf_counter() - t0
