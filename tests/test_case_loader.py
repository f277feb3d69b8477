"""The case loader (diag.core.case.load_case): SPEC section 1, every rule there.

Bad cases are made by changing one line of the SPEC example (tests/data/spec_example.yaml)
so each test names the line and the part or node the message must point at.
"""

from __future__ import annotations

import hashlib
from pathlib import Path

import pytest

from diag.core.case import TERMINALS, Case, load_case
from diag.core.errors import CaseErrors, DiagError
from diag.core.paths import cases_dir
from diag.core.rules import load_rules

DATA = Path(__file__).parent / "data"
SPEC_EXAMPLE = DATA / "spec_example.yaml"
BASE = SPEC_EXAMPLE.read_text(encoding="utf-8")

# A rules folder of our own, so that model tests do not hang on rules/models.yaml figures.
MODELS = """\
npn-small: {kind: npn, about: t, params: {IS: 1e-14, BF: 200, VAF: 100}}
npn-power: {kind: npn, about: t, params: {IS: 5e-13, BF: 90}}
pnp-small: {kind: pnp, about: t, params: {IS: 1e-14, BF: 150}}
si-diode: {kind: diode, about: t, params: {IS: 2.5e-9, N: 1.75}}
led-red: {kind: led, about: t, params: {IS: 1e-18, N: 2}}
zener: {kind: zener, about: t, params: {IS: 1e-14, N: 1, BV: 5.1}}
"""


@pytest.fixture(scope="module")
def rules(tmp_path_factory):
    folder = tmp_path_factory.mktemp("rules")
    (folder / "models.yaml").write_text(MODELS, encoding="utf-8")
    bundled = load_rules()
    (folder / "meters.yaml").write_text(Path(bundled.file("meters")).read_text("utf-8"),
                                        encoding="utf-8")
    return load_rules(folder)


def write(tmp_path: Path, text: str, name: str = "case.yaml") -> Path:
    p = tmp_path / name
    p.write_text(text, encoding="utf-8")
    return p


def mutate(old: str, new: str, text: str = BASE) -> str:
    assert old in text, f"test setup: {old!r} is not in the example"
    return text.replace(old, new, 1)


def errors_of(tmp_path, text, rules) -> CaseErrors:
    with pytest.raises(CaseErrors) as info:
        load_case(write(tmp_path, text), rules)
    return info.value


# -- valid files ---------------------------------------------------------------------------

def test_spec_example_loads(rules):
    case = load_case(SPEC_EXAMPLE, rules)
    assert isinstance(case, Case)
    assert case.version == 1
    assert case.title == "Intercom line stage, 12 V"
    assert case.about.startswith("Divider-biased")
    assert case.ground == "gnd"
    # every node except ground, in order of first appearance
    assert case.nodes == ("vcc", "base", "col", "emit", "in", "out")
    assert [p.ref for p in case.parts] == ["V1", "R1", "R2", "R3", "R4", "Q1", "C1", "C2",
                                           "C3", "R5", "V2"]
    assert [p.id for p in case.points] == ["TP1", "TP2", "TP3", "TP4", "TP5", "TP6"]


def test_hash_is_sha256_of_bytes(rules):
    case = load_case(SPEC_EXAMPLE, rules)
    assert case.hash == hashlib.sha256(SPEC_EXAMPLE.read_bytes()).hexdigest()[:16]
    assert case.path == str(SPEC_EXAMPLE)


def test_parts_parsed(rules):
    case = load_case(SPEC_EXAMPLE, rules)
    v1, r1, r3, q1 = case.part("V1"), case.part("R1"), case.part("R3"), case.part("Q1")
    assert v1.nodes == ("vcc", "gnd") and v1.value == 12.0 and v1.tol == pytest.approx(0.05)
    assert v1.fields["r_source"] == 0.5
    assert r1.nodes == ("vcc", "base") and r1.value == 68e3 and r1.line == 8
    assert r3.value == 5600.0 and r3.fields["watts"] == 0.25   # IEC 60062: 5k6 = 5.6 kΩ
    assert q1.nodes == ("col", "base", "emit") and q1.value is None
    assert q1.terminal("b") == "base"
    assert q1.fields["hfe"] == (150.0, 450.0)
    assert dict(q1.model) == {"name": "npn-small", "IS": 1e-14, "BF": 200.0, "VAF": 100.0}
    c1 = case.part("C1")
    assert c1.value == pytest.approx(2.2e-6, rel=1e-12) and c1.fields["volts_rated"] == 25.0
    v2 = case.part("V2")
    assert v2.value == pytest.approx(5e-3) and v2.fields["hz"] == 1000.0
    assert case.part("R5").tol is None
    assert case.signal is v2


