"""Live progress of a fit: what the sampler is doing and how many draws each chain has done.

:func:`bayeslong.infer.sampling.fit` takes ``progressbar=callable``; the callable receives a
:class:`SamplingProgress` when compilation starts, repeatedly while the chains sample
(tuning iterations included, since they cost the same time), and once when sampling ends.
The workflow layer turns these into lines on stderr (``bayeslong run``); a user of the
Python API can pass ``progressbar=True`` for the sampler's own bar instead.

Where the numbers come from:

- nutpie renders its progress through a template on a timer (its ``template_callback``
  progress type, the mechanism behind its notebook display); :func:`sample_nutpie` asks it
  for a one-line template of the draws done per chain and parses it;
- PyMC's ``pm.sample(callback=...)`` is called after every draw with the chain and whether
  it is a tuning draw; :class:`PymcCounter` counts them and reports at most a few times a
  second.
"""

from __future__ import annotations

import re
import sys
import time
from dataclasses import dataclass
from typing import Callable

#: Seconds between two reports of a running sampler (at most).
REPORT_EVERY = 0.5


@dataclass(frozen=True)
class SamplingProgress:
    """One report of a running fit.

    Attributes
    ----------
    stage : str
        ``"compiling"`` (no draws yet), ``"sampling"`` or ``"done"``.
    done : tuple of int
        Iterations finished by each chain, tuning included.
    total : tuple of int
        Iterations each chain will run (tune + draws).
    divergences : int
        Divergent transitions so far, all chains: after warm-up with PyMC, as nutpie counts
        them (warm-up included) with nutpie.
    elapsed : float
        Seconds since sampling started (0 while compiling).
    sampler : str
    """

    stage: str
    done: tuple = ()
    total: tuple = ()
    divergences: int = 0
    elapsed: float = 0.0
    sampler: str = ""

    @property
    def fraction(self) -> float:
        """Share of all iterations done (0 to 1)."""
        total = sum(self.total)
        return min(1.0, sum(self.done) / total) if total else (1.0 if self.stage == "done" else 0.0)

    @property
    def seconds_left(self) -> float | None:
        """Estimated seconds to the end at the rate so far; None before there is a rate.

        A linear extrapolation: tuning iterations are usually slower than later ones (the
        step size is still being adapted), so early estimates err on the long side.
        """
        f = self.fraction
        if self.stage == "done":
            return 0.0
        if f <= 0.01 or self.elapsed < 1.0:
            return None
        return self.elapsed * (1.0 - f) / f


# --- nutpie ----------------------------------------------------------------------------------
#: The template nutpie renders for us: total draws, divergences, then done/total per chain.
_TEMPLATE = ("{% for chain in chains %}{{ chain.finished_draws }}/{{ chain.total_draws }}/"
             "{{ chain.divergences }};{% endfor %}")
_CHAIN = re.compile(r"(\d+)/(\d+)/(\d+);")


def parse_nutpie(text: str) -> tuple[tuple, tuple, int]:
    """Draws done and total per chain and the divergences, from :data:`_TEMPLATE` rendered."""
    rows = [tuple(int(v) for v in m.groups()) for m in _CHAIN.finditer(text)]
    return (tuple(r[0] for r in rows), tuple(r[1] for r in rows), sum(r[2] for r in rows))


