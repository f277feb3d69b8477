"""Property tests of user input: value text and case files never raise anything but the
documented errors, and formatted values read back to what was formatted."""

from __future__ import annotations

import math
import tempfile
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from diag.core.case import load_case
from diag.core.errors import DiagError
from diag.core.rules import load_rules
from diag.core.values import format_value, parse_tol, parse_value

SPEC_EXAMPLE = Path(__file__).parent / "data" / "spec_example.yaml"
BASE = SPEC_EXAMPLE.read_text(encoding="utf-8")

# Pieces people type into value fields, and pieces that break YAML or the checks.
VALUE_PIECES = ["0", "1", "4", "7", ".", "e", "E", "-", "+", " ", "k", "K", "M", "m", "u",
                "\u00b5", "\u03bc", "n", "p", "G", "R", "V", "meg", "ohm", "ohms", "\u03a9",
                "A", "F", "H", "Hz", "W", "s", "%", "\u00b1", "x", "inf", "nan", "_", ","]
YAML_PIECES = ["{", "}", "[", "]", ":", ",", " ", "\n", "  ", "-", "'", '"', "#", "&a", "*a",
               "!!binary", "!!python/object", "~", "null", "yes", "no", "1e999", "-1",
               "0", "2020-01-01", "kind: ", "nodes: ", "[a, b]", "ohms: ", "4kk", "gnd",
               "model: ", "{IS: 1}", "reads: ", "[ac]", "supply: ", "V1", "R1", "Q1",
               "TP1", "case: ", "hfe: ", "[1, 2, 3]", "set: ", "meter: ", "{r_in: x}",
               "\t", "\u00e9", "?", "|", ">", "%", "@", "<<: *a"]

UNITS = ["ohm", "V", "A", "F", "H", "Hz", "W", "s", None]


@settings(max_examples=400, deadline=None)
@given(st.one_of(st.text(max_size=20), st.lists(st.sampled_from(VALUE_PIECES),
                                                  max_size=6).map("".join)),
       st.sampled_from(UNITS))
def test_parse_value_raises_value_error_only(text, unit):
    try:
        x = parse_value(text, unit)
    except ValueError:
        return
    assert isinstance(x, float) and math.isfinite(x)


@settings(max_examples=200, deadline=None)
@given(st.one_of(st.text(max_size=12), st.floats(), st.integers(), st.booleans(),
                 st.lists(st.sampled_from(VALUE_PIECES), max_size=5).map("".join)))
def test_parse_tol_raises_value_error_only(raw):
    try:
        x = parse_tol(raw)
    except ValueError:
        return
    assert 0.0 < x < 1.0


finite = st.floats(min_value=-1e300, max_value=1e300, allow_nan=False, allow_infinity=False)


@settings(max_examples=500, deadline=None)
@given(finite.filter(lambda v: v == 0.0 or abs(v) > 1e-300), st.sampled_from(UNITS))
def test_format_parse_round_trip(x, unit):
    text = format_value(x, unit)
    back = parse_value(text, unit)
    # 3 significant figures: the rounding error is at most half a unit of the third
    # figure, 0.5 % of the value (worked by hand: 0.5e-2 relative)
    assert back == pytest.approx(x, rel=5.0001e-3, abs=0.0)


@st.composite
def mutated_case(draw) -> str:
    """The SPEC example with a few random edits: deletions, insertions of YAML or value
    pieces, swapped or repeated lines."""
    text = BASE
    for _ in range(draw(st.integers(1, 4))):
        op = draw(st.sampled_from(["delete", "insert", "replace_line", "swap", "repeat"]))
        n = len(text)
        if op == "delete" and n:
            i = draw(st.integers(0, n - 1))
            j = draw(st.integers(i, min(n, i + 12)))
            text = text[:i] + text[j:]
        elif op == "insert":
            i = draw(st.integers(0, n))
            piece = draw(st.one_of(st.sampled_from(YAML_PIECES + VALUE_PIECES),
                                   st.text(max_size=4)))
            text = text[:i] + piece + text[i:]
        else:
            lines = text.split("\n")
            a = draw(st.integers(0, len(lines) - 1))
            b = draw(st.integers(0, len(lines) - 1))
            if op == "swap":
                lines[a], lines[b] = lines[b], lines[a]
            elif op == "repeat":
                lines.insert(b, lines[a])
            else:
                lines[a] = "".join(draw(st.lists(st.sampled_from(YAML_PIECES), max_size=6)))
            text = "\n".join(lines)
    return text


@pytest.fixture(scope="module")
def rules():
    return load_rules()


@settings(max_examples=300, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture, HealthCheck.too_slow])
@given(text=mutated_case())
def test_loader_raises_diag_errors_only(rules, text):
    with tempfile.TemporaryDirectory() as d:
        path = Path(d) / "fuzz.yaml"
        path.write_text(text, encoding="utf-8", errors="surrogatepass")
        try:
            case = load_case(path, rules)
        except DiagError as exc:
            assert str(exc)
            for e in getattr(exc, "errors", [exc]):
                assert e.file == str(path)
            return
    assert case.parts and case.hash


def test_unmutated_example_loads(rules):
    # the fuzz base itself is valid, so mutations start from a loading case
    assert load_case(SPEC_EXAMPLE, rules).nodes


MODEL_PIECES = [".model", ".MODEL", " ", "\n+ ", "Q1", "NPN", "PNP", "D", "JFET", "(", ")",
                "IS", "BF", "=", "1", "7f", "66.78m", "1MEG", "abc", ",", "mfg=X", "Vceo=40",
                "e", "-", ".5", "\t", "==", "1e999"]


@settings(max_examples=400, deadline=None)
@given(st.one_of(st.text(max_size=40), st.lists(st.sampled_from(MODEL_PIECES),
                                                  max_size=12).map("".join)))
def test_model_lines_raise_value_error_only(text):
    """A pasted `.model` line either reads to finite numbers or is a ValueError that
    says what to fix; nothing else escapes."""
    from diag.core.modelcard import parse_model_line

    try:
        name, kind, params = parse_model_line(text)
    except ValueError as exc:
        assert str(exc)
        return
    assert kind in ("NPN", "PNP", "D") and name
    assert all(isinstance(v, float) and math.isfinite(v) for v in params.values())
