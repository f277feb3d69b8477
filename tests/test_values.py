"""Value parsing and formatting (diag.core.values)."""

from __future__ import annotations

import math

import pytest

from diag.core.values import canonical_unit, format_value, parse_tol, parse_value

# IEC 60062 letter-and-digit code: the letter stands for the decimal point and gives the
# multiplier (R = 1, K/k = 1e3, M = 1e6, G = 1e9 for resistors; p, n, u/µ for capacitors).
IEC_60062 = [
    ("4K7", 4700.0),     # IEC 60062 example: 4K7 = 4.7 kΩ
    ("4k7", 4700.0),     # IEC 60062 (lower-case k as printed on parts)
    ("R47", 0.47),       # IEC 60062: R47 = 0.47 Ω
    ("2R2", 2.2),        # IEC 60062: 2R2 = 2.2 Ω
    ("0R1", 0.1),        # IEC 60062 style 0R1 = 0.1 Ω
    ("1M5", 1.5e6),      # IEC 60062: 1M5 = 1.5 MΩ
    ("2M2", 2.2e6),      # IEC 60062: 2M2 = 2.2 MΩ
    ("M47", 0.47e6),     # IEC 60062: M47 = 470 kΩ
    ("4n7", 4.7e-9),     # IEC 60062 capacitor code: 4n7 = 4.7 nF
    ("2u2", 2.2e-6),     # IEC 60062: 2u2 = 2.2 µF
    ("2µ2", 2.2e-6),     # IEC 60062 with the micro sign
    ("p68", 0.68e-12),   # IEC 60062: p68 = 0.68 pF
    ("1G0", 1e9),        # IEC 60062: 1G0 = 1 GΩ
    ("8R", 8.0),         # common practice, no source: 8R marks an 8 Ω speaker
    ("5V6", 5.6),        # common practice, no source: zener voltage marking 5V6 = 5.6 V
]


@pytest.mark.parametrize(("text", "expected"), IEC_60062)
def test_iec_60062_letter_code(text, expected):
    assert parse_value(text) == pytest.approx(expected, rel=1e-12)


# SI prefixes (BIPM SI brochure: p 1e-12, n 1e-9, µ 1e-6, m 1e-3, k 1e3, M 1e6, G 1e9).
SI_TEXT = [
    ("312 mV", 0.312), ("0.312 V", 0.312), ("4.7 k\u03a9", 4700.0), ("4.7k", 4700.0),
    ("1e-3", 1e-3), ("-1.5", -1.5), ("68k", 68e3), ("220n", 220e-9), ("47u", 47e-6),
    ("47\u03bcF", 47e-6), ("10 M\u03a9", 10e6), ("1meg", 1e6), ("1 MEG", 1e6),
    ("1k ohm", 1e3), ("1k ohms", 1e3), ("4k7 \u03a9", 4700.0), ("4n7F", 4.7e-9),
    ("1 kHz", 1e3), ("50 Hz", 50.0), ("1.2 mA", 1.2e-3), ("0.25 W", 0.25),
    ("10 ms", 10e-3), ("100 mH", 0.1), ("5 pF", 5e-12), ("2 GHz", 2e9), (".5", 0.5),
    ("  12  ", 12.0), ("+3.3V", 3.3), ("1.5e3k", 1.5e6),
]


@pytest.mark.parametrize(("text", "expected"), SI_TEXT)
def test_si_prefixes_and_units(text, expected):
    assert parse_value(text) == pytest.approx(expected, rel=1e-12)


def test_femto_and_the_farad_differ():
    # BIPM SI brochure: f (femto) = 1e-15; F is the farad. SPICE model cards give
    # saturation currents in femtoamperes ("IS=6.7f")
    assert parse_value("7f") == pytest.approx(7e-15, rel=1e-12)
    assert parse_value("4f7") == pytest.approx(4.7e-15, rel=1e-12)
    assert parse_value("1 fF", unit="F") == pytest.approx(1e-15, rel=1e-12)
    assert parse_value("10F", unit="F") == pytest.approx(10.0, rel=1e-12)


def test_milli_and_mega_differ():
    # BIPM SI brochure: m (milli) = 1e-3, M (mega) = 1e6
    assert parse_value("1m") == pytest.approx(1e-3, rel=1e-12)
    assert parse_value("1M") == pytest.approx(1e6, rel=1e-12)


def test_numbers_pass_through():
    assert parse_value(12) == 12.0
    assert parse_value(2.5) == 2.5
    assert isinstance(parse_value(12), float)


def test_code_gives_exact_decimal():
    # 4k7 is exactly the float nearest 4700, not 4.7 * 1000 with its rounding error
    assert parse_value("4k7") == 4700.0
    assert parse_value("5k6") == 5600.0


@pytest.mark.parametrize("text", ["4kk", "", "k", "R", "4.7.1", "nan", "inf", "4 7",
                                  "1,5", "4k7k", "abc", "1e", "--1", "4e3e2", "12 VV",
                                  "4k7 kg", "\u0663"])
