"""IEC 60063 preferred-number series (E6 to E96) and nearest-standard-value lookup.

The tables are the published values of one decade, as integers of the series' figures
(E6..E24: two figures, 47 = 4.7; E48, E96: three figures, 475 = 4.75). E6..E24 hold the
historical values (2.7, 3.0, 3.3, 3.6, 3.9, 4.3, 4.7, ...) that differ from rounding the
geometric series 10**(i/24). Values are the standard's, kept here as constants because
the standard fixes them (no rules file could change them).
"""

from __future__ import annotations

import math

E6 = (10, 15, 22, 33, 47, 68)
E12 = (10, 12, 15, 18, 22, 27, 33, 39, 47, 56, 68, 82)
E24 = (10, 11, 12, 13, 15, 16, 18, 20, 22, 24, 27, 30,
       33, 36, 39, 43, 47, 51, 56, 62, 68, 75, 82, 91)
E96 = (100, 102, 105, 107, 110, 113, 115, 118, 121, 124, 127, 130,
       133, 137, 140, 143, 147, 150, 154, 158, 162, 165, 169, 174,
       178, 182, 187, 191, 196, 200, 205, 210, 215, 221, 226, 232,
       237, 243, 249, 255, 261, 267, 274, 280, 287, 294, 301, 309,
       316, 324, 332, 340, 348, 357, 365, 374, 383, 392, 402, 412,
       422, 432, 442, 453, 464, 475, 487, 499, 511, 523, 536, 549,
       562, 576, 590, 604, 619, 634, 649, 665, 681, 698, 715, 732,
       750, 768, 787, 806, 825, 845, 866, 887, 909, 931, 953, 976)
E48 = (100, 105, 110, 115, 121, 127, 133, 140, 147, 154, 162, 169,
       178, 187, 196, 205, 215, 226, 237, 249, 261, 274, 287, 301,
       316, 332, 348, 365, 383, 402, 422, 442, 464, 487, 511, 536,
       562, 590, 619, 649, 681, 715, 750, 787, 825, 866, 909, 953)

# Series name -> (figures of one decade, number of significant figures), smallest first.
SERIES: dict[str, tuple[tuple[int, ...], int]] = {
    "E6": (E6, 2), "E12": (E12, 2), "E24": (E24, 2), "E48": (E48, 3), "E96": (E96, 3),
}


def _table(series: str) -> tuple[tuple[int, ...], int]:
    try:
        return SERIES[series.upper()]
    except (KeyError, AttributeError):
        raise ValueError(f"unknown series {series!r}: use one of "
                         f"{', '.join(SERIES)}") from None


def _make(figures: int, digits: int, decade: int) -> float:
    """figures × 10**(decade - digits + 1), correctly rounded (47, 2, 3 -> 4700.0)."""
    exp = decade - digits + 1
    return float(f"{figures}e{exp}")


def _check(value: float) -> float:
    v = float(value)
    if not (math.isfinite(v) and v > 0):
        raise ValueError(f"{value!r} has no standard value: give a positive finite number")
    return v


def values(series: str = "E24", decade: int = 0) -> tuple[float, ...]:
    """The series' values in the decade 10**decade .. 10**(decade+1) (decade 0: 1.0 .. 9.x)."""
    figs, digits = _table(series)
    return tuple(_make(f, digits, decade) for f in figs)


def nearest(value: float, series: str = "E24") -> float:
    """The standard value of `series` closest to `value` by ratio (log distance), any decade.

    `value` is positive (ohms, farads, ...); returns it in the same unit.
    """
    v = _check(value)
    figs, digits = _table(series)
    decade = math.floor(math.log10(v))
    best, best_d = v, math.inf
    for dec in (decade - 1, decade, decade + 1):
        for f in figs:
            c = _make(f, digits, dec)
            d = abs(math.log(v / c))
            if d < best_d:
                best, best_d = c, d
    return best


def series_containing(value: float, rel: float = 1e-9) -> str | None:
    """Name of the smallest series (E6, E12, E24, E48, E96) holding `value` (any decade),
    or None. `rel` is the relative tolerance of the match."""
    v = _check(value)
    decade = math.floor(math.log10(v))
    for name, (figs, digits) in SERIES.items():
        for dec in (decade - 1, decade, decade + 1):
            if any(abs(_make(f, digits, dec) / v - 1.0) <= rel for f in figs):
                return name
    return None