def test_points_parsed(rules):
    case = load_case(SPEC_EXAMPLE, rules)
    tp2, tp5, tp6 = case.point("TP2"), case.point("TP5"), case.point("TP6")
    assert tp2.node == "col" and tp2.minus is None and tp2.reads == ("dc", "ac")
    assert tp5.cost == 2.0 and case.point("TP1").cost == 1.0
    assert case.point("TP1").reads == ("dc",)
    assert tp6.supply == "V1" and tp6.node is None and tp6.reads == ("dc",)
    obs = case.observables
    assert [(o.point, o.kind) for o in obs] == [
        ("TP1", "dc"), ("TP2", "dc"), ("TP2", "ac"), ("TP3", "dc"), ("TP4", "dc"),
        ("TP5", "dc"), ("TP5", "ac"), ("TP6", "dc")]
    assert obs[-1].unit == "A" and obs[0].unit == "V"


def test_a_point_without_where_reads_its_nodes(tmp_path, rules):
    """Our own rule: `where:` is what the screen shows; left out, the node names (or the
    supply's name) stand in for it rather than refusing the case."""
    text = (BASE.replace('TP3: {node: base, where: "Q1 base"}', "TP3: {node: base}")
            .replace('TP6: {supply: V1, where: "bench supply\'s ammeter"}', "TP6: {supply: V1}"))
    assert text.count("where:") == BASE.count("where:") - 2
    text = text.replace('TP4: {node: emit, where: "Q1 emitter, top of R4"}',
                        "TP4: {node: emit, minus: base}")
    case = load_case(write(tmp_path, text), rules)
    assert case.point("TP3").where == "node base"
    assert case.point("TP4").where == "node emit against base"
    assert case.point("TP6").where == "supply V1's current"
    assert case.point("TP1").where == "supply pin on the input header"


def test_parts_at(rules):
    case = load_case(SPEC_EXAMPLE, rules)
    at = {(p.ref, t) for p, t in case.parts_at("base")}
    assert at == {("R1", "b"), ("R2", "a"), ("Q1", "b"), ("C1", "plus")}


def test_meter_default_and_named(tmp_path, rules):
    named = load_case(SPEC_EXAMPLE, rules).meter
    assert named["name"] == "handheld-3.5"
    # SPEC section 1: 10 MΩ input, 2000 counts, DC ±(0.5 % + 2), AC ±(1.0 % + 3)
    assert named["r_in"] == 10e6 and named["counts"] == 2000
    assert (named["dc_pct"], named["dc_counts"]) == (0.5, 2)
    assert (named["ac_pct"], named["ac_counts"]) == (1.0, 3)
    no_meter = load_case(write(tmp_path, mutate("meter: handheld-3.5", "")), rules)
    assert dict(no_meter.meter) == dict(named)
    other = load_case(write(tmp_path, mutate("meter: handheld-3.5", "meter: analog-20k")),
                      rules)
    assert other.meter["name"] == "analog-20k" and other.meter["r_in"] == 200e3


def test_meter_inline_fills_from_default(tmp_path, rules):
    text = mutate("meter: handheld-3.5", "meter: {name: my-meter, r_in: 1M, dc_pct: 0.8}")
    m = load_case(write(tmp_path, text), rules).meter
    assert m["name"] == "my-meter" and m["r_in"] == 1e6 and m["dc_pct"] == 0.8
    assert m["counts"] == 2000 and m["v_ranges"][0] == 0.2   # from handheld-3.5
    anon = load_case(write(tmp_path, mutate("meter: handheld-3.5", "meter: {r_in: 1M}")),
                     rules).meter
    assert anon["name"] == "inline"


def test_default_models_and_inline(tmp_path, rules):
    text = mutate("model: npn-small, ", "") + "\n"
    assert load_case(write(tmp_path, text), rules).part("Q1").model["name"] == "npn-small"
    text = mutate("model: npn-small", "model: {IS: 2e-14, bf: 300, VAF: 80}")
    q1 = load_case(write(tmp_path, text), rules).part("Q1")
    assert dict(q1.model) == {"name": "inline", "IS": 2e-14, "BF": 300.0, "VAF": 80.0}
    # the breakdown voltages a data sheet gives are card parameters too (rules/models.yaml)
    text = mutate("model: npn-small", "model: {IS: 2e-14, BVEBO: 6.2, BVCBO: 60}")
    q1 = load_case(write(tmp_path, text), rules).part("Q1")
    assert q1.model["BVEBO"] == 6.2 and q1.model["BVCBO"] == 60.0


