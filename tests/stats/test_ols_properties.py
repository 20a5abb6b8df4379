"""Properties of least squares that any correct fit must have (hypothesis).

Equivariance of the estimates under a change of units and invariance under row order follow
from the normal equations (Seber & Lee 2003; Draper & Smith 1998):

- response times c: every coefficient (intercept included) times c, t statistics times the
  sign of c, R² unchanged;
- predictor j times c: slope j divided by c, the other slopes and the intercept unchanged;
- rows permuted: every coefficient and standard error unchanged.

Data are drawn from a seeded generator with bounded, well-conditioned columns (hypothesis picks
the seed, sizes, offsets, the factor c and the permutation), so the properties are tested, not
the conditioning of random designs.
"""

from __future__ import annotations

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from monitor.stats.ols import fit_ols

RTOL = 1e-9

scale_factors = st.one_of(st.floats(0.001, 1000.0), st.floats(-1000.0, -0.001))


@st.composite
def datasets(draw: st.DrawFn) -> tuple[np.ndarray, np.ndarray]:
    seed = draw(st.integers(0, 2**32 - 1))
    n = draw(st.integers(8, 40))
    k = draw(st.integers(1, 3))
    offset = draw(st.floats(-1000.0, 1000.0))
    rng = np.random.default_rng(seed)
    x = offset + rng.uniform(1.0, 20.0, size=k) * rng.normal(size=(n, k))
    slopes = rng.uniform(-5.0, 5.0, size=k)
    y = 3.0 + x @ slopes + rng.uniform(0.1, 10.0) * rng.normal(size=n)
    return x, y


SETTINGS = settings(max_examples=40, deadline=None)


@SETTINGS
@given(datasets(), scale_factors, st.booleans())
def test_response_units(data: tuple[np.ndarray, np.ndarray], c: float, intercept: bool) -> None:
    x, y = data
    base = fit_ols(x, y, intercept=intercept)
    scaled = fit_ols(x, c * y, intercept=intercept)
    np.testing.assert_allclose(scaled.coef, c * base.coef, rtol=RTOL, atol=1e-12 * abs(c) *
                               np.max(np.abs(base.coef)))
    np.testing.assert_allclose(scaled.t, np.sign(c) * base.t, rtol=1e-8)
    np.testing.assert_allclose(scaled.r_squared, base.r_squared, rtol=1e-10)


@SETTINGS
@given(datasets(), scale_factors, st.integers(0, 2), st.booleans())
def test_predictor_units(
    data: tuple[np.ndarray, np.ndarray], c: float, column: int, intercept: bool
) -> None:
    x, y = data
    j = column % x.shape[1]
    scaled_x = x.copy()
    scaled_x[:, j] *= c
    base = fit_ols(x, y, intercept=intercept)
    scaled = fit_ols(scaled_x, y, intercept=intercept)
    expected = base.coef.copy()
    expected[int(intercept) + j] /= c
    tolerance = 1e-12 * np.max(np.abs(expected))
    np.testing.assert_allclose(scaled.coef, expected, rtol=RTOL, atol=tolerance)
    np.testing.assert_allclose(scaled.sse, base.sse, rtol=1e-9)


@SETTINGS
@given(datasets(), st.data(), st.booleans())
def test_row_order(data: tuple[np.ndarray, np.ndarray], draw: st.DataObject,
                   intercept: bool) -> None:
    x, y = data
    order = np.array(draw.draw(st.permutations(range(len(y)))))
    base = fit_ols(x, y, intercept=intercept)
    shuffled = fit_ols(x[order], y[order], intercept=intercept)
    np.testing.assert_allclose(shuffled.coef, base.coef, rtol=RTOL,
                               atol=1e-12 * np.max(np.abs(base.coef)))
    np.testing.assert_allclose(shuffled.standard_error, base.standard_error, rtol=RTOL)
    np.testing.assert_allclose(shuffled.residuals, base.residuals[order], rtol=1e-8,
                               atol=1e-10 * np.max(np.abs(base.residuals)))
