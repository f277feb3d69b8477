"""Readings files (SPEC section 2) and the validation of one typed value."""

from __future__ import annotations

import pytest

from diag.core import readings
from diag.core.case import load_case
from diag.core.errors import DiagError
from diag.core.paths import cases_dir

CASE = cases_dir() / "pushpull-output.yaml"  # 12 V supply, TP1 supply point, TP3 dc+ac


@pytest.fixture(scope="module")
def case():
    return load_case(CASE)


def test_single_unit_forms_and_prefixes(case):
    text = "point,value\nTP2,11.9\nTP3,1.19 V\nTP4,312m\nTP1,27 mA\n"
    rf = readings.parse_text(text, case)
    got = {(r.point, r.kind): r.value for r in rf.single()}
    assert got[("TP2", "dc")] == pytest.approx(11.9)
    assert got[("TP3", "dc")] == pytest.approx(1.19)
    assert got[("TP4", "dc")] == pytest.approx(0.312)  # SI prefix m = 1e-3
    assert got[("TP1", "dc")] == pytest.approx(0.027)
    assert not rf.errors and not rf.batch
    rows = {r.point: r.row for r in rf.single()}
    assert rows == {"TP2": 2, "TP3": 3, "TP4": 4, "TP1": 5}  # header is row 1


def test_kind_column(case):
    rf = readings.parse_text("point,kind,value\nTP3,ac,70m\nTP3,dc,1.2\nTP7,,6.4\n", case)
    got = {(r.point, r.kind): r.value for r in rf.single()}
    assert got == {("TP3", "ac"): pytest.approx(0.07), ("TP3", "dc"): pytest.approx(1.2),
                   ("TP7", "dc"): pytest.approx(6.4)}


def test_values_written_with_their_kind_notes_columns_and_short_rows(case):
    # our own rules (readings module docstring): what a technician's sheet carries beside
    # the SPEC's columns is read, not refused
    rf = readings.parse_text("point,kind,value,notes\nTP3,ac,70 mV rms,at 1 kHz\n"
                             "TP2,,11.9 V dc,\n", case)
    got = {(r.point, r.kind): r.value for r in rf.single()}
    assert got == {("TP3", "ac"): pytest.approx(0.07), ("TP2", "dc"): pytest.approx(11.9)}
    rf = readings.parse_text("point,value\nTP3,0.07Vrms\nTP3,1.19\n", case)
    assert {(r.point, r.kind) for r in rf.single()} == {("TP3", "ac"), ("TP3", "dc")}
    rf = readings.parse_text("point,kind,value\nTP2,11.9\nTP3,ac,70m\n", case)
    assert {(r.point, r.kind) for r in rf.single()} == {("TP2", "dc"), ("TP3", "ac")}
    # a value whose kind contradicts its row is refused, the rest kept
    rf = readings.parse_text("point,kind,value\nTP3,dc,70 mV rms\nTP2,dc,11.9\n", case)
    assert len(rf.errors) == 1 and "the reading's kind is dc" in str(rf.errors[0])
    assert [r.point for r in rf.single()] == ["TP2"]
    # a column that is neither a reading's nor free text is named, not guessed at
    with pytest.raises(DiagError, match="unknown column 'knid'"):
        readings.parse_text("point,knid,value\nTP3,ac,70m\n", case)


def test_header_only_is_valid(case):
    rf = readings.parse_text("point,value\n", case)
    assert rf.single() == () and not rf.errors


def test_bad_rows_reported_with_row_numbers_rest_kept(case):
    text = ("point,value\nTP2,11.9\nTP99,1\nTP3,4kk\nTP4,13.5\nTP5,-0.6\n"
            "TP2,ac,1\nTP7,6.4\n")
    rf = readings.parse_text(text, case, file="u.csv")
    lines = sorted(e.line for e in rf.errors)
    assert lines == [3, 4, 5, 6, 7]
    msgs = " ".join(rf.rejected)
    assert "TP99" in msgs and "above" in msgs and "negative" in msgs
    kept = {r.point for r in rf.single()}
    assert kept == {"TP2", "TP7"}


def test_kind_not_offered(case):
    rf = readings.parse_text("point,kind,value\nTP2,ac,1\n", case)
    assert rf.errors and "no ac reading" in rf.rejected[0]


def test_batch(case):
    text = "unit,point,value\nA1,TP2,11.9\nB7,TP2,0\nA1,TP3,1.2\nB7,TP3,x\n"
    rf = readings.parse_text(text, case)
    assert rf.batch and list(rf.units) == ["A1", "B7"]  # order of first appearance
    assert len(rf.units["A1"]) == 2 and len(rf.units["B7"]) == 1
    assert [e.line for e in rf.errors] == [5]
    with pytest.raises(DiagError):
        rf.single()