def test_bad_text_is_value_error(text):
    with pytest.raises(ValueError, match="is not"):
        parse_value(text)


def test_bad_text_message_shows_example():
    with pytest.raises(ValueError) as info:
        parse_value("4kk")
    msg = str(info.value)
    assert "'4kk' is not a value" in msg
    assert "4k7" in msg and "4.7k" in msg


@pytest.mark.parametrize("value", [True, False, None, [1], {"a": 1}, float("nan"),
                                   float("inf"), 10 ** 400])
def test_non_values_rejected(value):
    with pytest.raises(ValueError):
        parse_value(value)


def test_unit_mismatch_is_error():
    assert parse_value("5 V", unit="V") == 5.0
    assert parse_value("5", unit="V") == 5.0
    assert parse_value("4k7", unit="ohms") == 4700.0
    with pytest.raises(ValueError, match="expected"):
        parse_value("5 V", unit="ohm")
    with pytest.raises(ValueError, match="expected"):
        parse_value("220 nF", unit="H")
    with pytest.raises(ValueError, match="letter R marks Ω"):
        parse_value("2R2", unit="V")
    with pytest.raises(ValueError, match="letter V marks V"):
        parse_value("5V6", unit="ohm")


def test_unknown_unit_argument():
    with pytest.raises(ValueError, match="unknown unit"):
        parse_value("1", unit="furlong")
    assert canonical_unit("\u03a9") == "ohm"
    assert canonical_unit("\u2126") == "ohm"  # OHM SIGN, compatibility form of omega


@pytest.mark.parametrize(("text", "expected"), [
    ("5%", 0.05), (0.05, 0.05), ("0.05", 0.05), ("\u00b11 %", 0.01), ("+/-2%", 0.02),
    ("10 %", 0.10), (".5%", 0.005),
])
def test_parse_tol(text, expected):
    assert parse_tol(text) == pytest.approx(expected, rel=1e-12)


@pytest.mark.parametrize("text", ["0%", "100%", 1.5, 0, -0.05, "5 pct", True, None, "abc"])
def test_parse_tol_rejects(text):
    with pytest.raises(ValueError, match="tolerance"):
        parse_tol(text)


@pytest.mark.parametrize(("x", "unit", "text"), [
    (4700.0, "ohm", "4.7 k\u03a9"), (12.0, "V", "12 V"), (220e-9, "F", "220 nF"),
    (-0.65, "V", "-0.65 V"), (1.2e-3, "A", "1.2 mA"), (2.2e-6, "F", "2.2 \u00b5F"),
    (0.0, "V", "0 V"), (1e6, "ohm", "1 M\u03a9"), (68e3, "ohms", "68 k\u03a9"),
    (999.6, "V", "1 kV"), (1234.5, "Hz", "1.23 kHz"), (4700.0, None, "4.7k"),
    (0.47, "ohm", "0.47 \u03a9"), (1e-13, "A", "1e-13 A"),
])
def test_format_value(x, unit, text):
    assert format_value(x, unit) == text


def test_format_non_finite():
    assert format_value(float("nan"), "V") == "\u2014"


def test_format_then_parse_round_trip_examples():
    for x, unit in [(4700.0, "ohm"), (0.312, "V"), (47e-6, "F"), (1.5e-14, "A")]:
        assert parse_value(format_value(x, unit), unit) == pytest.approx(x, rel=5e-3)
        assert math.isfinite(parse_value(format_value(x, unit), unit))


def test_readings_typed_in_lower_case_units():
    # the prefix keeps its case (m milli, M mega); only the unit symbol is forgiven
    assert parse_value("710mv", "V") == pytest.approx(0.71)
    assert parse_value("11.9 v", "V") == pytest.approx(11.9)
    assert parse_value("110 ma", "A") == pytest.approx(0.11)
    assert parse_value("2a", "A") == pytest.approx(2.0)
    with pytest.raises(ValueError, match="is in A"):
        parse_value("12ma", "V")


@pytest.mark.parametrize("text,example", [("0,71", "0.71"), ("1,5", "1.5"),
                                          ("12,6 V", "12.6 V"), (",5", ".5")])
def test_a_decimal_comma_asks_for_the_point(text, example):
    with pytest.raises(ValueError) as info:
        parse_value(text, "V")
    assert "decimal point" in str(info.value)
    assert f"e.g. {example}" in str(info.value)



def test_an_unreadable_reading_is_shown_an_example_in_its_own_unit():
    """A voltage typed as text gets a voltage example, not a resistor code."""
    with pytest.raises(ValueError, match=r"e\.g\. 12 or 312 mV"):
        parse_value("abc", "V")
    with pytest.raises(ValueError, match=r"e\.g\. 1\.2 mA"):
        parse_value("abc", "A")