def sample_nutpie(compiled, *, draws, tune, chains, cores, seed, init_mean, report,
                  low_rank: bool = True, target_accept: float = 0.8):
    """``nutpie.sample`` with the draws per chain sent to ``report`` as it runs.

    Builds the sampler as ``nutpie.sample`` does (nutpie 0.16) but with a
    ``template_callback`` progress type, and waits for it. Returns the InferenceData (no
    warm-up draws). Raises ``AttributeError`` or ``TypeError`` when this nutpie has
    another inner layout; the caller then samples with ``nutpie.sample`` and no live counts.
    """
    module = sys.modules["nutpie.sample"]
    lib = module._lib
    settings = (lib.PyNutsSettings.LowRank if low_rank else lib.PyNutsSettings.Diag)(seed)
    settings.num_tune, settings.num_draws, settings.num_chains = tune, draws, chains
    settings.target_accept = float(target_accept)  # write-only in nutpie 0.16, as it sets it
    t0 = time.perf_counter()

    def callback(text: str) -> None:
        done, total, div = parse_nutpie(text)
        report(SamplingProgress(stage="sampling", done=done, total=total, divergences=div,
                                elapsed=time.perf_counter() - t0, sampler="nutpie"))

    class _Sampler(module._BackgroundSampler):  # only the progress type differs
        def __init__(self):
            self._settings, self._compiled_model = settings, compiled
            self._save_warmup, self._return_raw_trace, self._html = False, False, None
            self._store = lib.PyStorage.arrow()
            kind = lib.ProgressType.template_callback(int(REPORT_EVERY * 1000), _TEMPLATE,
                                                      cores, callback)
            self._sampler = compiled._make_sampler(settings, init_mean, cores, kind, self._store)

    sampler = _Sampler()
    try:
        idata = sampler.wait()
    except KeyboardInterrupt:
        sampler.abort()
        raise
    n = draws + tune
    report(SamplingProgress(stage="done", done=(n,) * chains, total=(n,) * chains,
                            elapsed=time.perf_counter() - t0, sampler="nutpie"))
    return idata


# --- PyMC ------------------------------------------------------------------------------------
class PymcCounter:
    """A ``pm.sample(callback=...)`` that counts draws per chain and reports them.

    Parameters
    ----------
    chains, per_chain : int
        Chains and iterations per chain (tune + draws).
    report : callable
        Receives a :class:`SamplingProgress` at most every :data:`REPORT_EVERY` seconds,
        and when a chain ends.
    """

    def __init__(self, chains: int, per_chain: int, report: Callable[[SamplingProgress], None]):
        self.done = [0] * chains
        self.per_chain = per_chain
        self.report = report
        self.divergences = 0
        self.t0 = time.perf_counter()
        self.last = 0.0

    def _send(self, stage: str) -> None:
        self.report(SamplingProgress(stage=stage, done=tuple(self.done),
                                     total=(self.per_chain,) * len(self.done),
                                     divergences=self.divergences,
                                     elapsed=time.perf_counter() - self.t0, sampler="pymc"))

    def __call__(self, trace=None, draw=None) -> None:
        chain = int(getattr(draw, "chain", 0))
        if 0 <= chain < len(self.done):
            self.done[chain] += 1
        stats = getattr(draw, "stats", None) or ()
        if not getattr(draw, "tuning", False) and any(bool(s.get("diverging", False)) for s in stats if isinstance(s, dict)):
            self.divergences += 1
        now = time.perf_counter()
        if now - self.last >= REPORT_EVERY or getattr(draw, "is_last", False):
            self.last = now
            self._send("sampling")

    def finish(self) -> None:
        self.done = [self.per_chain] * len(self.done)
        self._send("done")


def run_nutpie(compiled, *, draws, tune, chains, cores, seed, init_mean, progressbar,
               target_accept: float = 0.8):
    """Sample ``compiled`` with nutpie's low-rank-modified mass matrix.

    A callable ``progressbar`` receives live counts per chain (:func:`sample_nutpie`; with
    another nutpie layout it samples without them); ``True`` shows nutpie's own bar. The
    low-rank modification: the lag correlates about -0.9 with the growth means in these
    posteriors, which a diagonal metric cannot absorb; measured on alt (N = 500, T = 6) it
    gave 7 times the effective sample size of the lag per fit, at fewer leapfrog steps per
    draw (bench/sampler_speed.py).
    """
    import nutpie

    if callable(progressbar):
        try:
            return sample_nutpie(compiled, draws=draws, tune=tune, chains=chains, cores=cores,
                                 seed=seed, init_mean=init_mean, report=progressbar,
                                 target_accept=target_accept)
        except (AttributeError, TypeError):  # another nutpie layout: sample without counts
            pass
    return nutpie.sample(compiled, draws=draws, tune=tune, chains=chains, cores=cores, seed=seed,
                         progress_bar=progressbar is True, init_mean=init_mean, save_warmup=False,
                         low_rank_modified_mass_matrix=True, target_accept=target_accept)