def test_repeated_reading_keeps_the_later(case):
    rf = readings.parse_text("point,value\nTP2,11.0\nTP2,11.9\n", case)
    assert [r.value for r in rf.single()] == [pytest.approx(11.9)]
    assert rf.errors[0].line == 2


def test_check_value_for_one_typed_reading(case):
    assert readings.check_value(case, "TP7", "dc", "6.4 V") == pytest.approx(6.4)
    assert readings.check_value(case, "TP1", "dc", "27m") == pytest.approx(0.027)
    # 12 V supply at 5 % tolerance: 13.5 V cannot come from this circuit (SPEC section 2)
    for point, kind, text in (("TP7", "dc", "13.5"), ("TP7", "dc", "-0.6"),
                              ("TP7", "ac", "-1"), ("TP1", "dc", "-5m"),
                              ("TP7", "dc", "abc"), ("TP0", "dc", "1")):
        with pytest.raises(DiagError):
            readings.check_value(case, point, kind, text)


def test_a_supply_current_above_its_limit_is_refused(case):
    """pushpull-output's bench supply holds its current at 250 mA (`limit:`): a supply
    reading above the limit with its spread and the readings' over-supply margin (5 %
    each: 276 mA) cannot come from this circuit, one at the limit can (SPEC section 2:
    a reading far outside what the circuit can produce is refused)."""
    assert case.part("V1").fields["limit"] == pytest.approx(0.25)
    assert readings.check_value(case, "TP1", "dc", "262m") == pytest.approx(0.262)
    with pytest.raises(DiagError):
        readings.check_value(case, "TP1", "dc", "0.3")


def test_a_bare_number_past_the_supplies_suggests_the_milli_prefix(case):
    """A meter on a mA or mV range shows "27.0" with the prefix beside the digits; typed
    bare it reads as amperes or volts. Past what the supplies can produce, the refusal
    says how to type it, where the milli value fits (our own rule); a value typed with a
    unit, or one that fits in no unit, gets the plain range."""
    with pytest.raises(DiagError) as err:
        readings.check_value(case, "TP1", "dc", "27")
    assert "27 mA" in err.value.hint and "27m" in err.value.hint
    with pytest.raises(DiagError) as err:
        readings.check_value(case, "TP3", "dc", "312")
    assert "312 mV" in err.value.hint
    for typed in ("312 V", "99999"):
        with pytest.raises(DiagError) as err:
            readings.check_value(case, "TP3", "dc", typed)
        assert "prefix" not in err.value.hint


def test_missing_header_and_empty(case):
    rf = readings.parse_text("TP2,11.9\n", case)  # no header: point,value assumed
    assert len(rf.single()) == 1
    with pytest.raises(DiagError):
        readings.parse_text("", case)
    with pytest.raises(DiagError):
        readings.parse_text("a,b,c,d,e\n", case)


def test_an_over_range_display_is_named_with_what_to_do(case):
    # A handheld meter shows "OL" over its range (common practice, no source); the row is
    # refused with a message that says so and what to check, not "not a value".
    for text in ("OL", "O.L.", "-OL", "0L", "ol", "over range"):
        with pytest.raises(DiagError) as volts:
            readings.check_value(case, "TP7", "dc", text)
        assert "OL (over range)" in str(volts.value)
        assert "1 kV" in str(volts.value)  # the profile's top volts range (rules/meters.yaml)
    with pytest.raises(DiagError) as amps:
        readings.check_value(case, "TP1", "dc", "OL")
    assert "top current range (10 A)" in str(amps.value)
    assert "short across the supply" in str(amps.value)
    rf = readings.parse_text("point,value\nTP1,OL\nTP7,6.4\n", case)
    assert [r.point for r in rf.single()] == ["TP7"]
    assert len(rf.errors) == 1 and "row 2" in str(rf.errors[0])
    # numbers that merely contain the letters stay numbers or plain errors
    assert readings.check_value(case, "TP7", "dc", "0.5") == pytest.approx(0.5)
    with pytest.raises(DiagError, match="not a value"):
        readings.check_value(case, "TP7", "dc", "OLD")


