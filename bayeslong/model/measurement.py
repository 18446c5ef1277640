"""The measurement part of a process measured by several indicators at every wave.

For indicator j of process k at wave t (docs/model-family.md, "Several indicators per wave"):

    y[i,j,t] = nu[j,t] + lambda[j,t] * eta[i,k,t] + eps[i,j,t],    eps ~ N(0, Theta)

Scale setting (marker indicator): the marker's loading is 1 at every wave, which gives each
wave's latent the marker's unit, and its intercept is 0 at the first wave, which sets the
latent's origin. Effects coding (``scale="effects"``; Little, Slegers & Card 2006) instead
makes the loadings average 1 at every wave and the intercepts sum to 0 where the marker's
would be 0, by writing the reference indicator's (the ``marker``, by default the first) as
J minus the other loadings and minus the other intercepts: the latent then has the
indicators' average unit and origin rather than one indicator's. Invariance over waves (Meredith 1993; Widaman & Reise 1997) makes parts
equal over waves: ``metric`` the loadings, ``scalar`` also the intercepts (the marker's then
0 at every wave), ``strict`` also the unique variances; ``configural`` none. Below scalar
invariance every indicator's intercept is free from the second wave on, the marker's too, so
the indicators say nothing about how the latent's mean moves over waves: a model that gives
those means a structure (growth means, wave intercepts) is not identified there, and
:func:`bayeslong.identify` names the parameters. That is the sense in which latent means
are comparable over waves only under scalar invariance (Meredith 1993). A release frees
named indicators from the level's equalities (partial invariance; Byrne, Shavelson &
Muthén 1989); as long as one indicator keeps its intercept equal over waves the growth means
stay identified (the marker's origin at the first wave, that indicator's intercept for how
the latent's mean moves).

Approximate invariance (``invariance="approximate"``; Muthén & Asparouhov 2012) is a
Bayesian middle way between scalar and configural: the loading and the intercept of every
indicator but the marker are ``common + deviation[t]`` at wave t, and each deviation has a
Normal(0, s) prior (infer/priors.py; ``deviation_sd``). The entry is a sum of two parameters,
written as a linear-combination entry of the structure (``Matrix.terms``), so the moments,
the generic kernel and the PyMC model take it as they take effects coding. The marker keeps
its loading 1 and intercept 0 at every wave (it sets the latent's unit and origin at every
wave); the common value and the deviations are identified only jointly with their prior,
so maximum likelihood refuses this level (infer/ml.py).

In the within form (the multiple-indicator RI-CLPM; Mulder & Hamaker 2021) each indicator
also loads 1 on a random intercept of its own, ``level[j]``, and the process's latent is
the within factor, which carries the lags. The within part has mean 0 at the first wave
and the random intercepts mean 0, so that zero is the origin: every indicator's intercept
is a parameter (the marker's too; effects coding then sets only the unit), and at scalar
invariance the within factor gets wave intercepts from wave 2 on (:func:`within_means_move`)
while the marker keeps one intercept with no per-wave deviation under approximate
invariance. Unique covariances over waves are not identified there (the random intercept
adds one variance to every pair of an indicator's waves) and are refused, as are growth
factors and ``intercepts="equal"`` where no indicator holds its intercept equal
(docs/model-family.md, "The multiple-indicator RI-CLPM").

Unique factors of the same indicator may covary over waves (``unique_covariance =
"same-indicator"``, the default): the specific part of an item recurs at every wave, and
leaving that covariance out pushes it into the latent's stability (common practice in
longitudinal factor models; Little 2013, ch. 5).

References
----------
Byrne, B. M., Shavelson, R. J. & Muthén, B. (1989). Testing for the equivalence of factor
covariance and mean structures: the issue of partial measurement invariance. Psychological
Bulletin 105(3), 456-466. doi:10.1037/0033-2909.105.3.456
Little, T. D. (2013). Longitudinal Structural Equation Modeling. Guilford Press.
Little, T. D., Slegers, D. W. & Card, N. A. (2006). A non-arbitrary method of identifying and
scaling latent variables in SEM and MACS models. Structural Equation Modeling 13(1), 59-72.
doi:10.1207/s15328007sem1301_3
Mulder, J. D. & Hamaker, E. L. (2021). Three extensions of the random intercept cross-lagged
panel model. Structural Equation Modeling 28(4), 638-648. doi:10.1080/10705511.2020.1784738
Muthén, B. & Asparouhov, T. (2012). Bayesian structural equation modeling: a more flexible
representation of substantive theory. Psychological Methods 17(3), 313-335.
doi:10.1037/a0026802
Meredith, W. (1993). Measurement invariance, factor analysis and factorial invariance.
Psychometrika 58(4), 525-543. doi:10.1007/BF02294825
Widaman, K. F. & Reise, S. P. (1997). Exploring the measurement invariance of psychological
instruments: applications in the substance use domain. In K. J. Bryant et al. (eds.), The
Science of Prevention, 281-324. American Psychological Association.
"""

