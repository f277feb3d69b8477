"""Component values as people write them: SI prefixes and the IEC 60062 letter code.

`parse_value("4k7")` -> 4700.0, `parse_value("312 mV", unit="V")` -> 0.312,
`parse_tol("5%")` -> 0.05, `format_value(4700, "ohm")` -> "4.7 kΩ".

Accepted value text (spaces around the number allowed):
  - a plain number: "12", "-1.5", "0.312", "1e-3";
  - a number with one SI prefix: f p n u µ μ m k M G (also K for kilo and "meg" for mega,
    as in resistor markings and SPICE; f, femto, as in the saturation currents of SPICE
    model cards, "7f"); 'm' is milli, 'M' is mega, 'F' is the farad;
  - the IEC 60062 letter-and-digit code, the letter standing for the decimal point:
    "4k7" (4.7 k), "2R2" (2.2 Ω, R = unit point), "R47" (0.47), "1M5", "4n7", "0R1";
    also the zener marking "5V6" (5.6 V);
  - an optional trailing unit word or symbol: ohm, ohms, Ω, V, A, F, H, Hz, W, s (v and a
    too, as readings are often typed: "710mv" is 0.71 V, the prefix keeping its case).
A decimal comma ("0,71") is refused with a message that asks for the point: in a CSV the
comma separates columns, and "1,200" could be read either way.
Booleans, NaN and infinities are rejected. Every failure is a ValueError whose message
says what is wrong and shows a valid example.
"""

from __future__ import annotations

import math
import re
from numbers import Real

# SI prefix -> power of ten. 'K' (kilo) and 'meg' (mega) as used on parts and in SPICE.
PREFIXES: dict[str, int] = {
    "f": -15, "p": -12, "n": -9, "u": -6, "\u00b5": -6, "\u03bc": -6, "m": -3,
    "k": 3, "K": 3, "M": 6, "meg": 6, "Meg": 6, "MEG": 6, "G": 9,
}

# Accepted unit spellings -> canonical unit name.
UNITS: dict[str, str] = {
    "ohm": "ohm", "ohms": "ohm", "Ohm": "ohm", "Ohms": "ohm", "OHM": "ohm", "OHMS": "ohm",
    "\u03a9": "ohm", "\u2126": "ohm",
    "V": "V", "A": "A", "F": "F", "H": "H", "Hz": "Hz", "hz": "Hz", "W": "W", "s": "s",
    # lower case as readings are often typed ("710mv", "110 ma"); the prefix keeps its case
    "v": "V", "a": "A",
}

# Canonical unit -> the symbol `format_value` prints.
SYMBOLS: dict[str, str] = {"ohm": "\u03a9", "V": "V", "A": "A", "F": "F", "H": "H",
                           "Hz": "Hz", "W": "W", "s": "s"}

_NUMBER = re.compile(r"([+-]?(?:[0-9]+\.?[0-9]*|\.[0-9]+)(?:[eE][+-]?[0-9]+)?)\s*(.*)")
# IEC 60062 code: digits, a letter in place of the decimal point, digits (either side may
# be empty, not both), then an optional unit.
_CODE = re.compile(r"([+-]?)([0-9]*)(R|r|V|meg|Meg|MEG|[fpnu\u00b5\u03bcmkKMG])([0-9]*)\s*(.*)")
# Letters that stand for the decimal point and name the unit: R (IEC 60062, ohms) and V
# (zener voltage marking, 5V6 = 5.6 V; common practice).
_UNIT_POINT = {"R": "ohm", "r": "ohm", "V": "V"}

_EXAMPLE = "e.g. 4k7, 4.7k, 2R2 or 312 mV"
_DECIMAL_COMMA = re.compile(r"[+-]?[0-9]*,[0-9]+\s*\S*")


def canonical_unit(unit: str) -> str:
    """Canonical name of a unit spelling ('ohms' -> 'ohm', 'Ω' -> 'ohm'); ValueError if unknown."""
    try:
        return UNITS[unit.strip()]
    except (KeyError, AttributeError):
        raise ValueError(f"unknown unit {unit!r}: use one of ohm, V, A, F, H, Hz, W, s") from None


def _split_suffix(rest: str) -> tuple[int, str | None] | None:
    """Split the text after the number into (power of ten, canonical unit or None)."""
    if rest == "":
        return 0, None
    if rest in UNITS:
        return 0, UNITS[rest]
    if rest in PREFIXES:
        return PREFIXES[rest], None
    for pre, power in PREFIXES.items():
        if rest.startswith(pre) and rest[len(pre):] in UNITS:
            return power, UNITS[rest[len(pre):]]
    return None


def _check_unit(text: str, found: str | None, want: str | None) -> None:
    if want is not None and found is not None and found != want:
        raise ValueError(f"{text!r} is in {SYMBOLS[found]}, but {SYMBOLS[want]} is expected "
                         f"here: give the value in {SYMBOLS[want]}, e.g. "
                         f"{_unit_example(want)}")


_EXAMPLES = {"ohm": "4k7 or 4.7 k\u03a9", "V": "12 or 312 mV", "A": "1.2 mA",
             "F": "220n or 2u2", "H": "10 mH", "Hz": "1k or 50 Hz", "W": "0.25 W",
             "s": "10 ms"}


def _unit_example(unit: str) -> str:
    return _EXAMPLES[unit]


def _finite(text: str, x: float) -> float:
    if not math.isfinite(x):
        raise ValueError(f"{text!r} is not a finite value: give an ordinary number, {_EXAMPLE}")
    return x


