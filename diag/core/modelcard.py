"""A SPICE `.model` line as a simulator library gives it, read into card parameters.

`parse_model_line(".model QX NPN(IS=6.7f BF=300 VAF=75)")` -> ("QX", "NPN",
{"IS": 6.7e-15, "BF": 300.0, "VAF": 75.0}). Continuation lines start with '+'; the
parentheses are optional; parameters are NAME=VALUE, separated by spaces or commas.
Descriptive fields some libraries add (DESCRIPTIVE: ratings, maker) are skipped.
Values follow SPICE's own rules, not diag's value syntax: the scale suffix is read without
regard to case (T G MEG K M U N P F; M is milli, MEG mega) and letters after it are
ignored ("10pF"), as in SPICE. Errors are ValueError with what to fix.
"""

from __future__ import annotations

import math
import re

SCALE = {"T": 1e12, "G": 1e9, "MEG": 1e6, "K": 1e3, "MIL": 25.4e-6, "M": 1e-3, "U": 1e-6,
         "N": 1e-9, "P": 1e-12, "F": 1e-15}
TYPES = ("NPN", "PNP", "D")   # the device types diag's kinds take
# Descriptive fields some libraries add to a card (ratings, maker, part type); not SPICE
# parameters, their values need not be numbers: skipped.
DESCRIPTIVE = ("VCEO", "ICRATING", "MFG", "IAVE", "VPK", "TYPE")

_NUMBER = re.compile(r"([+-]?(?:[0-9]+\.?[0-9]*|\.[0-9]+)(?:[eE][+-]?[0-9]+)?)([A-Za-z]*)$")
_PARAM = re.compile(r"([A-Za-z][A-Za-z0-9_]*)\s*=\s*([^\s=,()]+)")


def spice_value(text: str) -> float:
    """A number as SPICE reads it: '6.734f' -> 6.734e-15, '1MEG' -> 1e6, '1M' -> 1e-3."""
    m = _NUMBER.match(text.strip())
    if not m:
        raise ValueError(f"{text!r} is not a SPICE number (e.g. 6.734f, 75, 1e-14)")
    x, tail = float(m.group(1)), m.group(2).upper()
    if not math.isfinite(x):
        raise ValueError(f"{text!r} is too large a number")
    for suffix in ("MEG", "MIL", "T", "G", "K", "M", "U", "N", "P", "F"):
        if tail.startswith(suffix):
            return x * SCALE[suffix]
    return x   # no scale: any letters are a unit, which SPICE ignores


def is_model_line(text: object) -> bool:
    """True for text that is a `.model` line rather than a model's name."""
    return isinstance(text, str) and text.lstrip().lower().startswith(".model")


def parse_model_line(text: str) -> tuple[str, str, dict[str, float]]:
    """(name, device type upper-cased, {PARAMETER: value}) of one `.model` line."""
    joined = " ".join(ln.strip().lstrip("+") for ln in text.strip().splitlines())
    words = joined.replace("(", " ( ").replace(")", " ) ").split()
    if len(words) < 3 or words[0].lower() != ".model":
        raise ValueError("a model line reads `.model NAME TYPE(PARAM=VALUE ...)`")
    name, kind = words[1], words[2].upper()
    if kind not in TYPES:
        raise ValueError(f".model {name}: device type {words[2]!r}: diag takes "
                         f"{', '.join(TYPES)}")
    spaced = joined.replace("(", " ( ").replace(")", " ) ")
    parts = spaced.split(None, 3)
    body = parts[3].strip() if len(parts) > 3 else ""
    if body.startswith("("):
        if not body.endswith(")"):
            raise ValueError(f".model {name}: the parameter list has no closing ')'")
        body = body[1:-1].strip()
    params: dict[str, float] = {}
    rest = _PARAM.sub(" ", body).replace(",", " ").strip()
    if rest:
        raise ValueError(f".model {name}: cannot read {rest.split()[0]!r}: write NAME=VALUE")
    for key, value in _PARAM.findall(body):
        k = key.upper()
        if k in DESCRIPTIVE:
            continue
        if k in params:
            raise ValueError(f".model {name}: {k} given twice")
        try:
            params[k] = spice_value(value)
        except ValueError as exc:
            raise ValueError(f".model {name}: {k}: {exc}") from None
    return name, kind, params