from __future__ import annotations

import difflib

from bayeslong.errors import SpecError

#: Which parts each invariance level holds equal over waves.
EQUAL_PARTS = {
    "configural": (),
    "metric": ("loading",),
    "scalar": ("loading", "intercept"),
    "strict": ("loading", "intercept", "unique_var"),
    # equal up to a per-wave deviation with a small prior (see module notes)
    "approximate": ("loading", "intercept"),
}

#: Names of the per-wave deviations of approximate invariance, by part.
DEVIATION_BASES = {"loading": "loading_deviation", "intercept": "intercept_deviation"}


def _label(base: str, *keys) -> str:
    keys = [str(k) for k in keys if k is not None and k != ""]
    return f"{base}[{','.join(keys)}]" if keys else base


def settle_design(spec, outcomes: tuple, indicators) -> dict[str, tuple[str, ...]]:
    """The process -> indicators mapping of a design, with the spec's names checked.

    ``None`` is today's design (each process its own single indicator). A ``marker`` or
    ``release`` naming no indicator of a process with several indicators is refused with
    the nearest name.
    """
    if indicators is None:
        indicators = {name: (name,) for name in outcomes}
    indicators = {k: tuple(indicators[k]) for k in outcomes}
    several = [n for g in indicators.values() if len(g) > 1 for n in g]
    m = spec.measurement
    named = [("marker", n) for n in (m["marker"] or ())]
    named += [("release", n) for part in m["release"].values() for n in part]
    for option, name in named:
        if name not in several:
            close = difflib.get_close_matches(str(name), several, n=1)
            hint = f"; did you mean {close[0]!r}?" if close else ""
            have = ", ".join(several) if several else "none: every process has one indicator"
            raise SpecError(f"`{option}` names {name!r}, which is not an indicator of a process "
                            f"measured by several indicators{hint} (indicators: {have})")
    if several and spec.form == "within":
        _check_within(spec, indicators)
    return indicators


def _check_within(spec, indicators: dict) -> None:
    """Refuse the options the within form with several indicators cannot identify (module notes)."""
    m = spec.measurement
    where = f"model '{spec.name}' (within-person form, several indicators per wave)"
    if tuple(spec.factors) != ("level",):
        raise SpecError(f"{where} takes random intercepts only (factors = [\"level\"]); got "
                        f"factors = {list(spec.factors)}: growth factors on indicators are not "
                        "available in the within form")
    if m["unique_covariance"] == "same-indicator":
        raise SpecError(f"`unique_covariance = \"same-indicator\"` is not identified in {where}: "
                        "each indicator's random intercept already gives its scores one "
                        "covariance shared by every pair of waves, and free unique covariances "
                        "over waves would absorb it; set unique_covariance=\"none\"")
    groups = [g for g in indicators.values() if len(g) > 1]
    if spec.options.get("intercepts") == "equal" and not all(within_means_move(spec, g)
                                                             for g in groups):
        freed = m["release"]["intercept"]
        raise SpecError(f"`intercepts = \"equal\"` has nothing to act on in {where} with "
                        f"invariance={m['invariance']!r}"
                        + (f" and the intercepts of {', '.join(freed)} released" if freed else "")
                        + ": no "
                        "indicator holds its intercept equal over waves, so every wave's means "
                        "are the indicators' own intercepts; leave `intercepts` at \"free\", or "
                        "hold at least one indicator's intercept equal (invariance=\"scalar\" "
                        "without releasing it)")


def within_means_move(spec, names: tuple[str, ...]) -> bool:
    """Whether the within factor of a process measured by ``names`` gets wave intercepts.

    In the within form the indicators' intercepts are the first wave's means; the within
    factor's mean may move from wave 2 on when at least one indicator holds its intercept
    equal over waves (scalar invariance or above, not all released), which ties the
    indicators' mean changes to the loadings (module notes).
    """
    m = spec.measurement
    if "intercept" not in EQUAL_PARTS[m["invariance"]]:
        return False
    return any(n not in m["release"]["intercept"] for n in names)


def nearest_exact(spec):
    """``(spec, note)``: the spec maximum-likelihood steps use, and a note when it differs.

    Approximate invariance has no maximum-likelihood estimate (module notes); its nearest
    exact level is scalar invariance, which it becomes as the deviations' prior narrows. A
    spec at any other level comes back unchanged with an empty note.
    """
    if spec.measurement["invariance"] != "approximate":
        return spec, ""
    return spec.replace(invariance="scalar"), (
        "approximate invariance has no maximum-likelihood estimate (the common values and the "
        "per-wave deviations of loadings and intercepts are told apart only by the "
        "deviations' prior), so the maximum-likelihood steps of this model (identification "
        "check, maximum-likelihood fit and its AIC/BIC) use scalar invariance, the nearest "
        "exact level; a Bayesian fit keeps approximate invariance")