def _scale(mantissa: str, power: int) -> float:
    """mantissa × 10**power, correctly rounded (so '4k7' is exactly 4700.0)."""
    if "e" in mantissa.lower():
        return float(mantissa) * 10.0 ** power
    return float(mantissa + (f"e{power}" if power else ""))


def parse_value(text: object, unit: str | None = None) -> float:
    """Parse a value (number or text) to a float in SI base units (ohms, volts, ...).

    `unit` (e.g. "V", "ohm", "F") makes text carrying a different unit an error; text
    without a unit is taken to be in `unit`. Raises ValueError (never anything else).
    """
    want = canonical_unit(unit) if unit is not None else None
    if isinstance(text, bool):
        raise ValueError(f"{text!r} is not a value: write a number, {_EXAMPLE} "
                         "(yes/no/true/false read as true or false)")
    if isinstance(text, Real):
        try:
            return _finite(str(text), float(text))
        except OverflowError:
            raise ValueError(f"{text!r} is too large to be a value: {_EXAMPLE}") from None
    if not isinstance(text, str):
        raise ValueError(f"{text!r} is not a value: write a number, {_EXAMPLE}")
    s = text.strip()
    m = _NUMBER.fullmatch(s)
    if m:
        split = _split_suffix(m.group(2))
        if split is not None:
            power, found = split
            _check_unit(text, found, want)
            return _finite(text, _scale(m.group(1), power))
    c = _CODE.fullmatch(s)
    if c and (c.group(2) or c.group(4)):
        sign, whole, letter, frac, rest = c.groups()
        found = UNITS.get(rest) if rest else None
        if rest == "" or found is not None:
            if letter in _UNIT_POINT:
                own = _UNIT_POINT[letter]
                other = found if found not in (None, own) else want
                if other not in (None, own):
                    raise ValueError(f"{text!r}: the letter {letter} marks {SYMBOLS[own]} "
                                     f"(2{letter}2 = 2.2 {SYMBOLS[own]}), not "
                                     f"{SYMBOLS[other]}; write e.g. 2.2 {SYMBOLS[other]}")
                found, power = own, 0
            else:
                power = PREFIXES[letter]
            _check_unit(text, found, want)
            mant = f"{sign}{whole or '0'}.{frac or '0'}"
            return _finite(text, _scale(mant, power))
    if _DECIMAL_COMMA.fullmatch(s):
        raise ValueError(f"{text!r} is not a value: write the decimal point as '.', e.g. "
                         f"{s.replace(',', '.', 1)} (and no separator for thousands)")
    eg = _unit_example(want) if want in _EXAMPLES else "4k7 or 4.7k"  # in the unit asked for
    raise ValueError(f"{text!r} is not a value: use a number with one prefix, e.g. {eg}")


_TOL = re.compile(r"(?:\u00b1|\+/-|\+-)?\s*([0-9]+\.?[0-9]*|\.[0-9]+)\s*(%?)")


def parse_tol(text: object) -> float:
    """Parse a tolerance to a fraction: "5%", "±1 %", 0.05 or "0.05" -> 0.05.

    A bare number is a fraction; a number with % is a percentage. The result must lie
    strictly between 0 and 1 (0 % and 100 % excluded). Raises ValueError.
    """
    hint = "write it as 5% or 0.05"
    if isinstance(text, bool):
        raise ValueError(f"{text!r} is not a tolerance: {hint}")
    if isinstance(text, Real):
        try:
            x = float(text)
        except OverflowError:
            raise ValueError(f"{text!r} is not a tolerance: {hint}") from None
    elif isinstance(text, str):
        m = _TOL.fullmatch(text.strip())
        if not m:
            raise ValueError(f"{text!r} is not a tolerance: {hint}")
        x = float(m.group(1)) / (100.0 if m.group(2) else 1.0)
    else:
        raise ValueError(f"{text!r} is not a tolerance: {hint}")
    if not (0.0 < x < 1.0):
        raise ValueError(f"tolerance {text!r} must lie between 0 and 100 % "
                         f"(a fraction between 0 and 1): {hint}")
    return x


_ENG = {-12: "p", -9: "n", -6: "\u00b5", -3: "m", 0: "", 3: "k", 6: "M", 9: "G"}


def format_value(x: float, unit: str | None = None, digits: int = 3) -> str:
    """Engineering notation to `digits` significant figures: 4700, "ohm" -> "4.7 kΩ".

    Prefixes p..G; values from 0.1 to 1 keep no prefix ("-0.65 V"); values outside
    1e-12..1e12 use an exponent ("1.5e-14 A"). `unit` is any spelling `parse_value`
    accepts, or None for a bare number ("4.7k"). Non-finite values print as "—".
    """
    sym = SYMBOLS[canonical_unit(unit)] if unit is not None else ""
    x = float(x)
    if not math.isfinite(x):
        return "\u2014"
    sep = " " if sym else ""
    if x == 0.0:
        return f"0{sep}{sym}"
    ax = abs(x)
    if 0.1 <= ax < 1.0:
        power = 0
    else:
        power = 3 * math.floor(math.log10(ax) / 3)
    if power not in _ENG:
        return f"{x:.{digits}g}{sep}{sym}"
    mant = float(f"{x / 10.0 ** power:.{digits}g}")
    if abs(mant) >= 1000.0:  # 999.6 rounds to 1000: move up one prefix
        power += 3
        if power not in _ENG:
            return f"{x:.{digits}g}{sep}{sym}"
        mant = float(f"{x / 10.0 ** power:.{digits}g}")
    text = f"{mant:.{digits}g}"
    pre = _ENG[power]
    if not sym:
        return f"{text}{pre}"
    return f"{text} {pre}{sym}"
