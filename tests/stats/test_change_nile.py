"""The Nile river's annual flow at Aswan, 1871–1970 (shipped with statsmodels): a published break.

Published findings (recalled from memory in CHECK_VALUES item 12, MEM): Cobb (1978, Biometrika
65(2)) finds a change point around 1898; Zeileis, Kleiber, Krämer & Hornik (2003, CSDA 44)
date a single break at observation 28 = 1898, the last year of the old regime, with sup-F 75.93
and OLS-CUSUM 2.9518 (p 5.409e−08). CHECK_VALUES item 12 re-computes these with statsmodels and
its own scan (CONF-sm): sup-F = 75.9298 at a first regime of 28 years (1871–1898, mean 1097.75),
the new regime from 1899 (mean 849.97). Item 2 gives the first 5 % CUSUM crossing: 1913 with
Brown, Durbin & Evans's σ̂, 1911 with statsmodels' centred one.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import statsmodels.api as sm
from statsmodels.datasets import nile
from statsmodels.stats.diagnostic import breaks_cusumolsresid, recursive_olsresiduals

from monitor.cli import main
from monitor.stats.change import cusum_test, ols_cusum_test
from monitor.stats.shift import chow_test_at
from monitor.stats.supf import sup_f_test


@pytest.fixture(scope="module")
def flow() -> tuple[np.ndarray[Any, np.dtype[np.int64]], np.ndarray[Any, np.dtype[np.float64]]]:
    data = nile.load_pandas().data
    years = data["year"].astype(int).to_numpy()
    assert years[0] == 1871 and years[-1] == 1970 and len(years) == 100
    return years, data["volume"].to_numpy(dtype=np.float64)


def test_sup_f_dates_the_break_after_1898(flow: Any) -> None:
    years, volume = flow
    result = sup_f_test(None, volume).series(0)
    assert result.statistic == pytest.approx(75.9298, abs=1e-3)  # CHECK_VALUES item 12
    assert result.candidates == 71  # first regime ending at observation 15 … 85
    assert result.first_regime_rows == 28
    assert result.break_index == 28 and years[result.break_index] == 1899
    assert years[result.break_index - 1] == 1898  # the published "break at 1898"
    assert volume[:28].mean() == pytest.approx(1097.75)
    assert volume[28:].mean() == pytest.approx(849.97, abs=0.005)
    # Far beyond the simulated table: reported as below its floor of 0.001.
    assert result.p_value == 0.001 and result.p_value_bound == "below"


def test_chow_at_the_dated_break_equals_sup_f(flow: Any) -> None:
    # CHECK_VALUES item 11: Chow F with the break fixed after 1898 is 75.93 on (1, 98).
    _years, volume = flow
    chow = chow_test_at(None, volume, 28).series(0)
    assert chow.df == (1, 98)
    assert chow.statistic == pytest.approx(75.9298, abs=1e-3)


def test_ols_cusum_on_the_nile(flow: Any) -> None:
    years, volume = flow
    result = ols_cusum_test(None, volume).series(0)
    resid = volume - volume.mean()
    reference = breaks_cusumolsresid(resid, ddof=1)  # statsmodels, CHECK_VALUES item 3 / 12
    assert result.statistic == pytest.approx(2.9518, abs=1e-4)
    assert result.statistic == pytest.approx(reference[0], rel=1e-12)
    assert result.p_value == pytest.approx(5.409e-08, rel=1e-3)
    assert years[result.peak_index] == 1898


def test_cusum_crosses_late_with_bde_sigma(flow: Any) -> None:
    years, volume = flow
    result = cusum_test(None, volume).series(0)
    assert result.crossed is True
    assert years[result.first_crossing[0.05]] == 1913  # BDE's σ̂ (CHECK_VALUES item 2)
    # statsmodels' centred σ̂ makes the path larger and the crossing earlier: 1911.
    out = recursive_olsresiduals(sm.OLS(volume, np.ones((100, 1))).fit(), alpha=0.95)
    path, upper = out[5][1:], out[6][1]
    first = int(np.argmax(np.abs(path) > upper))
    assert years[1 + first] == 1911


def test_plumbline_breaks_finds_the_published_break(tmp_path: Path, capsys: Any, flow: Any) -> None:
    years, volume = flow
    path = tmp_path / "nile.csv"
    lines = ["year,volume"] + [f"{y},{v:g}" for y, v in zip(years, volume, strict=True)]
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    status = main(["breaks", str(path), "--response", "volume", "--period", "year",
                   "--format", "json"])  # fmt: skip
    captured = capsys.readouterr()
    assert status == 0, captured.err
    report = json.loads(captured.out)
    sup_f = report["sup_f"]
    assert sup_f["statistic"] == pytest.approx(75.93, abs=1e-3)
    assert sup_f["p_value"] < 0.01
    assert sup_f["break_index"] == 28 and sup_f["break_period"] == "1899"
    assert sup_f["last_period_before_break"] == "1898"  # Cobb (1978); Zeileis et al. (2003)
    ols = report["ols_cusum"]
    assert ols["statistic"] == pytest.approx(2.9518, abs=1e-4) and ols["p_value"] < 0.01
    assert report["cusum"]["crossed"] is True and report["cusum"]["first_crossing"] == "1913"
    assert main(["breaks", str(path), "--response", "volume", "--period", "year"]) == 0
    table = capsys.readouterr().out
    assert table.startswith("Change tests of the mean of volume over 100 rows (1871 to 1970)")
    assert "new regime starting at year 1899" in table
