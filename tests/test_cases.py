"""Every bundled case: loads, solves to a sensible healthy operating point, and runs
through `diag check` (text and JSON); the healthy band holds the nominal reading."""

from __future__ import annotations

import json

import numpy as np
import pytest

from diag.cli import main
from diag.core import meter, netlist, solver
from diag.core.bands import healthy_bands
from diag.core.case import load_case
from diag.core.parts import VT
from diag.core.rules import load_rules


def _solve(case_path):
    case = load_case(str(case_path))
    circuit = netlist.compile_case(case, load_rules())
    dc = solver.solve_dc(circuit, {})
    assert dc.ok[0], dc.why[0]
    v = {n: float(dc.v[0, circuit.node_index[n]]) for n in case.nodes}
    v[case.ground] = 0.0
    return case, circuit, dc, v


def test_loads_with_about_where_and_a_supply_point(case_path):
    case = load_case(str(case_path))
    assert case.about.strip() and case.title.strip()
    assert all(p.where.strip() for p in case.points)
    assert any(p.supply for p in case.points), "a supply point (bench ammeter) per case"
    if case.signal is not None:
        assert any(o.kind == "ac" for o in case.observables)


def test_nominal_operating_point_is_sensible(case_path):
    case, circuit, dc, v = _solve(case_path)
    assert dc.why[0] is None, dc.why[0]           # no floating-node warning either
    regions = {ref: r[0] for ref, r in solver.regions(circuit, {}, dc).items()}
    assert all(r in ("active", "saturated") for r in regions.values()), regions
    vmax = max(abs(float(p.value)) for p in case.parts if p.kind == "supply")
    for p in case.parts:
        if p.kind == "electrolytic":
            # Common practice, no source: an electrolytic is never reverse-biased beyond a
            # few tenths of a volt, and works below 80 % of its rated voltage.
            vpm = v[p.nodes[0]] - v[p.nodes[1]]
            assert vpm > -0.3, f"{p.ref} reverse-biased: {vpm:.3f} V"
            rated = p.fields.get("volts_rated")
            if rated:
                assert vpm < 0.8 * float(rated), f"{p.ref} at {vpm:.2f} V of {rated} V"
        if p.kind == "resistor" and p.fields.get("watts"):
            # Common practice, no source: resistors run at no more than 60 % of rating.
            watts = (v[p.nodes[0]] - v[p.nodes[1]]) ** 2 / float(p.value)
            assert watts < 0.6 * float(p.fields["watts"]), f"{p.ref} dissipates {watts:.2f} W"
        if p.kind in ("npn", "pnp"):
            assert abs(v[p.terminal("c")]) <= vmax + 1e-9


# The design facts each scenario states in its `about` text, checked on the solution.
def _chime(case, v, circuit, dc):
    # Fact of the trade (common practice, no source): with gain ~45-50 at ~100 mA the
    # collector sits near 1.5 V with about 3.5 V across the 33 Ω resistor.
    assert 1.3 < v["col"] < 1.8
    assert 3.2 < v["vcc"] - v["col"] < 3.7


def _classa(stages):
    def check(case, v, circuit, dc):
        # Common practice, no source: a class-A stage is biased with its collector between
        # about a third and two thirds of the rail, emitter-base drop 0.55-0.8 V.
        for c, b, e in stages:
            assert 0.3 * v["vcc"] < v[c] < 0.7 * v["vcc"], c
            assert 0.55 < v[b] - v[e] < 0.8, b
    return check


def _preamp(case, v, circuit, dc):
    _classa([("c1", "b1", "e1"), ("c2", "b2", "e2")])(case, v, circuit, dc)
    ac = solver.solve_ac(circuit, {}, dc)
    g1 = abs(ac.v[0, circuit.node_index["c1"]] / ac.v[0, circuit.node_index["b1"]])
    g2 = abs(ac.v[0, circuit.node_index["c2"]] / ac.v[0, circuit.node_index["b2"]])
    # Handbook: CE gain ≈ R_load / (r_e + R_E unbypassed); by hand 10k ∥ 10.5k / 530 ≈ 9.7
    # and 4k7 ∥ 47k / 246 ≈ 17.4 (the about text says "about 10 and 17").
    assert 8 < g1 < 12 and 14 < g2 < 20