def test_semiconductor_defaults_per_kind(tmp_path, rules):
    extra = """
  D1: {kind: diode, anode: out, cathode: gnd}
  D2: {kind: led, anode: out, cathode: gnd}
  D3: {kind: zener, anode: gnd, cathode: out, bv: 5V6}
  Q2: {kind: pnp, c: gnd, b: out, e: vcc}
"""
    text = mutate("  V2:  {kind: signal", extra.lstrip("\n") + "  V2:  {kind: signal")
    case = load_case(write(tmp_path, text), rules)
    names = {r: case.part(r).model["name"] for r in ("D1", "D2", "D3", "Q2")}
    assert names == {"D1": "si-diode", "D2": "led-red", "D3": "zener", "Q2": "pnp-small"}
    assert case.part("D3").fields["bv"] == pytest.approx(5.6)
    assert case.part("D3").nodes == ("gnd", "out")


def test_a_diode_card_carries_its_charge_and_temperature_names(tmp_path, rules):
    """A diode card as a simulator gives it: CJO, TT, M, VJ, EG, XTI load, are kept on
    the part and are named as not used; IS N RS BV IBV are used."""
    from diag.core.parts import unused_card_names

    extra = ("  D1: {kind: diode, anode: out, cathode: gnd, model: {IS: 4e-9, N: 1.9, "
             "RS: 0.5, CJO: 4p, M: 0.3, VJ: 0.7, TT: 6n, EG: 1.11, XTI: 3}}\n")
    text = mutate("  V2:  {kind: signal", extra + "  V2:  {kind: signal")
    case = load_case(write(tmp_path, text), rules)
    d1 = case.part("D1")
    assert d1.model["CJO"] == pytest.approx(4e-12) and d1.model["N"] == 1.9
    assert unused_card_names(d1) == ("CJO", "M", "VJ", "TT", "EG", "XTI")
    assert unused_card_names(case.part("Q1")) == ()


def test_every_kind_and_field(tmp_path, rules):
    text = """\
case: 1
title: every kind
ground: 0v
parts:
  V1: {kind: supply, plus: vcc, minus: 0v, volts: "9 V", tol: 0.02, r_source: 0, amps: 0.5}
  F1: {kind: fuse, nodes: [vcc, vf], amps: 250m}
  J1: {kind: link, nodes: [vf, va], ohms: 10m}
  VR1: {kind: pot, a: va, wiper: w, b: 0v, ohms: 10k, tol: 20%, set: 25%}
  L1: {kind: inductor, nodes: [w, x], henries: 10m, r_dc: 12, tol: 10%}
  LS1: {kind: speaker, nodes: [x, 0v], ohms: 8R, r_dc: 6R8, watts: 0.5}
  C1: {kind: capacitor, nodes: [x, 0v], farads: 100n, tol: 10%, esr: 0.1, leak: 1G}
  C2: {kind: electrolytic, plus: x, minus: 0v, farads: 100u, volts_rated: 16, esr: 0R5}
  V2: {kind: signal, plus: s, minus: 0v, vrms: 100 mV, hz: 1 kHz, r_source: 600}
  R1: {kind: resistor, nodes: [s, x], ohms: 1k, note: "replaced in 2019"}
points:
  TP1: {node: x, minus: w, where: "across L1"}
  TP2: {supply: V1, where: "ammeter", cost: 0.5}
meter: bench-5.5
"""
    case = load_case(write(tmp_path, text), rules)
    assert case.ground == "0v"
    assert case.nodes == ("vcc", "vf", "va", "w", "x", "s")
    vr1 = case.part("VR1")
    assert vr1.value == 10e3 and vr1.tol == pytest.approx(0.2)
    assert vr1.fields["set"] == pytest.approx(0.25)
    assert case.part("F1").value is None and case.part("F1").fields["amps"] == 0.25
    assert case.part("J1").value == pytest.approx(0.01)
    assert case.part("LS1").value == 8.0 and case.part("LS1").fields["r_dc"] == 6.8
    assert case.part("C1").fields["leak"] == 1e9
    assert case.part("C2").fields["esr"] == 0.5
    assert case.part("V1").fields["r_source"] == 0.0
    assert case.part("V2").value == pytest.approx(0.1) and case.part("V2").fields["hz"] == 1e3
    assert case.part("R1").fields["note"] == "replaced in 2019"
    assert case.point("TP1").minus == "w"
    assert case.point("TP2").cost == 0.5
    assert case.meter["name"] == "bench-5.5"
    assert {p.kind for p in case.parts} | {"diode", "led", "zener", "npn", "pnp"} \
        == set(TERMINALS)


