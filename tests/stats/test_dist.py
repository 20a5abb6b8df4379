"""The upper-tail helpers of ``monitor.stats._dist`` against scipy.stats (the reference they
replace in the hot paths): the same values bit for bit, on ordinary and edge arguments."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from monitor.stats._dist import chi2_sf, f_sf, t_sf

_RNG = np.random.default_rng(20261203)
_EDGES = np.array([-np.inf, -1e300, -50.0, -1.0, -0.0, 0.0, 1e-300, 0.5, 1.0, 3.0, 40.0, 1e300,
                   np.inf, np.nan])
_X = np.concatenate([_EDGES, _RNG.normal(0.0, 5.0, 200), np.abs(_RNG.standard_cauchy(200))])
_DF = np.array([-1.0, 0.0, 0.5, 1.0, 2.0, 3.0, 7.5, 30.0, 1e6, np.inf, np.nan])


def _same(ours: object, reference: object) -> None:
    a, b = np.asarray(ours), np.asarray(reference)
    assert a.shape == b.shape and a.dtype == b.dtype
    assert np.array_equal(a, b, equal_nan=True)


@pytest.mark.parametrize("df", list(_DF))
def test_t_sf_equals_scipy(df: float) -> None:
    _same(t_sf(_X, df), stats.t.sf(_X, df))


@pytest.mark.parametrize("df", list(_DF))
def test_chi2_sf_equals_scipy(df: float) -> None:
    _same(chi2_sf(_X, df), stats.chi2.sf(_X, df))


@pytest.mark.parametrize("dfn", list(_DF))
def test_f_sf_equals_scipy(dfn: float) -> None:
    for dfd in _DF:
        _same(f_sf(_X, dfn, dfd), stats.f.sf(_X, dfn, dfd))


def test_broadcasting_and_scalars_as_scipy() -> None:
    x = _RNG.normal(0.0, 3.0, (4, 5))
    df = np.array([1, 2, 0, 9, 30])  # integer degrees of freedom, one not positive
    _same(t_sf(x, df), stats.t.sf(x, df))
    _same(chi2_sf(np.abs(x), df[:, None][:4]), stats.chi2.sf(np.abs(x), df[:, None][:4]))
    _same(f_sf(np.abs(x), 2, df), stats.f.sf(np.abs(x), 2, df))
    for value in (2.5, -0.0, np.inf, np.nan):
        for ours, reference in ((t_sf(value, 4), stats.t.sf(value, 4)),
                                (chi2_sf(value, 1), stats.chi2.sf(value, 1)),
                                (f_sf(value, 2, 7), stats.f.sf(value, 2, 7))):
            assert type(ours) is type(reference)
            _same(ours, reference)
