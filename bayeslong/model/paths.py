"""Paths among several processes: cross-lags, same-wave paths, cross-loadings.

With K processes the structural part of every wave t >= 2 is (docs/model-family.md,
"Several processes")

    eta[., t] = ... + B0 eta[., t] + R eta[., t-1] + zeta[., t],    zeta ~ N(0, Psi_t)

R holds the lags (diagonal) and cross-lags (off the diagonal; all of them by default, any
one dropped by name with ``cross_lags={"drop": ["stress<-sleep"]}``, all with
``cross_lags="none"``). B0 holds the same-wave paths the user names (``same_wave =
["sleep<-stress"]``: sleep at wave t regressed on stress at wave t). They must be
recursive: the latents of one wave must be orderable so that each depends only on earlier
ones, else (I - B0) may be singular and the model says nothing about the direction; a loop
is refused with its members named. A same-wave path k <- l replaces the disturbance
covariance of k and l at that wave: both explain the same covariance of the wave, and with
wave-constant parameters the two cannot be told apart, since for every value of the path a
disturbance covariance reproduces the same reduced form (the identification problem of a
structural vector autoregression; Lütkepohl 2005, ch. 9). So the pair's disturbance
covariance is fixed at 0, and the other pairs of the wave keep theirs. The first wave, whose
latents have a free covariance (predetermined) or their own disturbance block (endogenous),
has no same-wave path.

An indicator measures its own process and, when the user says so
(``cross_loadings={"woke_rarely": "stress"}``), also the latent of another process at the
same wave: ``loading[woke_rarely<-stress]``, equal over waves where the invariance level holds
loadings equal (and the indicator's loading is not released), else one per wave.

Names are checked here against the panel's processes and indicators, every refusal with the
nearest name.

References
----------
Hamaker, E. L., Kuiper, R. M. & Grasman, R. P. P. P. (2015). A critique of the cross-lagged
panel model. Psychological Methods 20(1), 102-116. doi:10.1037/a0038889
Lütkepohl, H. (2005). New Introduction to Multiple Time Series Analysis, ch. 9 (structural
vector autoregressions). Springer. doi:10.1007/978-3-540-27752-1
"""

from __future__ import annotations

import difflib
from dataclasses import dataclass

from bayeslong.errors import SpecError
from bayeslong.model.measurement import EQUAL_PARTS


@dataclass(frozen=True)
class Paths:
    """The settled paths of one spec on one set of processes (indices into the outcomes)."""

    lags: frozenset  # (k, l): eta[k, t] on eta[l, t-1]
    same_wave: tuple  # (k, l): eta[k, t] on eta[l, t], in the order given
    uncorrelated: frozenset  # frozenset({k, l}): disturbance covariance fixed at 0

    def groups(self, K: int) -> list[list[int]]:
        """The processes whose disturbances share a covariance block.

        Connected parts of the graph whose edges are the free disturbance covariances; a
        part may still hold a pair fixed at 0 (three processes, one same-wave path).
        """
        seen, out = set(), []
        for start in range(K):
            if start in seen:
                continue
            part, todo = [], [start]
            while todo:
                k = todo.pop()
                if k in seen:
                    continue
                seen.add(k)
                part.append(k)
                todo += [l for l in range(K) if l not in seen
                         and frozenset((k, l)) not in self.uncorrelated]
            out.append(sorted(part))
        return out


def _hint(name: str, choices) -> str:
    close = difflib.get_close_matches(str(name), [str(c) for c in choices], n=1, cutoff=0.5)
    return f"; did you mean {close[0]!r}?" if close else ""


def _index(name: str, outcomes: tuple, option: str, pair: str) -> int:
    if name not in outcomes:
        raise SpecError(f"`{option}` names the process {name!r} (in {pair!r}), which is not a "
                        f"process of the panel{_hint(name, outcomes)} (processes: "
                        f"{', '.join(map(str, outcomes))})")
    return outcomes.index(name)


def _pairs(pairs, outcomes: tuple, option: str) -> list[tuple[int, int]]:
    out = []
    for pair in pairs:
        y, _, x = pair.partition("<-")
        out.append((_index(y, outcomes, option, pair), _index(x, outcomes, option, pair)))
    return out


