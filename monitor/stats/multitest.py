"""False-discovery-rate control across the series of one model (Benjamini & Hochberg 1995).

A model split by ``per:`` into hundreds of series runs the same test on each; at a 5 % level some
of them reject by chance alone. Before p-values of one finding kind become findings, they are
controlled together with the Benjamini–Hochberg step-up procedure at the configured rate
(``thresholds.fdr``, default 0.10): among the series flagged, the expected share of false alarms is
at most that rate when the tests are independent (or positively dependent).

Public API::

    benjamini_hochberg(p_values, rate=0.10) -> FalseDiscoveryControl

``p_values`` is a sequence or array (m_all,); None or NaN marks a series with no test (too few
forecasts, a fit that was not estimable). Those are left out of the family, so the family size m is
the number of real p-values, and they are never rejected; their q-value is NaN (the same marker the
input used). All other outputs are defined for every input, including an empty family.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

FloatArray = NDArray[np.float64]
BoolArray = NDArray[np.bool_]


@dataclass(frozen=True, eq=False)
class FalseDiscoveryControl:
    """The result of Benjamini–Hochberg control; arrays have the input's shape (m_all,).

    ``q_values``: BH-adjusted p-values, min over j >= i of min(1, m·p_(j)/j) in sorted order, so
    monotone in p and capped at 1; NaN where the input had no test. ``reject``: True where the
    series' hypothesis is rejected at ``rate`` (equivalently, q-value <= rate). ``tested``: True
    where the input had a p-value. ``family_size``: m. ``cutoff``: the largest p-value rejected,
    None when nothing is rejected.
    """

    q_values: FloatArray
    reject: BoolArray
    tested: BoolArray
    rate: float
    family_size: int
    cutoff: float | None

    @property
    def rejected(self) -> int:
        """How many hypotheses were rejected."""
        return int(np.count_nonzero(self.reject))

    def q_value(self, i: int) -> float | None:
        """The q-value of entry ``i``, or None where it had no test."""
        value = float(self.q_values[i])
        return None if np.isnan(value) else value


def benjamini_hochberg(
    p_values: Sequence[float | None] | ArrayLike, rate: float = 0.10
) -> FalseDiscoveryControl:
    """Benjamini & Hochberg's (1995) step-up procedure at false-discovery rate ``rate``.

    With the m real p-values sorted, p_(1) <= … <= p_(m), let k be the largest i with
    p_(i) <= i·rate/m; the hypotheses of p_(1) … p_(k) are rejected (ties at the cut-off are all
    rejected). Adjusted p-values (q-values) are q_(i) = min over j >= i of min(1, m·p_(j)/j).
    ``p_values`` has shape (m_all,), None or NaN for "no test"; values must lie in [0, 1].
    """
    if isinstance(rate, bool) or not (isinstance(rate, float | int | np.floating)
                                      and 0.0 < float(rate) < 1.0):
        raise ValueError(f"rate must be a number strictly between 0 and 1, not {rate!r}")
    values = _as_float_array(p_values)
    tested = ~np.isnan(values)
    real = values[tested]
    if np.any((real < 0.0) | (real > 1.0)):
        bad = float(real[(real < 0.0) | (real > 1.0)][0])
        raise ValueError(f"p-values must lie between 0 and 1; got {bad!r}")
    m = int(real.size)
    q_values = np.full(values.shape, np.nan)
    reject = np.zeros(values.shape, dtype=bool)
    if m == 0:
        return FalseDiscoveryControl(q_values, reject, tested, float(rate), 0, None)

    order = np.argsort(real, kind="stable")
    sorted_p = real[order]
    rank = np.arange(1, m + 1, dtype=np.float64)
    # Step-up: compare each sorted p-value with its own line i·rate/m, then reject everything up
    # to the last one below it (an early p-value above its line can still be rejected).
    below_line = np.flatnonzero(sorted_p <= rank * float(rate) / m)
    reject_sorted = np.zeros(m, dtype=bool)
    cutoff: float | None = None
    if below_line.size:
        last = int(below_line[-1])
        reject_sorted[: last + 1] = True
        cutoff = float(sorted_p[last])
    adjusted = np.minimum.accumulate((sorted_p * m / rank)[::-1])[::-1]
    adjusted = np.minimum(adjusted, 1.0)

    real_q = np.empty(m)
    real_q[order] = adjusted
    real_reject = np.empty(m, dtype=bool)
    real_reject[order] = reject_sorted
    q_values[tested] = real_q
    reject[tested] = real_reject
    return FalseDiscoveryControl(q_values, reject, tested, float(rate), m, cutoff)


def _as_float_array(p_values: Sequence[float | None] | ArrayLike) -> FloatArray:
    """A 1-D float array with None turned into NaN."""
    raw = p_values if isinstance(p_values, np.ndarray) else np.asarray(p_values, dtype=object)
    if raw.ndim != 1:
        raise ValueError(f"p_values must be one-dimensional, got shape {raw.shape}")
    if raw.dtype == object:
        return np.array([np.nan if v is None else float(v) for v in raw], dtype=np.float64)
    return np.asarray(raw, dtype=np.float64)


__all__ = ["FalseDiscoveryControl", "benjamini_hochberg"]