def marker_of(spec, names: tuple[str, ...]) -> str:
    """The process's marker: the one named by the ``marker`` option, else its first indicator."""
    chosen = [n for n in (spec.measurement["marker"] or ()) if n in names]
    if len(chosen) > 1:
        raise SpecError(f"`marker` names {chosen[0]!r} and {chosen[1]!r}, two indicators of one "
                        "process; give one marker per process")
    return chosen[0] if chosen else names[0]


def add_indicators(tab, spec, names: tuple[str, ...], T: int, eta_row, obs_row,
                   intercept_row=None) -> set[int]:
    """Fill Lam, nu and Theta for one process measured by ``names`` (see module notes).

    ``eta_row(t)`` is the row of the process's latent at wave t, ``obs_row(j, t)`` that of
    indicator ``names[j]`` at wave t. Returns the waves at which the marker's intercept is
    free (below scalar invariance, or released): there the indicators carry the latent's
    mean, and the structural part adds no wave intercept of its own.

    ``intercept_row(j)``, given in the within form, is the row of indicator ``names[j]``'s
    random intercept: the indicator loads 1 on it at every wave, and the marker's intercept
    is a parameter like the others (the within factor's zero mean at the first wave is the
    origin), with no per-wave deviation under approximate invariance (module notes).
    """
    m = spec.measurement
    marker = marker_of(spec, names)
    effects = m["scale"] == "effects"
    equal = set(EQUAL_PARTS[m["invariance"]])
    released = m["release"]
    for part in ("loading",):
        if marker in released[part]:
            raise SpecError(f"`release` frees the loading of {marker!r}, the marker indicator, "
                            "whose loading 1 sets the latent's unit; release another indicator "
                            "or choose another marker with marker='<indicator>'")

    def equal_over_waves(part: str, name: str) -> bool:
        return part in equal and name not in released[part]

    approximate = m["invariance"] == "approximate"

    def parts(part: str, name: str, t: int, coef: float = 1.0) -> list[tuple[str, str, float]]:
        # the parameters whose sum is ``part`` of indicator ``name`` at wave t: one, or under
        # approximate invariance the common value plus the wave's deviation
        if not equal_over_waves(part, name):
            return [(_label(part, name, t), part, coef)]
        common = [(_label(part, name), part, coef)]
        if approximate:
            common.append((_label(DEVIATION_BASES[part], name, t), "deviation", coef))
        return common

    def place(which: str, pos, part: str, name: str, t: int) -> None:
        (label, kind, _), *more = parts(part, name, t)
        if more:
            tab.combine(which, pos, 0.0, parts(part, name, t))
        else:
            tab.put(which, pos, label, kind)

    others = [n for n in names if n != marker]
    within = intercept_row is not None
    free_origin: set[int] = set()
    for j, name in enumerate(names):
        for t in range(1, T + 1):
            row = obs_row(j, t)
            if within:  # the indicator's own random intercept (Mulder & Hamaker 2021)
                tab.fix("Lam", (row, intercept_row(j)), 1.0)
            if name == marker and effects:
                # effects coding: the loadings average 1 at every wave, so this one is
                # J - (sum of the others) (Little, Slegers & Card 2006)
                tab.combine("Lam", (row, eta_row(t)), float(len(names)),
                            [p for n in others for p in parts("loading", n, t, -1.0)])
            elif name == marker:
                tab.fix("Lam", (row, eta_row(t)), 1.0)
            else:
                place("Lam", (row, eta_row(t)), "loading", name, t)
            same = equal_over_waves("intercept", name)
            if within:
                if name == marker and same:  # the marker carries the within factor's mean
                    tab.put("nu", row, _label("intercept", name), "intercept")
                else:
                    place("nu", row, "intercept", name, t)
                continue
            if name == marker and (same or t == 1):
                if effects:  # the intercepts sum to 0: this one is minus the others
                    tab.combine("nu", row, 0.0,
                                [p for n in others for p in parts("intercept", n, t, -1.0)])
                else:
                    tab.fix("nu", row, 0.0)
                continue
            if name == marker:
                free_origin.add(t)
            place("nu", row, "intercept", name, t)
        # unique variances and, if asked, their covariances over waves
        same = equal_over_waves("unique_var", name)
        var = [_label("unique_var", name, None if same else t) for t in range(1, T + 1)]
        rows = [obs_row(j, t) for t in range(1, T + 1)]
        if m["unique_covariance"] == "same-indicator":
            tab.block("Theta", rows, [[var[r] if r == c else _label("unique_cov", name, c + 1, r + 1)
                                       if c < r else None for c in range(T)] for r in range(T)])
        else:
            for t in range(T):
                tab.block("Theta", [rows[t]], [[var[t]]])
    return free_origin