def test_a_decimal_comma_in_a_file_is_named(case):
    # "0,71" in a CSV splits into two columns: the row is refused with the fix spelled out
    rf = readings.parse_text("point,value\nTP7,6,4\nTP3,0.5\n", case)
    assert [r.point for r in rf.single()] == ["TP3"]
    assert "write 6.4" in str(rf.errors[0]) and "row 2" in str(rf.errors[0])
    rf = readings.parse_text("point,value\nTP7,6.4,x\n", case)  # not a number: no guess
    assert "decimal comma" not in str(rf.errors[0])
    with pytest.raises(DiagError, match="decimal point"):  # typed in the interface
        readings.check_value(case, "TP7", "dc", "6,4")



def test_a_semicolon_or_tab_file_with_decimal_commas_reads_as_the_comma_file(case):
    """A spreadsheet set to a decimal-comma language saves its CSV with semicolons
    (common practice, no source); such a file, or one split by tabs, reads as the same
    file with commas and decimal points would, bad rows still named by row."""
    plain = readings.parse_text(
        "unit,point,kind,value\nA1,TP7,dc,6.4\nA1,TP3,ac,70.5 mV\nB2,TP1,,27.5m\n", case)
    semi = readings.parse_text(
        "\ufeffunit;point;kind;value\r\nA1;TP7;dc;6,4\r\nA1;TP3;ac;70,5 mV\r\n"
        "B2;TP1;;27,5m\r\nB2;TP2;x;1\r\n", case)
    tabs = readings.parse_text(
        "# exported\nunit\tpoint\tkind\tvalue\nA1\tTP7\tdc\t6,4\nA1\tTP3\tac\t70.5 mV\n"
        "B2\tTP1\t\t27,5m\n", case)
    for rf in (semi, tabs):
        assert rf.batch and rf.units.keys() == plain.units.keys()
        for u in plain.units:
            assert [(r.point, r.kind, r.value) for r in rf.units[u]] == \
                [(r.point, r.kind, r.value) for r in plain.units[u]]
    assert [e.line for e in semi.errors] == [5] and not tabs.errors
    bare = readings.parse_text("TP7;dc;6,4\nTP3;ac;70,5 mV\n", case)  # no header row
    assert [(r.point, r.kind, r.value) for r in bare.single()] == \
        [("TP7", "dc", 6.4), ("TP3", "ac", pytest.approx(0.0705))] and not bare.errors
    # a comma-separated file keeps refusing a decimal comma (it splits the row)
    assert readings.parse_text("point,value\nTP7,6,4\n", case).errors


def test_a_point_typed_in_another_letter_case_is_the_case_s_point(case):
    # "tp3" names TP3: the reading is kept under the case's own spelling
    rf = readings.parse_text("point,value\ntp7,6.4\n Tp3 ,0.5\n", case)
    assert sorted(r.point for r in rf.single()) == ["TP3", "TP7"] and not rf.errors
    assert readings.point_of(case, "tp7").id == "TP7"
    assert readings.point_of(case, "TP77") is None


def test_a_supply_current_reverses_only_where_another_supply_can_drive_it(case, tmp_path):
    # One supply: its current cannot run backwards beyond the meter's allowance.
    with pytest.raises(DiagError, match="negative"):
        readings.check_value(case, "TP1", "dc", "-1.3m")
    # Two supplies: a 5 V logic pin (50 Ω output resistance) can feed a dead 12 V rail
    # back through a junction, so V1's current may read negative, down to what the pin
    # can deliver: 5 V x 1.05 (tolerance) x 1.05 (`over_supply`) / 50 Ω = 110 mA
    # (Ohm's law), plus the 0.1 mA allowance of rules/checks.yaml.
    two = tmp_path / "two.yaml"
    two.write_text("""\
case: 1
title: Logic pin into a transistor switch
parts:
  V1: {kind: supply, plus: vcc, minus: gnd, volts: 12, tol: 5%, r_source: 0.2}
  V2: {kind: supply, plus: logic, minus: gnd, volts: 5, tol: 5%, r_source: 50}
  R1: {kind: resistor, nodes: [logic, base], ohms: 3k3}
  R2: {kind: resistor, nodes: [vcc, col], ohms: 1k}
  Q1: {kind: npn, c: col, b: base, e: gnd}
points:
  TP1: {supply: V1, where: "ammeter in the 12 V lead"}
  TP2: {node: col, where: "Q1 collector"}
""", encoding="utf-8")
    c2 = load_case(two)
    assert readings.check_value(c2, "TP1", "dc", "-1.3m") == pytest.approx(-1.3e-3)
    lo, _ = readings.limits(c2)[("TP1", "dc")]
    assert lo == pytest.approx(-(5 * 1.05 * 1.05 / 50 + 1e-4))
    with pytest.raises(DiagError, match="negative: probes reversed"):
        readings.check_value(c2, "TP1", "dc", "-0.2")  # past it: the leads swapped