def _pushpull(case, v, circuit, dc):
    # Common practice, no source: the midpoint near half the rail, and a small idle
    # current (a few mA to a few tens of mA) through the emitter resistors.
    assert 0.4 * v["vf"] < v["mid"] < 0.6 * v["vf"]
    idle = (v["ep"] - v["en"]) / 2.0
    assert 1e-3 < idle < 60e-3


def _regulator(case, v, circuit, dc):
    # Handbook: output = zener voltage - one base-emitter drop; the zener still carries
    # current (R1's current exceeds the pass transistor's base current).
    assert 0.5 < v["ref"] - v["out"] < 0.8
    assert 9.5 < v["ref"] < 10.5
    i_r1 = (v["vin"] - v["ref"]) / 560.0
    i_load = v["out"] / 100.0
    assert i_r1 > i_load / 40 + 1e-3      # hFE at least 40 (the part's hfe range)


def _relay(case, v, circuit, dc):
    # Saturated switch: collector below 0.3 V, coil current ≈ 12 V / 390 Ω (Ohm's law).
    assert v["coil"] < 0.3
    assert (v["vcc"] - v["coil"]) / 390.0 == pytest.approx(12 / 390, rel=0.05)


def _lamp(case, v, circuit, dc):
    # Saturated switches (common practice, no source: saturation leaves under 0.3 V across
    # collector and emitter); lamp current ≈ 12 V / 120 Ω by Ohm's law.
    assert v["c1"] < 0.3
    assert v["vcc"] - v["lamp"] < 0.3
    assert v["lamp"] / 120.0 == pytest.approx(12 / 120, rel=0.05)


def _line_driver(case, v, circuit, dc):
    _classa([("c1", "b1", "e1")])(case, v, circuit, dc)
    # Emitter follower: the emitter one base-emitter drop below the base (handbook).
    assert 0.55 < v["c1"] - v["e2"] < 0.8
    ac = solver.solve_ac(circuit, {}, dc)
    g = abs(ac.v[0, circuit.node_index["c1"]] / ac.v[0, circuit.node_index["b1"]])
    # Handbook: CE gain ≈ R_C / (r_e + R_E unbypassed); by hand I_E = 1.56 V / 1720 Ω =
    # 0.91 mA, r_e = 25.85 mV / 0.91 mA = 28 Ω, 10k (the follower's input is near 1 MΩ)
    # / (28 + 220) Ω ≈ 40 (the about text says "about 40").
    assert 35 < g < 44


def _practice(case, v, circuit, dc):
    # Handbook: a conducting silicon emitter-base junction drops 0.55-0.8 V (NPN Q1, and
    # PNP Q2 with its emitter above its base).
    assert 0.55 < v["b1"] - v["e1"] < 0.8
    assert 0.55 < v["e2"] - v["c1"] < 0.8
    # Ohm's law with collector current = emitter current (alpha above 0.99 at hFE >= 100):
    # Q2's emitter resistor sets the current its 2.2 kΩ load carries.
    assert v["c2"] / 2.2e3 == pytest.approx((v["vcc"] - v["e2"]) / 1e3, rel=0.02)
    assert (v["vcc"] - v["c1"]) / 2.2e3 == pytest.approx(v["e1"] / 1040.0, rel=0.03)
    ac = solver.solve_ac(circuit, {}, dc)
    node = circuit.node_index
    g1 = abs(ac.v[0, node["c1"]] / ac.v[0, node["b1"]])
    g2 = abs(ac.v[0, node["c2"]] / ac.v[0, node["c1"]])
    # Handbook: CE gain ≈ R_load / (r_e + R_E unbypassed), r_e = V_T / I_E. Stage 1 at
    # 1 kHz: 2.2 kΩ ∥ (Q2's input, hFE x 1 kΩ, hundreds of kΩ) over r_e + 220 Ω. Stage 2:
    # 2.2 kΩ ∥ (C3's reactance + the pot: 5 kΩ + 5 kΩ ∥ 100 kΩ) over r_e + 1 kΩ.
    re1 = VT / (v["e1"] / 1040.0)
    re2 = VT / ((v["vcc"] - v["e2"]) / 1e3)
    assert g1 == pytest.approx(2.2e3 / (re1 + 220.0), rel=0.05)
    zc3 = 1.0 / (2j * np.pi * 1e3 * 1e-6)
    zpot = zc3 + 5e3 + 1.0 / (1 / 5e3 + 1 / 100e3)
    zload = 1.0 / (1 / 2.2e3 + 1 / zpot)
    assert g2 == pytest.approx(abs(zload) / (re2 + 1e3), rel=0.05)
    assert 8 < g1 < 10 and 1.5 < g2 < 2.0  # the about text: "about 9" and "about 1.8"