@pytest.mark.parametrize("path", sorted(cases_dir().glob("*.yaml")), ids=lambda p: p.name)
def test_bundled_cases_load(path):
    import yaml

    case = load_case(path)
    assert case.parts and case.points
    # our own rule (DEVELOPERS.md, How to add a case): a bundled case says where every
    # probe goes, rather than leaving the node names to stand in
    raw = yaml.safe_load(path.read_text(encoding="utf-8"))
    assert all("where" in body for body in raw["points"].values())
    for p in case.points:
        assert p.supply or p.node in case.nodes or p.node == case.ground


# -- one test per error ----------------------------------------------------------------------

ERRORS = [
    # (id, old text, new text, words in the message, line, where)
    ("unknown kind", "kind: resistor, nodes: [vcc, base]", "kind: resistr, nodes: [vcc, base]",
     "unknown kind 'resistr'", 8, "R1"),
    ("kind not text", "kind: resistor, nodes: [vcc, base]", "kind: [a, b], nodes: [vcc, base]",
     "unknown kind", 8, "R1"),
    ("no kind", "kind: resistor, nodes: [vcc, base]", "nodes: [vcc, base]", "no kind given", 8,
     "R1"),
    ("unknown terminal", "c: col, b: base", "collector: col, b: base",
     "unknown terminal or field 'collector'", 12, "Q1"),
    ("missing value", "ohms: 68k, tol", "tol", "missing value", 8, "R1"),
    ("negative ohms", "ohms: 68k", "ohms: -68k", "more than zero", 8, "R1"),
    ("zero ohms", "ohms: 12k", "ohms: 0", "more than zero", 9, "R2"),
    ("zero farads", "farads: 47u", "farads: 0", "more than zero", 14, "C2"),
    ("negative henries", "  R5:  {kind: resistor, nodes: [out, gnd], ohms: 47k}",
     "  R5:  {kind: inductor, nodes: [out, gnd], henries: -1m}", "more than zero", 16, "R5"),
    ("no DC path", "R5:  {kind: resistor, nodes: [out, gnd], ohms: 47k}",
     "R5:  {kind: capacitor, nodes: [out, gnd], farads: 1n}", "no DC path to ground", 15,
     "out"),
    ("dangling node", "nodes: [out, gnd], ohms: 47k", "nodes: [outt, gnd], ohms: 47k",
     "used once only", 15, "out"),
    ("point on unknown node", "node: base,", "node: bsae,", "not a node", 21, "TP3"),
    ("bad unit text", "ohms: 12k", "ohms: 4kk", "'4kk' is not a value", 9, "R2"),
    ("unit mismatch", "ohms: 12k", "ohms: 12 V", "expected", 9, "R2"),
    ("duplicate reference", "  R2:  {kind", "  R1:  {kind", "duplicate reference designator",
     9, "R1"),
    ("duplicate point", "  TP3: {node", "  TP2: {node", "duplicate test point id", 21, "TP2"),
    ("unknown field", "ohms: 1k2", "ohms: 1k2, colour: red", "unknown terminal or field "
     "'colour'", 11, "R4"),
    ("tol too big", "ohms: 1k2, tol: 5%", "ohms: 1k2, tol: 150%", "tolerance", 11, "R4"),
    ("tol zero", "ohms: 1k2, tol: 5%", "ohms: 1k2, tol: 0", "tolerance", 11, "R4"),
    ("pot set outside 0..1", "  R5:  {kind: resistor, nodes: [out, gnd], ohms: 47k}",
     "  R5:  {kind: pot, a: out, wiper: gnd, b: gnd, ohms: 47k, set: 1.5}", "wiper position",
     16, "R5"),
    ("pot without set", "  R5:  {kind: resistor, nodes: [out, gnd], ohms: 47k}",
     "  R5:  {kind: pot, a: out, wiper: gnd, b: gnd, ohms: 47k}", "needs set", 16, "R5"),
    ("ac without signal", "  V2:  {kind: signal, plus: in, minus: gnd, vrms: 5m, hz: 1k}",
     "  R9:  {kind: resistor, nodes: [in, gnd], ohms: 1k}", "no signal part", 20, "TP2"),
    ("unknown read kind", "reads: [dc, ac], cost", "reads: [dc, ohms], cost",
     "unknown read kind 'ohms'", 23, "TP5"),
    ("supply point on unknown part", "supply: V1", "supply: V9", "not a part", 24, "TP6"),
    ("supply point on non-supply", "supply: V1", "supply: R1", "not a supply", 24, "TP6"),
    ("hfe min > max", "hfe: [150, 450]", "hfe: [450, 150]", "above max", 12, "Q1"),
    ("unsupported version", "case: 1", "case: 2", "unsupported case: version 2", 1, None),
    ("unknown meter", "meter: handheld-3.5", "meter: fancy", "unknown meter profile", 25,
     "meter"),
    ("unknown inline meter field", "meter: handheld-3.5", "meter: {r_in: 1M, colour: red}",
     "unknown meter field 'colour'", 25, "meter"),
    ("unknown model", "model: npn-small", "model: npn-big", "unknown model 'npn-big'", 12,
     "Q1"),
    ("inline model bad parameter", "model: npn-small", "model: {IS: 1e-14, RCO: 50}",
     "unknown model parameter 'RCO'", 12, "Q1"),
    # SPICE's base charge q1 = 1 / (1 - vbc/VAF - vbe/VAR) turns negative with a
    # junction forward when an Early voltage is below it
    ("inline model Early voltage below a junction's", "model: npn-small",
     "model: {IS: 1e-14, VAR: 0.5}", "VAR 0.5 V is below a forward junction's voltage", 12,
     "Q1"),
    ("model kind mismatch", "model: npn-small", "model: pnp-small", "is for pnp parts", 12,
     "Q1"),
    ("inline model as a models.yaml entry", "model: npn-small",
     "model: {kind: npn, params: {IS: 1e-14}}", "the card's parameters themselves", 12,
     "Q1"),
    ("point where not text", 'TP3: {node: base, where: "Q1 base"}', "TP3: {node: base, where: 3}",
     "where: must be text", 21, "TP3"),
    ("point cost zero", "cost: 2", "cost: 0", "more than zero", 23, "TP5"),
    ("point unknown field", 'where: "Q1 base"', 'where: "Q1 base", probe: red',
     "unknown field 'probe'", 21, "TP3"),
    ("supply point reads ac", "supply: V1,", "supply: V1, reads: [dc, ac],", "dc (the current "
     "drawn) only", 24, "TP6"),
    ("unknown top-level field", "ground: gnd", "ground: gnd\ncolour: red", "unknown field "
     "'colour'", 6, None),
    ("no points", "points:  ", "points: {}\nnopoints:", "no test points given", 18, None),
    ("ground unused", "ground: gnd", "ground: earth", "not connected to any part", 5, "earth"),
    ("part on one node", "nodes: [out, gnd], ohms: 47k", "nodes: [out, out], ohms: 47k",
     "every terminal is on node 'out'", 16, "R5"),
    ("two-terminal without nodes", "nodes: [out, gnd], ohms: 47k", "ohms: 47k",
     "needs nodes", 16, "R5"),
    ("bad reference", "  R5:  {kind", "  5R:  {kind", "not a reference designator", 16, "5R"),
    ("hfe on a diode", "  V2:  {kind: signal",
     "  D1:  {kind: diode, anode: out, cathode: gnd, hfe: [1, 2]}\n  V2:  {kind: signal",
     "unknown terminal or field 'hfe'", 17, "D1"),
    ("inline model zero IS", "model: npn-small", "model: {IS: 0}", "more than zero", 12,
     "Q1"),
    ("second signal", "  V2:  {kind: signal, plus: in, minus: gnd, vrms: 5m, hz: 1k}",
     "  V2:  {kind: signal, plus: in, minus: gnd, vrms: 5m, hz: 1k}\n"
     "  V3:  {kind: signal, plus: in, minus: gnd, vrms: 5m, hz: 1k}", "second signal", 18,
     "V3"),
]