def _loop(edges: list[tuple[int, int]], K: int) -> list[int] | None:
    """A cycle of the directed graph x -> y for (y, x) in ``edges``, as a node list, or None."""
    after = {k: [y for y, x in edges if x == k] for k in range(K)}
    state = dict.fromkeys(range(K), 0)  # 0 new, 1 on the current path, 2 done
    path: list[int] = []

    def visit(k):
        state[k] = 1
        path.append(k)
        for nxt in after[k]:
            if state[nxt] == 1:
                return path[path.index(nxt):] + [nxt]
            if state[nxt] == 0:
                found = visit(nxt)
                if found:
                    return found
        state[k] = 2
        path.pop()
        return None

    for k in range(K):
        if state[k] == 0:
            found = visit(k)
            if found:
                return found
    return None


def settle_paths(spec, outcomes: tuple) -> Paths:
    """Check the spec's path options against ``outcomes`` and settle them (module notes)."""
    outcomes = tuple(outcomes)
    K = len(outcomes)
    p = spec.paths
    cross = p["cross_lags"]
    drop = _pairs(cross["drop"] if isinstance(cross, dict) else (), outcomes, "cross_lags")
    if drop and spec.options["lag"] == "none":
        raise SpecError(f"`cross_lags` drops {cross['drop'][0]!r}, but model '{spec.name}' has no "
                        "lag (lag = 'none'); leave `cross_lags` out or choose a lag")
    if cross == "none":
        lags = {(k, k) for k in range(K)}
    else:
        lags = {(k, l) for k in range(K) for l in range(K)} - set(drop)
    same = _pairs(p["same_wave"], outcomes, "same_wave")
    if same and spec.residuals_at != "latent":
        raise SpecError(f"`same_wave` needs latent disturbances, and model '{spec.name}' puts its "
                        "residuals on the indicators (a disturbance-free latent); choose a model "
                        "with residuals_at = \"latent\" or leave `same_wave` out")
    loop = _loop(same, K)
    if loop:
        shown = " -> ".join(str(outcomes[k]) for k in loop)
        raise SpecError(
            f"the same-wave paths of model '{spec.name}' form a loop, {shown}: the latents of "
            "one wave must be ordered so that each depends only on those before it (a "
            "recursive model); drop one path of the loop from `same_wave`")
    return Paths(lags=frozenset(lags), same_wave=tuple(same),
                 uncorrelated=frozenset(frozenset(e) for e in same))


def settle_cross_loadings(spec, outcomes: tuple, indicators: dict) -> list[tuple[str, int, int]]:
    """``(indicator, its process, the other process)`` for each cross-loading the spec names.

    An indicator must belong to a process measured by several indicators; the other process
    must be a process of the panel other than the indicator's own.
    """
    outcomes = tuple(outcomes)
    home = {n: k for k, name in enumerate(outcomes) for n in indicators[name]
            if len(indicators[name]) > 1}
    out = []
    for name, targets in spec.measurement["cross_loadings"].items():
        if name not in home:
            have = ", ".join(home) if home else "none: every process has one indicator"
            raise SpecError(f"`cross_loadings` names {name!r}, which is not an indicator of a "
                            f"process measured by several indicators{_hint(name, home)} "
                            f"(indicators: {have})")
        for target in targets:
            if target not in outcomes:
                raise SpecError(f"`cross_loadings` lets {name!r} load on {target!r}, which is not "
                                f"a process of the panel{_hint(target, outcomes)} (processes: "
                                f"{', '.join(map(str, outcomes))})")
            if outcomes.index(target) == home[name]:
                raise SpecError(f"`cross_loadings` lets {name!r} load on {target!r}, its own "
                                "process; a cross-loading is on another process")
            out.append((name, home[name], outcomes.index(target)))
    return out


def cross_loading_name(spec, indicator: str, process: str, t: int) -> str:
    """``loading[j<-k]`` (equal over waves) or ``loading[j<-k,t]``, as the indicator's loading."""
    m = spec.measurement
    equal = "loading" in EQUAL_PARTS[m["invariance"]] and indicator not in m["release"]["loading"]
    return f"loading[{indicator}<-{process}]" if equal else f"loading[{indicator}<-{process},{t}]"