def _diff(case, v, circuit, dc):
    # Matched halves (nominal parts): both bases and both collectors alike; the joined
    # emitters one base-emitter drop (0.55-0.8 V, handbook) below the bases.
    assert v["b1"] == pytest.approx(v["b2"], abs=1e-3)
    assert v["c1"] == pytest.approx(v["c2"], abs=0.02)
    assert 0.55 < v["b1"] - v["tail"] < 0.8
    # Ohm's law: the tail current splits in two; each collector carries half (alpha ~ 1).
    tail = (v["tail"] - v["vn"]) / 4.7e3
    assert (v["vp"] - v["c2"]) / 4.7e3 == pytest.approx(tail / 2, rel=0.02)
    # Handbook, long-tailed pair, single-ended output: gain = g_m R_C / 2 with
    # g_m = I_C / V_T, R_C = 4.7 kΩ ∥ 100 kΩ. The Early effect and base resistance the
    # formula leaves out take a few per cent off (about text: "about 70").
    ac = solver.solve_ac(circuit, {}, dc)
    node = circuit.node_index
    g = abs(ac.v[0, node["c2"]] / ac.v[0, node["b1"]])
    gm = (tail / 2) / VT
    rc = 1.0 / (1 / 4.7e3 + 1 / 100e3)
    assert 0.88 * gm * rc / 2 < g < 1.0 * gm * rc / 2
    assert 60 < g < 80


FACTS = {
    "chime-buffer": _chime,
    "sounder-driver": _classa([("col", "base", "emit")]),
    "mic-preamp": _preamp,
    "pushpull-output": _pushpull,
    "series-regulator": _regulator,
    "relay-switch": _relay,
    "lamp-switch": _lamp,
    "line-driver": _line_driver,
    "practice-preamp": _practice,
    "diff-receiver": _diff,
}


def test_design_facts_hold(case_path):
    if case_path.stem not in FACTS:
        pytest.skip(f"no stated design facts recorded for {case_path.name}")
    case, circuit, dc, v = _solve(case_path)
    FACTS[case_path.stem](case, v, circuit, dc)


def test_check_runs_text_and_json_and_band_holds_nominal(case_path, capsys):
    assert main(["check", str(case_path), "--draws", "200"]) == 0
    text = capsys.readouterr().out
    case = load_case(str(case_path))
    for p in case.points:
        assert p.id in text and p.where in text
    assert main(["check", str(case_path), "--json", "--draws", "200"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert set(doc) >= {"case", "nodes", "points"}            # SPEC section 6
    assert list(doc["nodes"]) == list(case.nodes)
    assert len(doc["points"]) == len(case.observables)
    for p in doc["points"]:
        assert {"point", "kind", "nominal", "low", "high"} <= set(p)
        assert p["low"] <= p["nominal"] <= p["high"], p


def test_bands_have_no_failed_draws(case_path):
    result = healthy_bands(load_case(str(case_path)), load_rules(), K=200, seed=0)
    assert result.failed == ()
    assert all(np.isfinite([pb.low, pb.high]).all() for pb in result.points)
    # The meter reading with nominal values equals observe() on the nominal solve.
    case = result.case
    circuit = netlist.compile_case(case, load_rules())
    dc = solver.solve_dc(circuit, {})
    ac = solver.solve_ac(circuit, {}, dc) if case.signal is not None else None
    r = meter.observe(circuit, {}, dc, ac, case.observables, case.meter)[0]
    assert np.allclose(r, [pb.nominal for pb in result.points], rtol=1e-12, atol=0)