@pytest.mark.parametrize(("old", "new", "words", "line", "where"),
                         [e[1:] for e in ERRORS], ids=[e[0] for e in ERRORS])
def test_error_names_line_and_place(tmp_path, rules, old, new, words, line, where):
    exc = errors_of(tmp_path, mutate(old, new), rules)
    hits = [e for e in exc.errors if words in e.message]
    assert hits, f"no error says {words!r}; got:\n{exc}"
    e = hits[0]
    assert isinstance(e, DiagError)
    assert e.line == line and e.where == where and e.file.endswith("case.yaml")
    text = str(exc)
    assert f"case.yaml:{line}: " in text
    if where:
        assert f"{where}: " in text
    assert e.hint, "every error says what to do"


def test_a_point_cost_error_says_what_cost_means(tmp_path, rules):
    """A point's cost is the effort of a reading, not a part's value (SPEC section 1):
    the hint says so and names no part (our own rule)."""
    exc = errors_of(tmp_path, mutate("cost: 2", "cost: 0"), rules)
    e = next(e for e in exc.errors if "cost is 0" in e.message)
    assert "effort" in e.hint and "part" not in e.hint


def test_unknown_terminal_lists_valid_terminals(tmp_path, rules):
    exc = errors_of(tmp_path, mutate("c: col, b: base", "collector: col, b: base"), rules)
    assert "terminals c, b, e" in str(exc)


