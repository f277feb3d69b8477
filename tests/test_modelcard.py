"""A SPICE `.model` line pasted into a case (diag/core/modelcard.py): SPICE's number
syntax, the loader's checks, and the same line in ngspice (the reference simulator)."""

from __future__ import annotations

import pytest

from diag.core import solver, spice
from diag.core.case import load_case
from diag.core.errors import CaseErrors
from diag.core.modelcard import parse_model_line, spice_value
from diag.core.netlist import compile_case
from diag.core.rules import load_rules

# SPICE scale factors, case-insensitive, letters after them ignored (ngspice manual,
# "Scale factors": T G Meg K mil m u n p f)
SPICE_NUMBERS = [("6.734f", 6.734e-15), ("66.78m", 66.78e-3), ("66.78M", 66.78e-3),
                 ("1MEG", 1e6), ("1meg", 1e6), ("4.5p", 4.5e-12), ("10pF", 10e-12),
                 ("2k", 2e3), ("3u", 3e-6), ("7n", 7e-9), ("1G", 1e9), ("2T", 2e12),
                 ("1mil", 25.4e-6), (".568", 0.568), ("1e-14", 1e-14), ("75V", 75.0)]


@pytest.mark.parametrize(("text", "value"), SPICE_NUMBERS)
def test_spice_numbers(text, value):
    assert spice_value(text) == pytest.approx(value, rel=1e-12)


def test_a_line_with_continuations_commas_and_descriptive_fields():
    name, dev, p = parse_model_line(""".model QGEN npn (IS=7f, BF=300 VAF=75
        + IKF=65m RB=10 CJE=4.5p Vceo=40 Icrating=200m mfg=Maker)""")
    assert (name, dev) == ("QGEN", "NPN")
    assert p == pytest.approx({"IS": 7e-15, "BF": 300.0, "VAF": 75.0, "IKF": 0.065,
                               "RB": 10.0, "CJE": 4.5e-12})


@pytest.mark.parametrize(("line", "needle"), [
    (".model QX JFET(IS=1)", "device type 'JFET'"),
    (".model QX NPN(IS=1e-14", "no closing ')'"),
    (".model QX NPN(IS=abc)", "'abc' is not a SPICE number"),
    (".model QX NPN(IS 1e-14)", "write NAME=VALUE"),
    (".model QX NPN(IS=1e-14 IS=2e-14)", "IS given twice"),
])
def test_bad_lines_say_what_to_fix(line, needle):
    with pytest.raises(ValueError, match=needle.replace("(", r"\(").replace(")", r"\)")):
        parse_model_line(line)


CASE = """\
case: 1
title: Stage with a pasted card
about: test
parts:
  V1: {kind: supply, plus: vcc, minus: gnd, volts: 12, r_source: 0.5}
  R1: {kind: resistor, nodes: [vcc, base], ohms: 47k}
  R2: {kind: resistor, nodes: [base, gnd], ohms: 10k}
  R3: {kind: resistor, nodes: [vcc, col], ohms: 4k7}
  R4: {kind: resistor, nodes: [emit, gnd], ohms: 1k}
  Q1: {kind: npn, c: col, b: base, e: emit, model: "MODEL"}
  R5: {kind: resistor, nodes: [col, led], ohms: 2k2}
  D1: {kind: led, anode: led, cathode: gnd, model: "DMODEL"}
points:
  TP1: {node: col, where: "Q1 collector"}
"""
QLINE = ".model QGEN NPN(IS=7f BF=300 VAF=75 IKF=65m ISE=7f NE=1.3 RB=10 RC=1 CJE=4.5p TF=300p)"
DLINE = ".model DGEN D(IS=1e-19 N=1.9 RS=8 CJO=10p TT=5n)"


def _case(tmp_path, q=QLINE, d=DLINE):
    p = tmp_path / "c.yaml"
    p.write_text(CASE.replace("DMODEL", d).replace("MODEL", q), encoding="utf-8")
    return p


def test_a_pasted_card_loads_with_its_name_and_values(tmp_path):
    case = load_case(_case(tmp_path))
    q1 = case.part("Q1").model
    assert q1["name"] == "QGEN" and q1["IS"] == pytest.approx(7e-15)
    assert q1["IKF"] == pytest.approx(0.065) and q1["CJE"] == pytest.approx(4.5e-12)
    assert case.part("D1").model["N"] == 1.9


def test_a_card_of_the_wrong_type_is_refused(tmp_path):
    with pytest.raises(CaseErrors) as info:
        load_case(_case(tmp_path, q=QLINE.replace("NPN", "PNP")))
    assert ".model QGEN is a PNP card, and Q1 is an npn" in str(info.value)


@pytest.mark.ngspice
def test_the_pasted_line_solves_as_ngspice_solves_it(tmp_path, ngspice):
    """diag's operating point with the pasted lines against ngspice given the very same
    lines (its own reading of the SPICE numbers and of every parameter), nodes within
    the project's agreement (1 mV or 0.2 %)."""
    case = load_case(_case(tmp_path))
    circuit = compile_case(case, load_rules())
    dc = solver.solve_dc(circuit, {})
    assert dc.ok[0]
    text = spice.netlist(circuit, {})
    lines, swapped = [], 0
    for ln in text.splitlines():
        w = ln.split()
        if w and w[0].lower() == ".model" and w[1].lower().startswith(("qm_q1", "dm_d1")):
            dev = "NPN" if w[1].lower().startswith("qm") else "D"
            src = QLINE if dev == "NPN" else DLINE
            ln = f".model {w[1]} {src.split(None, 2)[2]}"
            swapped += 1
        lines.append(ln)
    assert swapped == 2                  # ngspice reads the pasted lines themselves
    ref = ngspice.run_ngspice("\n".join(lines) + "\n")
    for n in case.nodes:
        ours = dc.v[0, circuit.node_index[n]]
        theirs = ref.v(spice.node_name(case, n))
        assert abs(ours - theirs) <= max(1e-3, 2e-3 * abs(theirs)), (n, ours, theirs)
