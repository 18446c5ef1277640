"""Convergence diagnostics of a fit: R-hat, ESS, divergences, E-BFMI, and their warning.

One table per fit (:func:`diagnose`), read by ``Fit.diagnostics``, the report and the
sampler's careful re-run (:func:`flagged`); :func:`warn_convergence` turns its flags into
one warning that names each parameter and threshold.
"""

from __future__ import annotations

import contextlib
import warnings
import weakref

import numpy as np
import pandas as pd

from bayeslong.errors import ConvergenceWarning

#: Convergence thresholds (Vehtari et al. 2021): R-hat below 1.01, bulk and tail ESS above
#: 100 per chain (400 for 4 chains). E-BFMI below 0.3 flags a chain (Betancourt 2016, common
#: practice).
RHAT_MAX = 1.01
ESS_PER_CHAIN = 100
EBFMI_MIN = 0.3



@contextlib.contextmanager
def convergence_problems(drop=None):
    """Collect the convergence warnings raised inside the block, and pass every warning on.

    Yields a list that, when the block ends, holds the text of each ConvergenceWarning (a
    refit's problems, kept with its score); every warning is then re-issued, except those
    for which ``drop(warning)`` is true.
    """
    problems: list[str] = []
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", ConvergenceWarning)
        yield problems
    for w in caught:
        if issubclass(w.category, ConvergenceWarning):
            problems.append(str(w.message))
        elif drop is not None and drop(w):
            continue
        warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)


def _stat(stats, *names):
    for name in names:
        if name in stats:
            return stats[name]
    return None


@contextlib.contextmanager
def _arviz_numpy():
    """ArviZ's NumPy code paths for the diagnostics, whatever its global numba switch.

    With numba installed ArviZ compiles its own numba helpers in every new process (about
    1-2 s measured under load, more than the diagnostics of a few dozen parameters cost in
    NumPy); the first fit in a process would pay it. The switch is restored afterwards.
    """
    from arviz.utils import Numba

    was = Numba.numba_flag
    Numba.numba_flag = False
    try:
        yield
    finally:
        Numba.numba_flag = was


#: Tables already computed, by posterior (the draws of a fit do not change once sampled; a
#: report asks for the same fit's table several times, about 0.2-0.7 s each).
#: Keyed by id, checked by a weak reference (a Dataset is not hashable); an entry goes
#: when its posterior does.
_DONE: dict[int, tuple[weakref.ref, dict]] = {}


def diagnose(idata, names) -> pd.DataFrame:
    """Per-parameter R-hat and ESS with flags, and run-level checks in ``attrs`` (see Fit.diagnostics)."""
    post, names = idata.posterior, tuple(names)
    ref, done = _DONE.get(id(post), (None, None))
    if ref is None or ref() is not post:
        done = {}
        _DONE[id(post)] = (weakref.ref(post, lambda _, k=id(post): _DONE.pop(k, None)), done)
    if names not in done:
        with _arviz_numpy():
            done[names] = _diagnose(idata, names)
    return done[names].copy(deep=True)


def _diagnose(idata, names) -> pd.DataFrame:
    import arviz as az

    post = idata.posterior[list(names)]
    chains = int(post.sizes["chain"])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # ArviZ warns on single chains; the flags say it
        rhat = az.rhat(post)
        bulk = az.ess(post, method="bulk")
        tail = az.ess(post, method="tail")
    ess_min = ESS_PER_CHAIN * chains
    rows = []
    for name in names:
        r, b, t = float(rhat[name]), float(bulk[name]), float(tail[name])
        flags = []
        if not (r < RHAT_MAX):
            flags.append(f"r_hat {r:.3f} >= {RHAT_MAX}")
        if not (b > ess_min):
            flags.append(f"ess_bulk {b:.0f} <= {ess_min}")
        if not (t > ess_min):
            flags.append(f"ess_tail {t:.0f} <= {ess_min}")
        rows.append({"parameter": name, "r_hat": r, "ess_bulk": b, "ess_tail": t,
                     "flag": "; ".join(flags)})
    table = pd.DataFrame(rows).set_index("parameter")
    stats = idata.sample_stats if "sample_stats" in idata.groups() else {}
    div = _stat(stats, "diverging")
    energy = _stat(stats, "energy")
    depth_hit = _stat(stats, "reached_max_treedepth", "maxdepth_reached")
    table.attrs["divergences"] = int(np.asarray(div).sum()) if div is not None else 0
    if energy is not None and energy.sizes.get("draw", 0) > 2:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            table.attrs["ebfmi"] = [float(v) for v in az.bfmi(idata)]
    else:
        table.attrs["ebfmi"] = []
    table.attrs["treedepth_share"] = float(np.asarray(depth_hit).mean()) if depth_hit is not None else 0.0
    table.attrs["thresholds"] = {"r_hat": RHAT_MAX, "ess_bulk": ess_min, "ess_tail": ess_min,
                                 "ebfmi": EBFMI_MIN}
    return table


def flagged(table: pd.DataFrame) -> str:
    """The flags of a diagnostics table in one line ("" when none), as the warning says them."""
    parts = [f"{name}: {flag}" for name, flag in table["flag"].items() if flag]
    if table.attrs.get("divergences", 0):
        parts.append(f"{table.attrs['divergences']} divergent transitions after warm-up "
                     "(threshold 0)")
    low = [i for i, v in enumerate(table.attrs.get("ebfmi", [])) if v < EBFMI_MIN]
    if low:
        parts.append("E-BFMI below " + f"{EBFMI_MIN} in chain(s) " + ", ".join(map(str, low)))
    return "; ".join(parts)


def warn_convergence(table: pd.DataFrame, *, stacklevel: int = 3,
                     advice: str = "Run more draws or chains (draws=, chains=), or check the "
                                   "model and priors.") -> None:
    """Emit one ConvergenceWarning naming each flagged parameter and threshold.

    ``advice`` ends the message: what to try (a kind of fit may know better than the
    generic default, e.g. a categorical fit).
    """
    problems = flagged(table)
    if problems:
        warnings.warn(
            "the fit has not converged by the criteria of Vehtari et al. (2021) (R-hat < "
            f"{RHAT_MAX}, bulk and tail ESS > {ESS_PER_CHAIN} per chain): " + problems
            + ". " + advice, ConvergenceWarning, stacklevel=stacklevel)
