"""Residual diagnostics of a least-squares fit: one series at a time, or thousands at once.

Public API (all inputs are plain arrays; nothing here depends on ``OlsFit``):

    TestResult(statistic, p_value, df, reason)          one test on one series
    BatchTestResult(statistic, p_value, df, reason)     the same test on s series; .series(i)

    durbin_watson(residuals)                  -> TestResult   (statistic only)
    durbin_watson_test(residuals, x, intercept=True)
                                              -> TestResult   (with the exact two-sided p-value)
    durbin_watson_cdf(d, eigenvalues)         -> float        P(D <= d) under independent errors
    breusch_pagan(residuals, x)               -> TestResult   Koenker's studentised n·R²
    jarque_bera(residuals)                    -> TestResult
    leverage(x, intercept=True)               -> (n,) hat diagonal
    cooks_distance(residuals, leverage, p)    -> (n,)
    variance_inflation(x)                     -> (k,)

    durbin_watson_batch(residuals, mask=None)                 -> BatchTestResult
    breusch_pagan_batch(residuals, x, mask=None)              -> BatchTestResult
    jarque_bera_batch(residuals, mask=None)                   -> BatchTestResult
    leverage_batch(x, mask=None, intercept=True)              -> (s, n)
    cooks_distance_batch(residuals, leverage, p, mask=None)   -> (s, n)
    variance_inflation_batch(x, mask=None)                    -> (s, k)

Shapes: ``x`` holds the predictors only, never an intercept column: (n, k) for one series,
(s, n, k) for a batch. Residuals are (n,) or (s, n). ``mask`` is (s, n) bool, True where the row
is used; values at unused rows are ignored and may be NaN, so series of different lengths can be
stacked with padding. Each one-series function is its batch variant on a batch of one, so a batch
result equals the one-at-a-time result on the used rows by construction of the code, and the tests
check it on ragged batches.

Undefined results. A test that cannot be computed never raises and never returns a silent NaN:
``TestResult.statistic`` and ``p_value`` are None and ``reason`` says why (too few rows, all
residuals zero, constant squared residuals, no predictor that varies, a residual that is not
finite). In a ``BatchTestResult`` the same cases are NaN in the arrays, with the reason in
``reason[i]``; ``series(i)`` turns NaN back into None. The per-row and per-predictor arrays
(leverage, Cook's distance, VIF) are NaN where undefined and ``inf`` for a VIF of perfectly
collinear predictors; the docstrings say when.

An exact fit leaves rounding noise where its residuals should be, and no function here can tell
noise from data without the response's scale. Callers that know the fit is exact
(``OlsFit.exact_fit``) report these tests as not applicable; ``plumbline fit`` does.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import ClassVar

import numpy as np
from numpy.typing import ArrayLike, NDArray

from monitor.stats._dist import chi2_sf, f_sf

FloatArray = NDArray[np.float64]
BoolArray = NDArray[np.bool_]
IntArray = NDArray[np.int64]

# Relative size below which a spread is rounding error rather than data: constant squared
# residuals, a predictor that does not vary, perfectly collinear predictors. Rounding leaves
# spreads near 1e-16 of the values' size; real data are many orders of magnitude above 1e-12.
_ROUNDING = 1e-12

# The exact Durbin–Watson distribution needs an orthonormal basis of the residual space, an n×n
# matrix; above this many rows its memory and time are not worth a p-value the statistic's
# rule of thumb already approximates well.
DURBIN_WATSON_EXACT_MAX_ROWS = 2000


@dataclass(frozen=True)
class TestResult:
    """One test on one series. ``statistic`` and ``p_value`` are None when undefined (see reason).

    ``df`` is the degrees of freedom of the reference χ² distribution, None where there is none
    (Durbin–Watson). ``reason`` is None when the statistic is defined; it also explains a missing
    p-value when only the p-value is undefined.
    """

    __test__: ClassVar[bool] = False  # a result, not a pytest test class

    statistic: float | None
    p_value: float | None
    df: int | None
    reason: str | None = None


@dataclass(frozen=True, eq=False)
class BatchTestResult:
    """One test on s series. Arrays are (s,); NaN where undefined, with ``reason[i]`` saying why.

    ``df`` is -1 where the test has no χ² reference distribution (Durbin–Watson).
    """

    statistic: FloatArray
    p_value: FloatArray
    df: IntArray
    reason: list[str | None]

    def series(self, i: int) -> TestResult:
        """Series ``i`` as a :class:`TestResult`, NaN turned into None."""
        df = int(self.df[i])
        return TestResult(
            statistic=_none_if_nan(self.statistic[i]),
            p_value=_none_if_nan(self.p_value[i]),
            df=None if df < 0 else df,
            reason=self.reason[i],
        )


def _none_if_nan(value: float | np.floating) -> float | None:
    number = float(value)
    return None if math.isnan(number) else number


# --- input shaping ----------------------------------------------------------------------------


def _residual_batch(
    residuals: ArrayLike, mask: ArrayLike | None
) -> tuple[FloatArray, BoolArray, BoolArray]:
    """(s, n) residuals, zero at unused rows; the (s, n) mask; (s,) flags of non-finite values.

    A non-finite value at a used row is replaced by 0 (so that no arithmetic warns) and its
    series is flagged; every function reports a flagged series as undefined.
    """
    values = np.asarray(residuals, dtype=np.float64)
    if values.ndim != 2:
        raise ValueError(f"residuals must be (s, n); got shape {values.shape}")
    used = np.ones(values.shape, dtype=bool) if mask is None else np.asarray(mask, dtype=bool)
    if used.shape != values.shape:
        raise ValueError(f"mask shape {used.shape} differs from residuals shape {values.shape}")
    finite = np.isfinite(values)
    bad: BoolArray = np.asarray((used & ~finite).any(axis=1))
    return np.where(used & finite, values, 0.0), used, bad


def _predictor_batch(x: ArrayLike, used: BoolArray) -> tuple[FloatArray, BoolArray]:
    """(s, n, k) predictors, zero at unused rows, and (s,) flags of non-finite used values."""
    values = np.asarray(x, dtype=np.float64)
    if values.ndim == 2 and values.shape == used.shape:  # one predictor given as (s, n)
        values = values[:, :, np.newaxis]
    if values.ndim != 3 or values.shape[:2] != used.shape:
        raise ValueError(f"x must be (s, n, k) with (s, n) = {used.shape}; got {values.shape}")
    rows = used[:, :, np.newaxis]
    finite = np.isfinite(values)
    bad: BoolArray = np.asarray((rows & ~finite).reshape(values.shape[0], -1).any(axis=1))
    return np.where(rows & finite, values, 0.0), bad


def _design_mask(x: ArrayLike, mask: ArrayLike | None) -> BoolArray:
    shape = np.shape(x)
    if len(shape) < 2:
        raise ValueError(f"x must be (s, n, k); got shape {shape}")
    return np.ones(shape[:2], dtype=bool) if mask is None else np.asarray(mask, dtype=bool)


def _as_column_matrix(x: ArrayLike, n: int) -> FloatArray:
    values = np.asarray(x, dtype=np.float64)
    if values.ndim == 1:
        values = values[:, np.newaxis]
    if values.ndim != 2 or values.shape[0] != n:
        raise ValueError(f"x must be (n, k) with n = {n}; got shape {values.shape}")
    return values


def _standardised_columns(
    x: FloatArray, used: BoolArray, centre: bool
) -> tuple[FloatArray, BoolArray]:
    """Columns centred on the used rows (when ``centre``) and scaled to unit length.

    Returns the (s, n, k) scaled columns, zero at unused rows, and a (s, k) flag of the columns
    that carry no information: constant when centred, all zero when not. Those are left at zero
    so that a rank-revealing decomposition drops them.
    """
    counts = used.sum(axis=1).astype(np.float64)[:, np.newaxis]  # (s, 1)
    raw_norm = np.sqrt(np.einsum("snk,snk->sk", x, x))
    if centre:
        means = x.sum(axis=1) / np.maximum(counts, 1.0)  # (s, k)
        shifted = np.where(used[:, :, np.newaxis], x - means[:, np.newaxis, :], 0.0)
    else:
        shifted = x
    norm = np.sqrt(np.einsum("snk,snk->sk", shifted, shifted))
    empty = norm <= _ROUNDING * raw_norm
    empty |= norm == 0.0
    scale = np.where(empty, 1.0, norm)
    scaled = np.where(empty[:, np.newaxis, :], 0.0, shifted / scale[:, np.newaxis, :])
    return scaled, empty


def _column_space(scaled: FloatArray) -> tuple[FloatArray, IntArray]:
    """Orthonormal basis of each series' column space (s, n, k), zero beyond its rank, and ranks.

    SVD rather than QR, because a batch may hold series whose columns are rank deficient and the
    SVD reveals the rank without pivoting; numpy's default rank tolerance.
    """
    s, n, k = scaled.shape
    if k == 0:
        return np.zeros((s, n, 0)), np.zeros(s, dtype=np.int64)
    left, singular, _ = np.linalg.svd(scaled, full_matrices=False)
    tolerance = singular[:, :1] * max(n, k) * np.finfo(np.float64).eps
    kept = singular > tolerance
    return left * kept[:, np.newaxis, :], kept.sum(axis=1).astype(np.int64)


def _classify(
    s: int, conditions: list[tuple[BoolArray, Callable[[int], str]]]
) -> tuple[BoolArray, list[str | None]]:
    """(s,) undefined flags and reasons: the first condition that holds for a series names it.

    Messages are built only for the series that need one, so a batch of healthy series costs
    no Python loop.
    """
    undefined = np.zeros(s, dtype=bool)
    reason: list[str | None] = [None] * s
    for condition, message in conditions:
        fresh = np.asarray(condition, dtype=bool) & ~undefined
        for i in np.flatnonzero(fresh):
            reason[int(i)] = message(int(i))
        undefined |= fresh
    return undefined, reason


# --- Durbin–Watson ----------------------------------------------------------------------------


def durbin_watson_batch(residuals: ArrayLike, mask: ArrayLike | None = None) -> BatchTestResult:
    """Durbin–Watson d = Σ_t (e_t − e_{t−1})² / Σ_t e_t² for s series at once.

    Durbin, J. & Watson, G.S. (1950, 1951), Biometrika 37 and 38. d near 2 means no first-order
    autocorrelation; near 0 positive, near 4 negative. ``residuals`` (s, n) in time order,
    ``mask`` (s, n): differences are taken between consecutive *used* rows, so a gap in the mask
    joins the rows either side of it. No p-value here (it depends on the design; see
    :func:`durbin_watson_test`). Undefined (NaN) with fewer than 2 used rows or all residuals 0.
    """
    values, used, bad = _residual_batch(residuals, mask)
    s, n = values.shape
    position = np.where(used, np.arange(n), -1)
    latest_used = np.maximum.accumulate(position, axis=1)
    previous = np.concatenate([np.full((s, 1), -1), latest_used[:, :-1]], axis=1)
    has_previous = used & (previous >= 0)
    previous_value = np.take_along_axis(values, np.maximum(previous, 0), axis=1)
    steps = np.where(has_previous, values - previous_value, 0.0)
    numerator = np.einsum("sn,sn->s", steps, steps)
    denominator = np.einsum("sn,sn->s", values, values)
    counts = used.sum(axis=1)

    undefined, reason = _classify(
        s,
        [
            (bad, lambda i: "a residual is not a finite number"),
            (counts < 2, lambda i: f"too few rows ({counts[i]}) for Durbin–Watson: it needs 2"),
            (denominator == 0.0, lambda i: "all residuals are zero (an exact fit)"),
        ],
    )
    with np.errstate(divide="ignore", invalid="ignore"):
        statistic = np.where(undefined, np.nan, numerator / np.where(undefined, 1.0, denominator))
    return BatchTestResult(
        statistic=statistic,
        p_value=np.full(s, np.nan),
        df=np.full(s, -1, dtype=np.int64),
        reason=reason,
    )


def durbin_watson(residuals: ArrayLike) -> TestResult:
    """Durbin–Watson d of one series' residuals (n,) in time order; p_value None (see the test).

    Durbin & Watson (1950, 1951). See :func:`durbin_watson_batch` for the undefined cases.
    """
    return durbin_watson_batch(_one_series(residuals)).series(0)


def durbin_watson_cdf(d: float, eigenvalues: ArrayLike) -> float:
    """P(Σ λ_i ξ_i² / Σ ξ_i² ≤ d) for ξ_i independent N(0, 1), by Imhof's (1961) inversion.

    With λ the m = n − p non-zero eigenvalues of M·A·M (M the residual-maker of the design, A the
    Durbin–Watson difference matrix), this is the exact null distribution function of d under
    independent normal errors (Durbin & Watson 1971; Imhof, J.P. 1961, Biometrika 48, 419–426).
    The event is Q = Σ (λ_i − d) ξ_i² ≤ 0, whose probability is
    1/2 − (1/π) ∫₀^∞ sin θ(u) / (u ρ(u)) du with θ(u) = ½ Σ arctan(c_i u), ρ(u) = Π (1 + c_i²u²)^¼,
    c_i = λ_i − d. ``eigenvalues`` (m,), m ≥ 1.
    """
    # scipy.integrate here, not at the top: a pass never needs the exact Durbin–Watson
    # distribution, and the import costs about a second (``tests/test_cli_startup.py``).
    from scipy import integrate

    weights = np.asarray(eigenvalues, dtype=np.float64).ravel() - float(d)
    if weights.size == 0:
        raise ValueError("durbin_watson_cdf needs at least one eigenvalue")
    if np.all(weights <= 0.0):
        return 1.0
    if np.all(weights >= 0.0):
        return 0.0

    def integrand(u: float) -> float:
        if u == 0.0:
            return 0.5 * float(weights.sum())  # the limit of sin θ(u) / u at 0
        scaled = weights * u
        theta = 0.5 * float(np.arctan(scaled).sum())
        # log ρ(u) = ¼ Σ log(1 + c_i²u²), summed in log space: (c_i u)² overflows a float and
        # ρ(u) itself overflows for a few hundred weights far out in the tail, where the
        # integrand is zero to double precision.
        with np.errstate(divide="ignore"):
            log_size = np.log(np.abs(scaled))
        log_rho = 0.25 * float(np.logaddexp(0.0, 2.0 * log_size).sum())
        log_denominator = math.log(u) + log_rho
        if log_denominator > 700.0:
            return 0.0
        return math.sin(theta) * math.exp(-log_denominator)

    # The integrand decays like u^(-1-m/2); splitting at the scale of the weights keeps quad's
    # subdivision where the oscillation is.
    knee = 1.0 / float(np.abs(weights).max())
    head, _ = integrate.quad(integrand, 0.0, 10.0 * knee, limit=400, epsabs=1e-13, epsrel=1e-11)
    tail, _ = integrate.quad(integrand, 10.0 * knee, np.inf, limit=400, epsabs=1e-13, epsrel=1e-11)
    probability = 0.5 - (head + tail) / math.pi
    return min(1.0, max(0.0, probability))


def _durbin_watson_eigenvalues(basis: FloatArray) -> FloatArray:
    """The n − r non-zero eigenvalues of M·A·M, M = I − QQᵀ (``basis`` Q (n, r) orthonormal, the
    design's column space), A the Durbin–Watson difference matrix DᵀD (tridiagonal).

    M·A·M = A − Q(QᵀA) − (AQ)Qᵀ + Q(QᵀAQ)Qᵀ is built with O(n²r) work (A is applied as a
    difference operator), then its symmetric eigenvalues are taken; its r eigenvalues on the
    design's space are 0 and, all eigenvalues being ≥ 0, are the r smallest, which are dropped.
    (The earlier route, the singular values of the row differences of a full n × n orthonormal
    basis, needed a dense SVD several times slower at a few thousand rows.)
    """
    from scipy import linalg  # only here, for the same reason as scipy.integrate above

    n, r = basis.shape

    def apply_a(v: FloatArray) -> FloatArray:  # A v = Dᵀ(D v) for v (n, c)
        steps = np.diff(v, axis=0)
        out = np.zeros_like(v)
        out[:-1] -= steps
        out[1:] += steps
        return out

    a = np.zeros((n, n))
    index = np.arange(n)
    a[index, index] = 2.0
    a[0, 0] = a[-1, -1] = 1.0
    a[index[:-1], index[1:]] = -1.0
    a[index[1:], index[:-1]] = -1.0
    aq = apply_a(basis)
    small = basis.T @ aq
    mam = a - basis @ aq.T - aq @ basis.T + basis @ small @ basis.T
    values = linalg.eigvalsh(mam, overwrite_a=True, check_finite=False)
    return np.asarray(np.sort(values)[r:], dtype=np.float64)


def durbin_watson_test(residuals: ArrayLike, x: ArrayLike, intercept: bool = True) -> TestResult:
    """Durbin–Watson d with its exact two-sided p-value for the design that made the residuals.

    ``residuals`` (n,) in time order, ``x`` (n, k) the fit's predictors without an intercept
    column, ``intercept`` whether the fit had one. The p-value is 2·min(F(d), 1 − F(d)), F the
    exact null distribution function of d under independent normal errors
    (:func:`durbin_watson_cdf`; Durbin & Watson 1971, Imhof 1961). It assumes fixed predictors
    (no lagged response among them). The p-value is None, with a reason, when fewer than 2
    residual degrees of freedom remain or n exceeds ``DURBIN_WATSON_EXACT_MAX_ROWS``.
    """
    plain = durbin_watson(residuals)
    if plain.statistic is None:
        return plain
    values = np.asarray(residuals, dtype=np.float64).ravel()
    n = values.size
    design = _as_column_matrix(x, n)
    if n > DURBIN_WATSON_EXACT_MAX_ROWS:
        why = f"exact p-value computed for up to {DURBIN_WATSON_EXACT_MAX_ROWS} rows"
        return TestResult(plain.statistic, None, None, why)
    if intercept:
        design = np.column_stack([np.ones(n), design])
    norms = np.linalg.norm(design, axis=0)
    scaled = design / np.where(norms == 0.0, 1.0, norms)
    left, singular, _ = np.linalg.svd(scaled, full_matrices=False)
    rank = int((singular > singular.max(initial=0.0) * n * np.finfo(np.float64).eps).sum())
    if n - rank < 2:
        why = f"too few residual degrees of freedom ({n - rank})"
        return TestResult(plain.statistic, None, None, why)
    eigenvalues = _durbin_watson_eigenvalues(left[:, :rank])
    below = durbin_watson_cdf(plain.statistic, eigenvalues)
    p_value = min(1.0, 2.0 * min(below, 1.0 - below))
    return TestResult(plain.statistic, p_value, None, None)


# --- How far out a new point lies (prediction region of the predictors) -------------------------


@dataclass(frozen=True)
class PredictorCloud:
    """The mean and spread of each series' predictor rows in a window, to judge new rows by.

    ``mean`` (s, k), ``precision`` (s, k, k) the (pseudo-)inverse of the sample covariance
    (divisor n − 1), ``n`` (s,) rows. See :func:`new_point_p_value`.
    """

    mean: FloatArray
    precision: FloatArray
    n: IntArray


def predictor_cloud(x: ArrayLike, mask: ArrayLike) -> PredictorCloud:
    """The :class:`PredictorCloud` of ``x`` (s, n, k) over the rows of ``mask`` (s, n)."""
    used = np.asarray(mask, dtype=bool)
    values, _ = _predictor_batch(x, used)
    counts = used.sum(axis=1)
    mean = values.sum(axis=1) / np.maximum(counts, 1)[:, np.newaxis]
    centred = np.where(used[:, :, np.newaxis], values - mean[:, np.newaxis, :], 0.0)
    covariance = np.einsum("snk,snj->skj", centred, centred) / np.maximum(counts - 1, 1)[
        :, np.newaxis, np.newaxis]
    precision = np.linalg.pinv(covariance, hermitian=True)
    return PredictorCloud(mean, precision, counts.astype(np.int64))


def new_point_p_value(cloud: PredictorCloud, x_new: ArrayLike) -> FloatArray:
    """The chance that a new row drawn like the window's rows lies at least as far out as
    ``x_new`` (s, m, k): Hotelling's (1931) T² for a future observation of a multivariate normal.

    With D² = (x₀ − x̄)ᵀ S⁻¹ (x₀ − x̄) (x̄ and S the window's mean and sample covariance, n rows,
    k predictors), (n − k) / (k (n − 1)) · n / (n + 1) · D² follows F(k, n − k) when x₀ is drawn
    independently from the same normal distribution as the rows (the prediction ellipsoid of a
    future observation; Johnson & Wichern, *Applied Multivariate Statistical Analysis*, 6th ed.
    2007, section 5.5, from memory). For k = 1 it is the square of the t statistic of the
    prediction interval x̄ ± t·s·√(1 + 1/n). It equals the prediction leverage route:
    D² = (n − 1)(h₀ − 1/n) for a fit with an intercept. Returns (s, m); NaN where n ≤ k or a
    predictor does not vary in the window; 1.0 with no predictors.
    """
    new = np.asarray(x_new, dtype=np.float64)
    s, m, k = new.shape
    if k == 0:
        return np.ones((s, m))
    delta = new - cloud.mean[:, np.newaxis, :]
    distance = np.einsum("smk,skj,smj->sm", delta, cloud.precision, delta)
    n = cloud.n.astype(np.float64)[:, np.newaxis]
    df2 = n - k
    with np.errstate(divide="ignore", invalid="ignore"):
        f = df2 / (k * (n - 1.0)) * n / (n + 1.0) * distance
        p = f_sf(f, k, np.where(df2 > 0, df2, 1.0))
    flat = np.einsum("skk->sk", cloud.precision) == 0.0  # a predictor that never varied
    bad = (df2 <= 0) | flat.any(axis=1)[:, np.newaxis] | ~np.isfinite(new).all(axis=2)
    return np.where(bad, np.nan, p)


# --- Residual variance against the baseline's -------------------------------------------------


def variance_increase_p_value(
    variance_now: ArrayLike, df_now: ArrayLike, variance_before: ArrayLike, df_before: ArrayLike
) -> FloatArray:
    """One-sided p-value that the error variance grew: F = s²_now / s²_before on
    (df_now, df_before) degrees of freedom, upper tail (the classical variance-ratio F test of
    two normal samples; Snedecor & Cochran, *Statistical Methods*, 8th ed. 1989, section 6.12,
    from memory). Arrays of one shape; NaN where a variance or df is not positive. When the two
    windows share rows the two variances are positively correlated and the test is
    conservative.
    """
    now = np.asarray(variance_now, dtype=np.float64)
    before = np.asarray(variance_before, dtype=np.float64)
    d1 = np.asarray(df_now, dtype=np.float64)
    d2 = np.asarray(df_before, dtype=np.float64)
    ok = (now >= 0) & (before > 0) & (d1 > 0) & (d2 > 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = np.where(ok, now / np.where(ok, before, 1.0), np.nan)
        p = f_sf(ratio, np.where(ok, d1, 1.0), np.where(ok, d2, 1.0))
    return np.asarray(np.where(ok, p, np.nan), dtype=np.float64)


# --- Breusch–Godfrey (first order) ------------------------------------------------------------


def breusch_godfrey_batch(
    residuals: ArrayLike, x: ArrayLike, mask: ArrayLike | None = None
) -> BatchTestResult:
    """Breusch–Godfrey LM test of first-order autocorrelation for s series: LM = n·R², χ² on 1 df.

    Breusch, T.S. (1978), Australian Economic Papers 17, 334–355; Godfrey, L.G. (1978),
    Econometrica 46, 1293–1301. R² is that of the auxiliary regression of the residuals on a
    constant, the predictors and the previous residual (0 before the first row, as in
    statsmodels' ``acorr_breusch_godfrey``). Unlike Durbin–Watson's exact distribution it needs
    no per-series eigen-decomposition, so it runs over a whole batch at once; it is two-sided in
    effect (positive or negative autocorrelation). ``residuals`` (s, n) in time order, ``x``
    (s, n, k) predictors without an intercept column (a constant is always in the auxiliary
    regression), ``mask`` (s, n): as for Durbin–Watson the previous residual is that of the
    previous *used* row. Undefined (NaN) when all residuals are zero, or n ≤ the auxiliary
    regression's rank + 1.
    """
    values, used, bad = _residual_batch(residuals, mask)
    predictors, bad_predictors = _predictor_batch(x, used)
    bad = bad | bad_predictors
    s, n = values.shape
    counts = used.sum(axis=1)
    position = np.where(used, np.arange(n), -1)
    latest_used = np.maximum.accumulate(position, axis=1)
    previous = np.concatenate([np.full((s, 1), -1), latest_used[:, :-1]], axis=1)
    lagged = np.where(used & (previous >= 0),
                      np.take_along_axis(values, np.maximum(previous, 0), axis=1), 0.0)
    columns = np.concatenate([predictors, lagged[:, :, np.newaxis]], axis=2)
    scaled, _ = _standardised_columns(columns, used, centre=True)
    basis, rank = _column_space(scaled)
    means = values.sum(axis=1) / np.maximum(counts, 1)
    centred = np.where(used, values - means[:, np.newaxis], 0.0)
    total = np.einsum("sn,sn->s", centred, centred)
    projected = np.einsum("snk,sn->sk", basis, centred)
    explained = np.einsum("sk,sk->s", projected, projected)
    size = np.sqrt(np.einsum("sn,sn->s", values, values))

    undefined, reason = _classify(
        s,
        [
            (bad, lambda i: "a residual or predictor value is not a finite number"),
            (size == 0.0, lambda i: "all residuals are zero (an exact fit)"),
            (
                counts <= rank + 1,
                lambda i: (
                    f"too few rows ({counts[i]}) for Breusch–Godfrey: it needs {rank[i] + 2}"
                ),
            ),
            (
                np.sqrt(total) <= _ROUNDING * size,
                lambda i: "the residuals are constant",
            ),
        ],
    )
    safe_total = np.where(undefined, 1.0, total)
    r_squared = np.clip(explained / safe_total, 0.0, 1.0)
    statistic = np.where(undefined, np.nan, counts * r_squared)
    p_value = np.where(undefined, np.nan, chi2_sf(statistic, 1))
    return BatchTestResult(statistic, p_value, np.ones(s, dtype=np.int64), reason)


def breusch_godfrey(residuals: ArrayLike, x: ArrayLike) -> TestResult:
    """Breusch–Godfrey LM test of first-order autocorrelation of one series (n,), ``x`` (n, k).

    Breusch (1978), Godfrey (1978); see :func:`breusch_godfrey_batch`.
    """
    values = _one_series(residuals)
    design = _as_column_matrix(x, values.shape[1])
    return breusch_godfrey_batch(values, design[np.newaxis]).series(0)


# --- Breusch–Pagan (Koenker) ------------------------------------------------------------------


def breusch_pagan_batch(
    residuals: ArrayLike, x: ArrayLike, mask: ArrayLike | None = None
) -> BatchTestResult:
    """Koenker's studentised Breusch–Pagan test for s series: LM = n·R², χ² on df = rank of x.

    Breusch, T.S. & Pagan, A.R. (1979), Econometrica 47, 1287–1294; studentised form of Koenker,
    R. (1981), Journal of Econometrics 17, 107–112: R² of the regression of the squared residuals
    on a constant and the predictors. ``residuals`` (s, n), ``x`` (s, n, k) predictors without an
    intercept column (a constant is always in the auxiliary regression, also for a fit without
    intercept), ``mask`` (s, n). df is the rank of the centred predictors on the used rows (k
    when none is constant or collinear). Undefined (NaN) when all residuals are zero, the squared
    residuals are constant, no predictor varies, or n ≤ df + 1.
    """
    values, used, bad = _residual_batch(residuals, mask)
    predictors, bad_predictors = _predictor_batch(x, used)
    bad = bad | bad_predictors
    s = values.shape[0]
    counts = used.sum(axis=1)
    squared = values * values
    mean_squared = squared.sum(axis=1) / np.maximum(counts, 1)
    centred = np.where(used, squared - mean_squared[:, np.newaxis], 0.0)
    total = np.einsum("sn,sn->s", centred, centred)
    scaled, _ = _standardised_columns(predictors, used, centre=True)
    basis, rank = _column_space(scaled)
    projected = np.einsum("snk,sn->sk", basis, centred)
    explained = np.einsum("sk,sk->s", projected, projected)
    size = np.sqrt(np.einsum("sn,sn->s", squared, squared))

    undefined, reason = _classify(
        s,
        [
            (bad, lambda i: "a residual or predictor value is not a finite number"),
            (size == 0.0, lambda i: "all residuals are zero (an exact fit)"),
            (
                rank == 0,
                lambda i: "no predictor varies, so there is nothing to relate the variance to",
            ),
            (
                counts <= rank + 1,
                lambda i: (
                    f"too few rows ({counts[i]}) for Breusch–Pagan on {rank[i]} "
                    f"predictor(s): it needs {rank[i] + 2}"
                ),
            ),
            (
                np.sqrt(total) <= _ROUNDING * size,
                lambda i: (
                    "the squared residuals are constant, so their variance cannot depend on x"
                ),
            ),
        ],
    )
    safe_total = np.where(undefined, 1.0, total)
    r_squared = np.clip(explained / safe_total, 0.0, 1.0)
    statistic = np.where(undefined, np.nan, counts * r_squared)
    p_value = np.where(undefined, np.nan, chi2_sf(statistic, np.maximum(rank, 1)))
    return BatchTestResult(statistic, p_value, rank.astype(np.int64), reason)


def breusch_pagan(residuals: ArrayLike, x: ArrayLike) -> TestResult:
    """Koenker's studentised Breusch–Pagan test of one series: n·R², χ² on k df.

    ``residuals`` (n,), ``x`` (n, k) predictors without an intercept column. Breusch & Pagan
    (1979), Koenker (1981); see :func:`breusch_pagan_batch` for the details and undefined cases.
    """
    values = _one_series(residuals)
    design = _as_column_matrix(x, values.shape[1])
    return breusch_pagan_batch(values, design[np.newaxis]).series(0)


# --- Jarque–Bera ------------------------------------------------------------------------------


def jarque_bera_batch(residuals: ArrayLike, mask: ArrayLike | None = None) -> BatchTestResult:
    """Jarque–Bera JB = n/6 · (S² + (K − 3)²/4), χ² on 2 df, for s series at once.

    Jarque, C.M. & Bera, A.K. (1980), Economics Letters 6, 255–259; (1987), International
    Statistical Review 55, 163–172. S and K are the skewness and kurtosis from the moments about
    the mean of the used rows, divided by n (not n − 1). The χ² reference is asymptotic and
    generous in small samples. ``residuals`` (s, n), ``mask`` (s, n). Undefined (NaN) with fewer
    than 3 rows, all residuals zero, or constant residuals.
    """
    values, used, bad = _residual_batch(residuals, mask)
    s, _ = values.shape
    counts = used.sum(axis=1)
    safe_counts = np.maximum(counts, 1).astype(np.float64)
    mean = values.sum(axis=1) / safe_counts
    deviation = np.where(used, values - mean[:, np.newaxis], 0.0)
    squares = deviation * deviation
    second = squares.sum(axis=1) / safe_counts
    third = (squares * deviation).sum(axis=1) / safe_counts
    fourth = (squares * squares).sum(axis=1) / safe_counts
    largest = np.abs(values).max(axis=1, initial=0.0)

    undefined, reason = _classify(
        s,
        [
            (bad, lambda i: "a residual is not a finite number"),
            (counts < 3, lambda i: f"too few rows ({counts[i]}) for Jarque–Bera: it needs 3"),
            (largest == 0.0, lambda i: "all residuals are zero (an exact fit)"),
            (
                np.sqrt(second) <= _ROUNDING * largest,
                lambda i: "the residuals are constant, so their shape cannot be measured",
            ),
        ],
    )
    safe_second = np.where(undefined, 1.0, second)
    skewness = third / safe_second**1.5
    kurtosis = fourth / safe_second**2
    statistic = counts / 6.0 * (skewness**2 + (kurtosis - 3.0) ** 2 / 4.0)
    statistic = np.where(undefined, np.nan, statistic)
    p_value = np.where(undefined, np.nan, chi2_sf(statistic, 2))
    return BatchTestResult(statistic, p_value, np.full(s, 2, dtype=np.int64), reason)


def jarque_bera(residuals: ArrayLike) -> TestResult:
    """Jarque–Bera test of one series' residuals (n,): statistic and χ²(2) p-value.

    Jarque & Bera (1980, 1987); see :func:`jarque_bera_batch` for the undefined cases.
    """
    return jarque_bera_batch(_one_series(residuals)).series(0)


# --- leverage, Cook's distance, VIF ------------------------------------------------------------


def leverage_batch(
    x: ArrayLike, mask: ArrayLike | None = None, intercept: bool = True
) -> FloatArray:
    """Diagonal of the hat matrix H = X(XᵀX)⁻¹Xᵀ for s designs at once, (s, n).

    Hoaglin, D.C. & Welsch, R.E. (1978), The American Statistician 32, 17–22. ``x`` (s, n, k)
    predictors without an intercept column; the design adds one when ``intercept``. Computed from
    an orthonormal basis of the (centred, scaled) columns, never from an inverse; a rank-deficient
    design gives the hat matrix of its column space (as the pseudo-inverse does). NaN at unused
    rows.
    """
    used = _design_mask(x, mask)
    predictors, bad = _predictor_batch(x, used)
    scaled, _ = _standardised_columns(predictors, used, centre=intercept)
    basis, _ = _column_space(scaled)
    hat = np.einsum("snk,snk->sn", basis, basis)
    if intercept:
        hat = hat + 1.0 / np.maximum(used.sum(axis=1), 1)[:, np.newaxis]
    return np.where(used & ~bad[:, np.newaxis], hat, np.nan)


def leverage(x: ArrayLike, intercept: bool = True) -> FloatArray:
    """Hat-matrix diagonal (n,) of the design built from predictors ``x`` (n, k).

    Hoaglin & Welsch (1978); see :func:`leverage_batch`.
    """
    values = np.asarray(x, dtype=np.float64)
    design = _as_column_matrix(values, values.shape[0])
    return leverage_batch(design[np.newaxis], intercept=intercept)[0]


def cooks_distance_batch(
    residuals: ArrayLike,
    leverage: ArrayLike,
    p: int | ArrayLike,
    mask: ArrayLike | None = None,
) -> FloatArray:
    """Cook's distance D_i = e_i² h_i / (p s² (1 − h_i)²) per row of s series, (s, n).

    Cook, R.D. (1977), Technometrics 19, 15–18. s² = Σ e² / (n − p) over the used rows.
    ``residuals`` and ``leverage`` (s, n), ``p`` the number of coefficients (an int, or (s,)),
    ``mask`` (s, n). NaN at unused rows, for a whole series with n ≤ p or all residuals zero,
    and at a row whose leverage is 1 (it fits itself exactly, so deleting it is undefined).
    """
    values, used, bad = _residual_batch(residuals, mask)
    hat_given = np.asarray(leverage, dtype=np.float64)
    if hat_given.shape != values.shape:
        raise ValueError(f"leverage shape {hat_given.shape} differs from residuals {values.shape}")
    hat_finite = np.isfinite(hat_given)
    hat = np.where(used & hat_finite, hat_given, 0.0)
    coefficients = np.broadcast_to(np.asarray(p, dtype=np.float64), (values.shape[0],))
    residual_df = used.sum(axis=1) - coefficients
    sse = np.einsum("sn,sn->s", values, values)
    series_ok = (residual_df > 0) & (sse > 0.0) & (coefficients > 0) & ~bad
    variance = np.where(series_ok, sse / np.where(series_ok, residual_df, 1.0), 1.0)
    row_ok = used & series_ok[:, np.newaxis] & hat_finite & (hat < 1.0 - _ROUNDING)
    spare = np.where(row_ok, 1.0 - hat, 1.0)
    distance = values**2 * hat / (coefficients[:, np.newaxis] * variance[:, np.newaxis] * spare**2)
    return np.where(row_ok, distance, np.nan)


def cooks_distance(residuals: ArrayLike, leverage: ArrayLike, p: int) -> FloatArray:
    """Cook's distance (n,) from one fit's residuals (n,), leverage (n,) and p coefficients.

    Cook (1977); see :func:`cooks_distance_batch` for the NaN cases.
    """
    return cooks_distance_batch(_one_series(residuals), _one_series(leverage), p)[0]


def variance_inflation_batch(x: ArrayLike, mask: ArrayLike | None = None) -> FloatArray:
    """Variance inflation factor VIF_j = 1 / (1 − R_j²) of each predictor of s series, (s, k).

    Marquardt, D.W. (1970), Technometrics 12, 591–612. R_j² is from regressing predictor j on a
    constant and the other predictors over the used rows (centred, whether or not the fit has an
    intercept). Computed as SST_j / SSE_j, which stays accurate as R_j² nears 1. With one
    predictor there is nothing else to explain it, R² = 0 and VIF = 1. NaN for a constant
    predictor, ``inf`` for one that the others reproduce exactly (collinear).
    """
    used = _design_mask(x, mask)
    predictors, bad = _predictor_batch(x, used)
    scaled, constant = _standardised_columns(predictors, used, centre=True)
    s, _, k = scaled.shape
    inflation = np.ones((s, k))
    for j in range(k if k > 1 else 0):  # one predictor: VIF is 1 by definition, not by rounding
        others = np.delete(scaled, j, axis=2)
        target = scaled[:, :, j]
        basis, _ = _column_space(others)
        explained = np.einsum("snk,sn->sk", basis, target)
        # Unit-length target: SST = 1, SSE = 1 − explained share, computed from the residual
        # itself rather than by subtraction.
        residual = target - np.einsum("snk,sk->sn", basis, explained)
        sse = np.einsum("sn,sn->s", residual, residual)
        with np.errstate(divide="ignore"):
            inflation[:, j] = np.where(sse <= _ROUNDING**2, np.inf, 1.0 / sse)
    return np.where(constant | bad[:, np.newaxis], np.nan, inflation)


def variance_inflation(x: ArrayLike) -> FloatArray:
    """VIF (k,) of each column of the predictors ``x`` (n, k); 1.0 for a single predictor.

    Marquardt (1970); see :func:`variance_inflation_batch` for the NaN and inf cases.
    """
    values = np.asarray(x, dtype=np.float64)
    design = _as_column_matrix(values, values.shape[0])
    return variance_inflation_batch(design[np.newaxis])[0]


def _one_series(values: ArrayLike) -> FloatArray:
    array = np.asarray(values, dtype=np.float64)
    if array.ndim != 1:
        raise ValueError(f"expected one series of shape (n,); got shape {array.shape}")
    return array[np.newaxis, :]


__all__ = [
    "DURBIN_WATSON_EXACT_MAX_ROWS",
    "BatchTestResult",
    "PredictorCloud",
    "TestResult",
    "breusch_godfrey",
    "breusch_godfrey_batch",
    "breusch_pagan",
    "breusch_pagan_batch",
    "cooks_distance",
    "cooks_distance_batch",
    "durbin_watson",
    "durbin_watson_batch",
    "durbin_watson_cdf",
    "durbin_watson_test",
    "jarque_bera",
    "jarque_bera_batch",
    "leverage",
    "leverage_batch",
    "new_point_p_value",
    "predictor_cloud",
    "variance_increase_p_value",
    "variance_inflation",
    "variance_inflation_batch",
]
