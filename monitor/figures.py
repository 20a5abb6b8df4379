"""How numbers are written for people: one rule per quantity, the same on pages, in e-mail and on
the command line (CSV, JSON and Parquet carry full precision).

| quantity | rule | example |
|---|---|---|
| forecasts and their bounds, actuals (``number``) | 4 significant digits | 512.3 |
| coefficients in a sentence (``number``) | 4 significant digits | 0.07629 |
| coefficients and their bounds in a coefficient table | 6 significant digits | 0.0762918 |
| standard errors and t in a coefficient table | 4 significant digits | 0.01034 |
| leverage (``leverage_text``) | 3 significant digits | 0.0412 |
| R² (``r_squared_text``) | 3 decimals | 0.905 |
| p-values (``format_p_value``) | 4 decimals, "< 0.0001" below | 0.1251 |
| test statistics (``statistic_number``) | 3 significant digits | 1.36, 12.4 |
| shares and hit rates (``percent``) | whole per cent, 1 decimal for hit rates | 95 %, 69.2 % |
| levels (``level_text``) | as written | 95 %, 97.5 % |

Layer 0: the standard library only, so the light commands can use it without numpy.
"""

from __future__ import annotations

import math

from monitor.text import format_p_value


def number(value: float | None, digits: int = 4) -> str:
    """``digits`` significant digits, no exponent for everyday sizes; n/a for None or NaN."""
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "n/a"
    value = float(value)
    if value == 0:
        return "0"
    size = abs(value)
    if size >= 1e9 or size < 1e-4:
        text = f"{value:.{digits - 1}e}"
    else:
        decimals = max(0, digits - 1 - math.floor(math.log10(size)))
        text = f"{value:.{decimals}f}"
        if "." in text:
            text = text.rstrip("0").rstrip(".")
    return text


def leverage_text(value: float | None) -> str:
    """Leverage h₀: 3 significant digits."""
    return number(value, 3)


def statistic_number(value: float | None) -> str:
    """A test statistic (Durbin–Watson, t, F, CUSUM ratio): 3 significant digits."""
    return number(value, 3)


def r_squared_text(value: float | None) -> str:
    """R² and adjusted R²: 3 decimals."""
    if value is None or not math.isfinite(value):
        return "n/a"
    return f"{value:.3f}"


def percent(share: float | None, decimals: int = 0) -> str:
    """0.9512 → "95 %" (a thin space before the sign, as the reports write it)."""
    if share is None or not math.isfinite(share):
        return "n/a"
    return f"{share * 100:.{decimals}f} %"


def level_text(level: float) -> str:
    """0.95 → "95 %", 0.975 → "97.5 %"."""
    return f"{level * 100:g} %"


__all__ = [
    "format_p_value",
    "level_text",
    "leverage_text",
    "number",
    "percent",
    "r_squared_text",
    "statistic_number",
]