def test_unknown_model_lists_known(tmp_path, rules):
    exc = errors_of(tmp_path, mutate("model: npn-small", "model: npn-big"), rules)
    assert "npn-small" in str(exc) and "npn-power" in str(exc)
    exc = errors_of(tmp_path, mutate("meter: handheld-3.5", "meter: fancy"), rules)
    assert "handheld-4.5" in str(exc) and "analog-20k" in str(exc)


def test_all_problems_collected(tmp_path, rules):
    text = mutate("ohms: 12k", "ohms: 4kk")
    text = mutate("farads: 47u", "farads: 0", text)
    text = mutate("node: base,", "node: bsae,", text)
    text = mutate("meter: handheld-3.5", "meter: fancy", text)
    exc = errors_of(tmp_path, text, rules)
    assert [e.line for e in exc.errors] == [9, 14, 21, 25]
    assert [e.where for e in exc.errors] == ["R2", "C2", "TP3", "meter"]


def test_bad_part_does_not_cascade(tmp_path, rules):
    # an unknown kind must not also make its nodes dangling or unknown to points
    exc = errors_of(tmp_path, mutate("kind: resistor, nodes: [vcc, col]",
                                     "kind: resistr, nodes: [vcc, col]"), rules)
    assert len(exc.errors) == 1 and exc.errors[0].where == "R3"


def test_duplicate_key_elsewhere(tmp_path, rules):
    exc = errors_of(tmp_path, mutate("ohms: 47k}", "ohms: 47k, ohms: 4k7}"), rules)
    assert "duplicate key 'ohms'" in str(exc) and exc.errors[0].line == 16


def test_missing_file_and_not_a_mapping(tmp_path, rules):
    with pytest.raises(CaseErrors, match="file not found"):
        load_case(tmp_path / "nope.yaml", rules)
    with pytest.raises(CaseErrors, match="a case file is a mapping"):
        load_case(write(tmp_path, "- 1\n- 2\n"), rules)
    with pytest.raises(CaseErrors, match="YAML syntax"):
        load_case(write(tmp_path, "parts: {R1: [\n"), rules)
    bad = tmp_path / "latin1.yaml"
    bad.write_bytes("title: r\xe9sistance\n".encode("latin-1"))
    with pytest.raises(CaseErrors, match="not UTF-8"):
        load_case(bad, rules)


def test_model_from_rules_of_wrong_shape(tmp_path):
    folder = tmp_path / "rules"
    folder.mkdir()
    (folder / "models.yaml").write_text(MODELS.replace("npn-small: {kind: npn, about: t, "
                                                       "params: {IS: 1e-14, BF: 200, VAF: 100}}",
                                                       "npn-small: {kind: npn, params: "
                                                       "{IS: lots}}"), encoding="utf-8")
    (folder / "meters.yaml").write_text(Path(load_rules().file("meters")).read_text("utf-8"),
                                        encoding="utf-8")
    with pytest.raises(CaseErrors) as info:
        load_case(SPEC_EXAMPLE, load_rules(folder))
    assert "models.yaml" in str(info.value) and info.value.errors[0].where == "Q1"


def test_a_bare_name_finds_the_bundled_case(tmp_path, monkeypatch):
    # `diag check sounder-driver` from any folder names the bundled case (our own rule).
    from diag.core.case import find_case, load_case
    from diag.core.paths import cases_dir

    monkeypatch.chdir(tmp_path)
    assert find_case("sounder-driver") == cases_dir() / "sounder-driver.yaml"
    assert load_case("sounder-driver").title.startswith("Warning sounder")
    assert find_case("no-such-case") == Path("no-such-case")
