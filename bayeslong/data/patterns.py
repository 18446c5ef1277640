"""Missing-data patterns of a panel and their sufficient statistics.

Units are grouped by which outcome entries they have observed; each group keeps the
augmented cross-product matrix of its units, all the pattern-grouped likelihood needs
(docs/engine.md, "Pattern-grouped likelihood").
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from bayeslong.data.validation import arrays_equal
from bayeslong.errors import DataError


@dataclass(frozen=True, kw_only=True, eq=False)
class Patterns:
    """Missing-data patterns of a panel's outcomes and their sufficient statistics.

    Units with the same set of observed outcome entries form one pattern; the likelihood
    engine evaluates each pattern once, from its cross-product matrix (docs/engine.md).

    Parameters
    ----------
    masks : numpy.ndarray of bool, shape (P, K*T)
        Observed entries of :meth:`Panel.outcome_matrix` for each pattern. The complete
        pattern (every entry observed) comes first when some unit has it; the rest follow by
        number of observed entries, most first, then by which entries are observed (earlier
        entries observed first).
    counts : numpy.ndarray of int, shape (P,)
        Number of units in each pattern.
    unit_pattern : numpy.ndarray of int, shape (N,)
        Pattern index of each unit (in :attr:`Panel.units` order).
    cross : numpy.ndarray of float, shape (P, U, U)
        ``cross[p] = sum_{i in p} u_i u_i'`` with ``U = 1 + W + K*T`` and
        ``u_i = (1, w_i, y_i)``: a leading 1, the unit's covariate row (:meth:`Panel.covariate_matrix`)
        and its outcome row (:meth:`Panel.outcome_matrix`) **with missing outcome entries set
        to 0**, so the rows and columns of missing entries hold zeros and the engine picks the
        observed block with ``masks[p]``.

    Notes
    -----
    For units i in pattern p with observed outcomes ``y_i,o`` the Gaussian log-likelihood is

        -n_p/2 (p_o log 2pi + log det Sigma_oo) - 1/2 tr(Sigma_oo^-1 A_o M_p A_o')

    with ``A_o = [-c_o, -D_o, I_o]`` (docs/engine.md), which is why ``M_p = cross[p]`` and
    ``n_p = counts[p]`` are all the data a pattern contributes (Little & Rubin 2019, ch. 7).

    References
    ----------
    Little, R. J. A., & Rubin, D. B. (2019). *Statistical Analysis with Missing Data* (3rd ed.).
    Wiley. https://doi.org/10.1002/9781119482260
    """

    masks: np.ndarray
    counts: np.ndarray
    unit_pattern: np.ndarray
    cross: np.ndarray

    def __post_init__(self) -> None:
        for name, dtype, ndim in (
            ("masks", bool, 2),
            ("counts", np.int64, 1),
            ("unit_pattern", np.int64, 1),
            ("cross", float, 3),
        ):
            array = np.array(getattr(self, name), dtype=dtype, copy=True)
            if array.ndim != ndim:
                raise DataError(f"Patterns.{name} must be {ndim}-dimensional; got shape {array.shape}.")
            array.setflags(write=False)
            object.__setattr__(self, name, array)
        n_patterns = len(self.counts)
        if self.masks.shape[0] != n_patterns or self.cross.shape[0] != n_patterns:
            raise DataError(
                f"Patterns holds {n_patterns} counts but {self.masks.shape[0]} masks and "
                f"{self.cross.shape[0]} cross-product matrices; give one of each per pattern."
            )

    @property
    def n_patterns(self) -> int:
        """Number of distinct missing-data patterns P."""
        return len(self.counts)

    def __eq__(self, other: object) -> bool:
        if not isinstance(other, Patterns):
            return NotImplemented
        return all(
            arrays_equal(getattr(self, name), getattr(other, name))
            for name in ("masks", "counts", "unit_pattern", "cross")
        )

    __hash__ = None  # type: ignore[assignment]  # holds mutable-typed arrays

    def __repr__(self) -> str:
        return (
            f"Patterns(n_patterns={self.n_patterns}, counts={self.counts.tolist()}, "
            f"cross_shape={self.cross.shape})"
        )
