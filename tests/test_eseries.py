"""IEC 60063 preferred-number series (diag.core.eseries)."""

from __future__ import annotations

import math

import pytest

from diag.core import eseries
from diag.core.eseries import nearest, series_containing, values


def test_table_sizes():
    # IEC 60063: the En series has n values per decade
    for name, n in [("E6", 6), ("E12", 12), ("E24", 24), ("E48", 48), ("E96", 96)]:
        assert len(values(name)) == n
        assert list(values(name)) == sorted(values(name))


def test_e12_listed_values():
    # IEC 60063 E12 listed values
    assert values("E12") == (1.0, 1.2, 1.5, 1.8, 2.2, 2.7, 3.3, 3.9, 4.7, 5.6, 6.8, 8.2)


def test_e24_listed_values():
    # IEC 60063 E24 listed values (historical, not the rounded geometric series)
    assert values("E24") == (1.0, 1.1, 1.2, 1.3, 1.5, 1.6, 1.8, 2.0, 2.2, 2.4, 2.7, 3.0,
                             3.3, 3.6, 3.9, 4.3, 4.7, 5.1, 5.6, 6.2, 6.8, 7.5, 8.2, 9.1)


def test_e24_historical_values_differ_from_geometric_rounding():
    # IEC 60063: 2.7 3.0 3.3 3.6 3.9 4.3 4.7 8.2 are not round(10**(i/24), 1)
    rounded = [round(10 ** (i / 24), 1) for i in range(24)]
    differ = [v for v, r in zip(values("E24"), rounded, strict=True) if abs(v - r) > 1e-9]
    assert differ == [2.7, 3.0, 3.3, 3.6, 3.9, 4.3, 4.7, 8.2]


def test_e6_and_e12_are_subsets():
    # IEC 60063: each series takes every other value of the next larger one (E6..E24)
    assert values("E6") == values("E12")[::2]
    assert values("E12") == values("E24")[::2]


def test_e96_listed_values_and_e48_subset():
    # IEC 60063 E96: 3-figure values equal round(10**(i/96), 2) for every i
    assert values("E96") == tuple(float(f"{10 ** (i / 96):.3g}") for i in range(96))
    # IEC 60063: E48 is every other value of E96
    assert values("E48") == values("E96")[::2]
    # IEC 60063 E96 spot values
    for v in (1.0, 1.02, 1.5, 2.49, 3.32, 4.75, 4.99, 6.81, 9.76):
        assert v in values("E96")


def test_values_in_other_decades_are_exact():
    assert values("E12", 3)[8] == 4700.0
    assert values("E24", -9)[16] == 4.7e-9
    assert values("E96", 2)[-1] == 976.0


@pytest.mark.parametrize(("value", "series", "expected"), [
    (4650.0, "E24", 4700.0),   # IEC 60063 E24 value 4.7
    (5000.0, "E24", 5100.0),   # log-distance: ln(5.1/5) < ln(5/4.7)
    (5000.0, "E12", 4700.0),   # ln(5/4.7) = 0.062 < ln(5.6/5) = 0.113
    (1234.0, "E96", 1240.0),   # IEC 60063 E96 value 1.24
    (333e-6, "E12", 330e-6),   # any decade, farads
    (9.6, "E24", 10.0),        # rounds up into the next decade
    (9.6, "E6", 10.0),
    (1.05, "E6", 1.0),
    (0.103, "E12", 0.1),
    (2.2e-9, "E6", 2.2e-9),
])
def test_nearest(value, series, expected):
    assert nearest(value, series) == pytest.approx(expected, rel=1e-12)


def test_nearest_is_closest_by_ratio():
    # the chosen value beats every listed value of three decades by log distance
    for v in (1.23, 47.9, 3.05e3, 8.66e-7):
        got = nearest(v, "E24")
        for d in (-1, 0, 1):
            dec = math.floor(math.log10(v)) + d
            for c in values("E24", dec):
                assert abs(math.log(v / got)) <= abs(math.log(v / c)) + 1e-12


@pytest.mark.parametrize(("value", "expected"), [
    (4700.0, "E6"), (1.2e3, "E12"), (1.1e3, "E24"), (6.2e-9, "E24"), (105.0, "E48"),
    (475.0, "E96"), (1234.0, None), (10.0, "E6"), (0.001, "E6"),
])
def test_series_containing(value, expected):
    assert series_containing(value) == expected


@pytest.mark.parametrize("bad", [0.0, -4.7, float("nan"), float("inf")])
def test_bad_values(bad):
    with pytest.raises(ValueError):
        nearest(bad)
    with pytest.raises(ValueError):
        series_containing(bad)


def test_unknown_series():
    with pytest.raises(ValueError, match="unknown series"):
        nearest(100.0, "E7")
    assert nearest(100.0, "e12") == 100.0
    assert set(eseries.SERIES) == {"E6", "E12", "E24", "E48", "E96"}
