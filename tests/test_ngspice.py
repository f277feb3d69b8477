"""diag's solver against ngspice (the reference simulator) on every bundled case.

For each case one batch netlist is written from diag's own compiled circuit
(diag.core.spice), so the models stay in step, and ngspice runs once (`-b`) on it. The
variants: nominal; a shorted base-emitter junction; an open resistor; a transistor with
a third of its gain; every supply 15 % low; a shorted electrolytic; an open emitter
junction; two tolerance draws. Every node voltage must agree within max(1 mV, 0.2 %),
every supply current within max(1 µA, 0.2 %), every AC magnitude within 1 %.
A second run checks the meter readings (divider loading through solver.thevenin) against
ngspice with the meter's input attached at each voltage point.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from conftest import CASES_DIR

from diag.core import ensemble, meter, solver, spice
from diag.core.case import load_case
from diag.core.netlist import compile_case
from diag.core.rules import load_rules

DATA = CASES_DIR.parent / "tests" / "data"
V_ATOL, V_RTOL = 1e-3, 2e-3      # volts; the project's agreement target with ngspice
I_ATOL, I_RTOL = 1e-6, 2e-3      # amperes
AC_RTOL = 1e-2
AC_ATOL = 1e-5                   # volts rms: a tenth of the 0.1 mV count of a 2000-count
                                 # meter's 200 mV range (common practice, no source)


def _first(case, kinds):
    return next((p for p in case.parts if p.kind in kinds), None)


def _variants(circuit) -> list[tuple[str, dict[str, float]]]:
    """(label, overrides) per variant; overrides keyed like params, scalars."""
    case = circuit.case
    nom = circuit.nominal
    q = _first(case, ("npn", "pnp"))
    r = _first(case, ("resistor",))
    c = _first(case, ("electrolytic", "capacitor"))
    d = _first(case, ("diode", "led", "zener"))
    out = [("nominal", {})]
    if q is not None:
        out.append((f"{q.ref} be shorted", {f"{q.ref}.g_be": 100.0}))
        out.append((f"{q.ref} gain / 3", {f"{q.ref}.bf": nom[f"{q.ref}.bf"] / 3}))
        out.append((f"{q.ref} be open", {f"{q.ref}.k_be": 0.0}))
        if f"{q.ref}.ci" in circuit.unknowns:   # the model's RC gives an inner collector
            out.append((f"{q.ref} collector lead lifted", {f"{q.ref}.rc": 1e12}))
        out.append((f"{q.ref} ce shorted", {f"{q.ref}.g_ce": 10.0}))
    if r is not None:
        out.append((f"{r.ref} open", {f"{r.ref}.r": 1e9}))
    if c is not None:
        out.append((f"{c.ref} shorted", {f"{c.ref}.leak": 1.0}))
    if d is not None:
        out.append((f"{d.ref} open", {f"{d.ref}.k": 0.0}))
        out.append((f"{d.ref} shorted", {f"{d.ref}.g_sh": 100.0}))
    for p in case.parts:
        if p.kind in ("inductor", "fuse"):
            out.append((f"{p.ref} open", {f"{p.ref}.r": 1e9}))
        elif p.kind == "speaker":  # as rules/faults.yaml sets them: r and z each
            out.append((f"{p.ref} open", {f"{p.ref}.r": 1e9, f"{p.ref}.z": 1e9}))
            out.append((f"{p.ref} shorted", {f"{p.ref}.r": 0.5, f"{p.ref}.z": 0.2}))
    out.append(("supplies -15 %", {f"{s}.v": 0.85 * nom[f"{s}.v"] for s in circuit.supplies}))
    return out


def _batch(circuit, variants, draws=2, seed=0):
    """params dict of (B,) arrays: the listed variants, then `draws` tolerance draws."""
    labels = [v[0] for v in variants] + [f"draw {k}" for k in range(draws)]
    B = len(labels)
    drawn = ensemble.draw_healthy(circuit, draws, np.random.default_rng(seed))
    keys = set(drawn) | {k for _, o in variants for k in o}
    params = {}
    for key in keys:
        col = np.full(B, circuit.nominal[key], dtype=float)
        for b, (_, over) in enumerate(variants):
            if key in over:
                col[b] = over[key]
        if key in drawn:
            col[len(variants):] = np.asarray(drawn[key], dtype=float)
        params[key] = col
    return labels, params


def _run(case_path, ngspice_util):
    case = load_case(str(case_path))
    circuit = compile_case(case, load_rules())
    labels, params = _batch(circuit, _variants(circuit))
    dc = solver.solve_dc(circuit, params)
    ac = solver.solve_ac(circuit, params, dc) if case.signal is not None else None
    ref = ngspice_util.run_ngspice(spice.netlist(circuit, params))
    return case, circuit, labels, params, dc, ac, ref


@pytest.fixture(scope="module")
def runs():
    return {}


def _cached(runs, case_path, ngspice):
    """One diag solve and one ngspice run per case, shared by the three tests (a failure
    is kept too, so it is reported once per test without running ngspice again)."""
    if case_path not in runs:
        try:
            runs[case_path] = _run(case_path, ngspice)
        except Exception as exc:  # noqa: BLE001 - re-raised below, in every test
            runs[case_path] = exc
    got = runs[case_path]
    if isinstance(got, Exception):
        raise got
    return got


def _dc_off(case, circuit, labels, dc, ref) -> list[str]:
    """Node DC voltages where diag and ngspice (the reference simulator) differ by more
    than max(V_ATOL, V_RTOL x ngspice's value), one message each."""
    bad = []
    for b, label in enumerate(labels):
        for n in case.nodes:
            ours, theirs = dc.v[b, circuit.node_index[n]], ref.v(spice.node_name(case, n, b))
            if abs(ours - theirs) > max(V_ATOL, V_RTOL * abs(theirs)):
                bad.append(f"{label}: {n} diag {ours:.6g} V, ngspice {theirs:.6g} V")
    return bad


def _ac_off(case, circuit, labels, ac, ref) -> list[str]:
    """Node AC magnitudes where diag and ngspice's AC analysis differ by more than
    max(AC_ATOL, AC_RTOL x ngspice's value), one message each."""
    bad = []
    for b, label in enumerate(labels):
        for n in case.nodes:
            ours = abs(ac.v[b, circuit.node_index[n]])
            theirs = abs(ref.vac(spice.node_name(case, n, b)))
            if abs(ours - theirs) > max(AC_ATOL, AC_RTOL * theirs):
                bad.append(f"{label}: {n} diag {ours:.6g} V, ngspice {theirs:.6g} V rms")
    return bad


@pytest.mark.ngspice
def test_operating_point_matches_ngspice(case_path, ngspice, runs):
    case, circuit, labels, params, dc, ac, ref = _cached(runs, case_path, ngspice)
    for b, label in enumerate(labels):
        assert dc.ok[b], f"{label}: diag did not converge: {dc.why[b]}"
    bad = _dc_off(case, circuit, labels, dc, ref)
    assert not bad, "\n".join(bad)


@pytest.mark.ngspice
def test_germanium_card_on_a_negative_rail_matches_ngspice(ngspice, runs):
    """A germanium PNP card typed in by hand (IS 0.3 µA, tests/data/ge-pnp-stage.yaml),
    the battery's positive terminal on the chassis: every node's DC voltage, the supply
    current and the AC magnitudes of each variant as ngspice gives them, and the nominal
    unit's base-emitter junction at about 0.2 V (ngspice), not a silicon 0.6 V."""
    path = DATA / "ge-pnp-stage.yaml"
    case, circuit, labels, params, dc, ac, ref = _cached(runs, path, ngspice)
    assert all(dc.ok), [dc.why[b] for b in range(len(labels)) if not dc.ok[b]]
    bad = _dc_off(case, circuit, labels, dc, ref) + _ac_off(case, circuit, labels, ac, ref)
    for b, label in enumerate(labels):
        ours, theirs = dc.i_supply[b, 0], -ref.i(spice.source_name("V1", b))
        if abs(ours - theirs) > max(I_ATOL, I_RTOL * abs(theirs)):
            bad.append(f"{label}: V1 diag {ours:.6g} A, ngspice {theirs:.6g} A")
    assert not bad, "\n".join(bad)
    vbe = ref.v(spice.node_name(case, "emit", 0)) - ref.v(spice.node_name(case, "base", 0))
    assert 0.15 < vbe < 0.25


@pytest.mark.ngspice
def test_current_limited_supply_matches_ngspice(ngspice):
    """A bench supply with a 150 mA constant-current limit (tests/data/limited-lamp.yaml;
    diag's knee written as an ngspice B-source, diag.core.spice.limit_expr): the usual
    variants, among them a shorted electrolytic across the rail that would draw amperes,
    plus lamp loads that put the supply below, at and beyond its knee. Every node and
    the supply current as ngspice gives them; the shorted rail held at the limit."""
    case = load_case(str(DATA / "limited-lamp.yaml"))
    circuit = compile_case(case, load_rules())
    variants = _variants(circuit) + [(f"lamp {r} ohm", {"R6.r": r}) for r in (80, 66, 40, 1)]
    labels, params = _batch(circuit, variants)
    dc = solver.solve_dc(circuit, params)
    ref = ngspice.run_ngspice(spice.netlist(circuit, params))
    assert all(dc.ok), [dc.why[b] for b in range(len(labels)) if not dc.ok[b]]
    bad = _dc_off(case, circuit, labels, dc, ref)
    for b, label in enumerate(labels):
        ours, theirs = dc.i_supply[b, 0], -ref.i(spice.source_name("V1", b))
        if abs(ours - theirs) > max(I_ATOL, I_RTOL * abs(theirs)):
            bad.append(f"{label}: V1 diag {ours:.6g} A, ngspice {theirs:.6g} A")
    assert not bad, "\n".join(bad)
    short = labels.index("C1 shorted")
    assert dc.i_supply[short, 0] == pytest.approx(0.150, rel=1e-3)
    assert ref.v(spice.node_name(case, "vcc", short)) < 0.5   # the rail collapsed


@pytest.mark.ngspice
def test_supply_currents_match_ngspice(case_path, ngspice, runs):
    case, circuit, labels, params, dc, ac, ref = _cached(runs, case_path, ngspice)
    bad = []
    for b, label in enumerate(labels):
        for s, sref in enumerate(circuit.supplies):
            ours = dc.i_supply[b, s]
            theirs = -ref.i(spice.source_name(sref, b))  # ngspice: current drawn = -i(V)
            if abs(ours - theirs) > max(I_ATOL, I_RTOL * abs(theirs)):
                bad.append(f"{label}: {sref} diag {ours:.6g} A, ngspice {theirs:.6g} A")
    assert not bad, "\n".join(bad)


@pytest.mark.ngspice
def test_ac_magnitudes_match_ngspice(case_path, ngspice, runs):
    case, circuit, labels, params, dc, ac, ref = _cached(runs, case_path, ngspice)
    if case.signal is None:
        pytest.skip(f"{case_path.name} has no signal part (no ac readings offered)")
    bad = _ac_off(case, circuit, labels, ac, ref)
    assert not bad, "\n".join(bad)


def _meter_check(circuit, variants, ngspice):
    """meter.observe at every point of `circuit` for each (label, overrides) variant,
    against ngspice with the meter actually connected: one copy of the circuit per
    (variant, reading), with r_in (and c_in for an ac reading) across the point, or, at a
    supply point, the ammeter's burden added to that supply's source resistance (in
    series with it). Returns the disagreements beyond max(1 mV, 0.2 %) (1 % for ac;
    max(1 µA, 0.2 %) for currents)."""
    case = circuit.case
    pts = list(case.observables)
    m = case.meter
    keys = {k for _, o in variants for k in o}
    for ob in pts:
        sup = case.point(ob.point).supply
        if sup is not None:
            keys.add(f"{sup}.r")
    ours_p = {k: np.array([o.get(k, circuit.nominal[k]) for _, o in variants], float)
              for k in keys}
    dc = solver.solve_dc(circuit, ours_p)
    ac = solver.solve_ac(circuit, ours_p, dc) if case.signal is not None else None
    # ngspice's .ac is small-signal: compare with diag's small-signal readings
    ours = meter.observe(circuit, ours_p, dc, ac, pts, m, large_signal=False)
    bad = []
    for v, (label, _) in enumerate(variants):
        if not dc.ok[v]:
            bad.append(f"{label}: diag did not converge")
            continue
        for k, ob in enumerate(pts):   # one deck per reading: ngspice's .op of a deck of
            pt = case.point(ob.point)  # copies can fail where each copy alone solves
            theirs_p = {key: float(col[v]) for key, col in ours_p.items()}
            extra = []
            if pt.supply is not None:
                theirs_p[f"{pt.supply}.r"] += float(m["a_burden"])
            else:
                a = spice.node_name(case, pt.node)
                n = spice.node_name(case, pt.minus or case.ground)
                extra.append(f"R_meter {a} {n} {float(m['r_in']):.12g}")
                if ob.kind == "ac":
                    extra.append(f"C_meter {a} {n} {float(m['c_in']):.12g}")
            ref = ngspice.run_ngspice(spice.netlist(circuit, theirs_p, extra=extra))
            if pt.supply is not None:
                got = -ref.i(spice.source_name(pt.supply))  # ngspice, burden in series
                tol = max(I_ATOL, I_RTOL * abs(got))
            elif ob.kind == "dc":
                got = ref.v(a) - ref.v(n)  # ngspice with the meter resistance attached
                tol = max(V_ATOL, V_RTOL * abs(got))
            else:
                got = abs(ref.vac(a) - ref.vac(n))  # ngspice AC, r_in ∥ c_in attached
                tol = max(AC_ATOL, AC_RTOL * got)
            if not abs(ours[v, k] - got) <= tol:
                bad.append(f"{label}: {ob.point} {ob.kind} diag {ours[v, k]:.6g}, "
                           f"ngspice {got:.6g}")
    return bad


@pytest.mark.ngspice
def test_meter_loading_matches_ngspice(case_path, ngspice):
    """Each point read by the case's meter, nominal and the fault variants above:
    meter.observe against ngspice with the meter in the netlist."""
    case = load_case(str(case_path))
    circuit = compile_case(case, load_rules())
    bad = _meter_check(circuit, _variants(circuit), ngspice)
    assert not bad, "\n".join(bad)


@pytest.mark.ngspice
def test_meter_loading_through_nearly_off_junctions(ngspice):
    """The push-pull stage with R6 open: Q3's base is fed only through the bias diodes,
    nearly off, so the 10 MΩ meter's own microamp moves the operating point (the
    linearised divider read 2.6 V there). diag re-solves with the meter connected;
    ngspice, the reference simulator, has the meter resistor in the netlist."""
    case = load_case(str(CASES_DIR / "pushpull-output.yaml"))
    circuit = compile_case(case, load_rules())
    bad = _meter_check(circuit, [("R6 open", {"R6.r": 1e9}), ("R7 open", {"R7.r": 1e9}),
                                 ("D1 open", {"D1.k": 0.0})], ngspice)
    assert not bad, "\n".join(bad)


@pytest.mark.ngspice
def test_open_collector_hook_matches_a_lifted_lead(case_path, ngspice):
    """diag's k_bc = 0 lifts the collector lead (the junctions stay): the die saturates
    inside with Ic = 0 and the base-emitter path carries the base current. ngspice, the
    reference simulator, with the collector lead left out of the netlist (and rc = 1e12
    on the inner collector, the 'collector lead lifted' variant above) agrees; the old
    transport-scaling hook put the base 70-95 mV off."""
    case = load_case(str(case_path))
    circuit = compile_case(case, load_rules())
    q = _first(case, ("npn", "pnp"))
    params = {f"{q.ref}.k_bc": 0.0}
    dc = solver.solve_dc(circuit, params)
    ref = ngspice.run_ngspice(spice.netlist(circuit, params))
    b = q.terminal("b")
    theirs = ref.v(spice.node_name(case, b))  # ngspice, the reference simulator
    assert abs(dc.v[0, circuit.node_index[b]] - theirs) <= max(V_ATOL, V_RTOL * abs(theirs))


KINDS_CASE = """\
case: 1
title: Kinds not in the bundled cases
about: a PNP stage biased by a pot, film coupling, a link, a rectifier and a red LED
parts:
  V1: {kind: supply, plus: raw, minus: gnd, volts: 9, r_source: 0.5}
  D1: {kind: diode, anode: raw, cathode: vcc, model: si-rectifier}
  W1: {kind: link, nodes: [vcc, vl]}
  RV1: {kind: pot, a: vl, wiper: base, b: gnd, ohms: 100k, set: 0.1}
  R1: {kind: resistor, nodes: [vl, emit], ohms: 2k2}
  Q1: {kind: pnp, c: col, b: base, e: emit, model: pnp-small}
  R2: {kind: resistor, nodes: [col, gnd], ohms: 3k3}
  C1: {kind: capacitor, nodes: [in, base], farads: 100n}
  V2: {kind: signal, plus: in, minus: gnd, vrms: 10m, hz: 2k, r_source: 600}
  R3: {kind: resistor, nodes: [vl, led], ohms: 1k5}
  D2: {kind: led, anode: led, cathode: gnd, model: led-red}
points:
  TP1: {node: col, where: "Q1 collector", reads: [dc, ac]}
  TP2: {supply: V1, where: "ammeter"}
"""


@pytest.mark.ngspice
def test_other_kinds_match_ngspice(tmp_path, ngspice):
    path = tmp_path / "kinds.yaml"
    path.write_text(KINDS_CASE, encoding="utf-8")
    case = load_case(str(path))
    circuit = compile_case(case, load_rules())
    labels, params = _batch(circuit, [("nominal", {}), ("RV1 wiper open", {"RV1.r_w": 1e9}),
                                      ("C1 shorted", {"C1.leak": 10.0}),
                                      ("W1 open", {"W1.r": 1e9})], draws=1)
    dc = solver.solve_dc(circuit, params)
    ac = solver.solve_ac(circuit, params, dc)
    ref = ngspice.run_ngspice(spice.netlist(circuit, params))
    for b, label in enumerate(labels):
        assert dc.ok[b], (label, dc.why[b])
    bad = _dc_off(case, circuit, labels, dc, ref) + _ac_off(case, circuit, labels, ac, ref)
    assert not bad, "\n".join(bad)


def test_writer_maps_fault_hooks_and_names_variants(case_path):
    """The netlist text itself (no simulator): every case node appears in every copy,
    and the hooks map as the spice module says (lifted leads, 1/g shunts)."""
    case = load_case(str(case_path))
    circuit = compile_case(case, load_rules())
    q = _first(case, ("npn", "pnp"))
    text = spice.netlist(case, {f"{q.ref}.k_be": np.array([1.0, 0.0]),
                                f"{q.ref}.g_ce": np.array([0.0, 4.0])})
    assert spice.netlist(circuit) == spice.netlist(case)      # Case and Circuit agree
    tag = q.ref.lower()
    for b in (0, 1):
        for n in case.nodes:
            assert f" {spice.node_name(case, n, b)} " in text
    # a lifted emitter: the inner node's shunt only, no lead (see diag.core.spice)
    assert f"R_{tag}_eopen__v1 " in text and f"R_{tag}_eopen__v0 " not in text
    assert f"R_{tag}_elead__v1 " not in text
    assert f"R_{tag}_ce__v1 " in text and text.split(f"R_{tag}_ce__v1 ")[1].split()[2] == "0.25"
    # one model per semiconductor part and copy, plus each transistor's two junction
    # breakdown diodes, less the emitter one of copy 1 (its emitter lead is lifted)
    semis = sum(p.kind in ("npn", "pnp", "diode", "led", "zener") for p in case.parts)
    bjts = sum(p.kind in ("npn", "pnp") for p in case.parts)
    assert text.count(".model ") == 2 * (semis + 2 * bjts) - 1
    assert f"D_{tag}_ebbd__v0 " in text and f"D_{tag}_ebbd__v1 " not in text
    assert f"D_{tag}_cbbd__v1 " in text


def test_writer_refuses_unusable_values(case_path):
    case = load_case(str(case_path))
    r = _first(case, ("resistor",))
    with pytest.raises(ValueError, match=r.ref):
        spice.netlist(case, {f"{r.ref}.r": 0.0})
    with pytest.raises(ValueError, match="disagree"):
        spice.netlist(case, {f"{r.ref}.r": np.ones(2), f"{r.ref}.r_x": np.ones(3)})


def _solves_as_ngspice(ngspice, circuit, labels, params):
    """Solve the variants (params, one per label) with diag and with ngspice on the
    netlist diag.core.spice writes; assert every variant solves and every node agrees
    (`_dc_off`). Returns diag's DCResult."""
    dc = solver.solve_dc(circuit, params)
    ref = ngspice.run_ngspice(spice.netlist(circuit, params))
    for b, label in enumerate(labels):
        assert dc.ok[b], (label, dc.why[b])
    bad = _dc_off(circuit.case, circuit, labels, dc, ref)
    assert not bad, "\n".join(bad)
    return dc


@pytest.mark.ngspice
@pytest.mark.parametrize("extra", [{"IRB": 1e-3, "RBM": 5.0}, {"RBM": 2.0}],
                         ids=["irb-rbm", "rbm-only"])
def test_base_resistance_modulation_matches_ngspice(ngspice, extra):
    """Optional IRB / RBM (SPICE meaning) in a transistor switch whose base is driven
    from a few ohms to a few hundred ohms (up to tens of mA of base current, where the
    modulation matters): every node against ngspice, the reference simulator, with the
    same card."""
    from test_parts import MODELS, compiled, part

    card = {**MODELS["npn-small"]["params"], "RB": 50.0, **extra}
    circuit = compiled(part("V1", "supply", ["vcc", "gnd"], 12.0, r_source=0.2),
                       part("V2", "supply", ["logic", "gnd"], 5.0, r_source=50.0),
                       part("R1", "resistor", ["logic", "base"], 2.2e3),
                       part("R2", "resistor", ["base", "gnd"], 10e3),
                       part("Q1", "npn", ["coil", "base", "gnd"], model=card),
                       part("K1", "resistor", ["vcc", "coil"], 390.0))
    labels = ["nominal", "R1 shorted", "R1 100 ohm", "load 39 ohm"]
    params = {"R1.r": np.array([2.2e3, 1e-3, 100.0, 2.2e3]),
              "K1.r": np.array([390.0, 390.0, 390.0, 39.0])}
    dc = _solves_as_ngspice(ngspice, circuit, labels, params)
    # and the modulation is not idle here: with RB constant the base reads differently
    plain = solver.solve_dc(compiled(*[p for p in circuit.parts if p.ref != "Q1"],
                                     part("Q1", "npn", ["coil", "base", "gnd"],
                                          model={**MODELS["npn-small"]["params"],
                                                 "RB": 50.0})), params)
    k = circuit.node_index["base"]
    assert abs(plain.v[1, k] - dc.v[1, k]) > 10 * V_ATOL   # R1 shorted: tens of mA


@pytest.mark.ngspice
@pytest.mark.parametrize("model", ["npn-power", "pnp-power"])
def test_power_cards_drive_a_base_hard_as_ngspice_does(ngspice, model):
    """The medium-power cards as shipped (rules/models.yaml, IRB and RBM included): a base
    driven through 100 ohm from 12 V with the collector lead open (about 0.1 A into the
    base-emitter junction, as in a bc-open fault), and the same part working normally.
    Every node against ngspice, the reference simulator, with the same card."""
    from test_parts import MODELS, compiled, part

    card = MODELS[model]["params"]
    assert "IRB" in card and "RBM" in card
    npn = model.startswith("npn")
    rail, base = ("vcc", "gnd") if npn else ("gnd", "vcc")  # pnp: emitter on the rail
    circuit = compiled(part("V1", "supply", ["vcc", "gnd"], 12.0, r_source=0.2),
                       part("R1", "resistor", [rail if npn else "gnd", "b"], 100.0),
                       part("R2", "resistor", ["c", "vcc" if npn else "gnd"], 22.0),
                       part("Q1", model[:3], ["c", "b", base if npn else "vcc"],
                            model=card))
    labels = ["working", "collector open"]
    params = {"R2.r": np.array([22.0, 1e9])}
    _solves_as_ngspice(ngspice, circuit, labels, params)


# A card with the rest of the Gummel-Poon DC model given, at figures a data-sheet card of
# a small-signal part could carry (from memory): reverse Early voltage, reverse knee,
# base-collector recombination current, and in one variant a high-current roll-off
# exponent other than SPICE's 0.5.
FULL_GP = {"VAR": 20.0, "IKR": 0.01, "ISC": 2e-13, "NC": 2.0}


@pytest.mark.ngspice
@pytest.mark.parametrize("nkf", [None, 0.7], ids=["nkf-default", "nkf-0.7"])
def test_full_gummel_poon_card_matches_ngspice(ngspice, nkf):
    """VAR, IKR, ISC/NC and NKF (SPICE meaning) against ngspice, the reference simulator,
    with the same card: a transistor run forward at up to tens of mA (IKF, NKF, VAR),
    one fitted the other way round so that it runs reverse-active (BR, IKR, VAF, ISC),
    and one driven into saturation (ISC); node voltages at four drive levels, then
    the AC gain of the forward stage (the model's derivatives, through the small-signal
    analysis)."""
    from test_parts import MODELS, compiled, part

    card = {**MODELS["npn-small"]["params"], **FULL_GP}
    if nkf is not None:
        card["NKF"] = nkf
    circuit = compiled(part("V1", "supply", ["vcc", "gnd"], 12.0, r_source=0.2),
                       part("V2", "signal", ["in", "gnd"], 0.001, r_source=50.0),
                       part("C1", "capacitor", ["in", "b1"], 10e-6),
                       part("R1", "resistor", ["vcc", "b1"], 47e3),
                       part("R2", "resistor", ["b1", "gnd"], 10e3),
                       part("R3", "resistor", ["vcc", "c1"], 220.0),
                       part("Q1", "npn", ["c1", "b1", "e1"], model=card),
                       part("R4", "resistor", ["e1", "gnd"], 47.0),
                       # fitted the other way round: its emitter lead on the load
                       part("R5", "resistor", ["vcc", "b2"], 22e3),
                       part("R6", "resistor", ["vcc", "x2"], 1e3),
                       part("Q2", "npn", ["gnd", "b2", "x2"], model=card),
                       # hard on: saturated
                       part("R7", "resistor", ["vcc", "b3"], 2.2e3),
                       part("R8", "resistor", ["vcc", "c3"], 1e3),
                       part("Q3", "npn", ["c3", "b3", "gnd"], model=card))
    labels = ["nominal", "drive x2", "drive x5", "drive x20"]
    scale = np.array([1.0, 0.5, 0.2, 0.05])
    params = {"R1.r": 47e3 * scale, "R5.r": 22e3 * scale, "R7.r": 2.2e3 * scale}
    dc = _solves_as_ngspice(ngspice, circuit, labels, params)
    regions = solver.regions(circuit, params, dc)
    assert regions["Q2"][0] == "reverse" and regions["Q3"][0] == "saturated"
    ac = solver.solve_ac(circuit, params, dc)
    ref = ngspice.run_ngspice(spice.netlist(circuit, params))
    bad = _ac_off(circuit.case, circuit, labels, ac, ref)
    assert not bad, "\n".join(bad)
    # and the new terms are not idle here: without them the nodes read otherwise
    plain = compiled(*[part(p.ref, p.kind, p.nodes, p.value, model=MODELS["npn-small"]
                            ["params"]) if p.kind == "npn" else p for p in circuit.case.parts])
    base = solver.solve_dc(plain, params)
    moved = np.abs(base.v - dc.v).max(axis=0)
    # (forward stage 0.14 V, reversed part 3.5 V; a saturated part's VCE by 7 mV)
    for node, by in (("c1", 10 * V_ATOL), ("x2", 10 * V_ATOL), ("c3", 5 * V_ATOL)):
        assert moved[circuit.node_index[node]] > by, node


@pytest.mark.ngspice
def test_emitter_base_breakdown_matches_ngspice(ngspice):
    """The breakdown-only junctions (parts/bjt.py `Breakdown`) against ngspice, the
    reference simulator, solving the netlist diag.core.spice writes (the same diodes):
    an NPN and a PNP whose emitter is pulled past BVEBO from a 12 V rail, at three
    feed resistances and two BVEBO values, with the emitter lead lifted, and with
    milliamperes through the junction, where its series resistance RBV (ngspice's RS of
    the same diode) counts for tenths of a volt."""
    from test_parts import compiled, part

    circuit = compiled(part("V1", "supply", ["vs", "gnd"], 12.0, r_source=0.2),
                       part("R1", "resistor", ["vs", "en"], 10e3),
                       part("Q1", "npn", ["b", "b", "en"], model="npn-small"),
                       part("R2", "resistor", ["b", "gnd"], 1e3),
                       part("R3", "resistor", ["vs", "bp"], 1e3),
                       part("Q2", "pnp", ["bp", "bp", "ep"], model="pnp-power"),
                       part("R4", "resistor", ["ep", "gnd"], 4.7e3),
                       part("R5", "resistor", ["en", "gnd"], 1e6))
    labels = ["10k", "2k2", "47k", "BVEBO 9 V", "leads lifted", "150R, RBV 100",
              "150R, RBV 3"]
    params = {"R1.r": np.array([10e3, 2.2e3, 47e3, 10e3, 10e3, 150.0, 150.0]),
              "Q1.bvebo": np.array([7.5, 7.5, 7.5, 9.0, 7.5, 7.5, 7.5]),
              "Q1.rbv": np.array([39.0, 39.0, 39.0, 39.0, 39.0, 100.0, 3.0]),
              "Q2.rbv": np.array([17.0, 17.0, 17.0, 17.0, 17.0, 100.0, 3.0]),
              "Q1.k_be": np.array([1.0, 1.0, 1.0, 1.0, 0.0, 1.0, 1.0]),
              "Q2.k_be": np.array([1.0, 1.0, 1.0, 1.0, 0.0, 1.0, 1.0])}
    dc = _solves_as_ngspice(ngspice, circuit, labels, params)
    # and the breakdown is what sets the emitter: about BVEBO above the base
    en, b = circuit.node_index["en"], circuit.node_index["b"]
    assert 7.5 < dc.v[0, en] - dc.v[0, b] < 8.0
    assert dc.v[4, en] > 11.0                                # lifted: no junction left
    # RBV 100 Ω against 3 Ω at about 3.4 mA (150 Ω feed, 1 kΩ from the base): about
    # 0.3 V more across the junction
    vj = dc.v[:, en] - dc.v[:, b]
    assert vj[5] - vj[6] > 0.25


def _physically_swapped(text: str, ref: str, unit: dict[str, float]) -> str:
    """diag's netlist of a unit whose transistor `ref` has the `ce-swapped` fault's
    parameters, rewritten as the physical fault: the device's collector and emitter
    pins exchanged, with the card it really has. diag states the swap as the forward
    parameters taking the reverse ones' values (bf = card BR, vaf = reverse Early
    voltage, ikf = reverse knee, nf = NR, rc = RE; ise/ne stay at the junction that now
    works as the emitter); ngspice gets the same transistor the other way round, so its
    reverse parameters (BR, VAR, IKR, NR, ISC, NC) carry those values and its forward
    ones diag's reverse ones (VAF = var, IKF = ikr, ISE = isc, NE = nc)."""
    tag = spice._sanitize(ref)
    u = unit
    card = {"IS": u["is"], "BF": u["br"], "BR": u["bf"], "NF": u["nr"], "NR": u["nf"],
            "VAF": u["var"], "VAR": u["vaf"], "IKF": u["ikr"], "IKR": u["ikf"],
            "ISE": u["isc"], "NE": u["nc"], "ISC": u["ise"], "NC": u["ne"],
            "RB": u["rb"], "RC": u["re"], "RE": u["rc"], "RBM": u["rbm"]}
    for k in ("VAF", "VAR", "IKF", "IKR"):
        if not math.isfinite(card[k]):
            del card[k]                 # SPICE's "infinite": left out
    if math.isfinite(u["irb"]):
        card["IRB"] = u["irb"]
    out = []
    for line in text.splitlines():
        words = line.split()
        if words and words[0] == f"Q_{tag}":
            words[1], words[3] = words[3], words[1]
            line = " ".join(words)
        elif words and words[0] == ".model" and words[1] == f"qm_{tag}":
            kind = words[2].split("(")[0]
            line = f".model qm_{tag} {kind}(" + " ".join(
                f"{k}={v:.12g}" for k, v in card.items()) + ")"
        out.append(line)
    return "\n".join(out) + "\n"


@pytest.mark.ngspice
def test_ce_swapped_fault_is_a_transistor_fitted_the_other_way_round(case_path, ngspice):
    """The `ce-swapped` fault mode (rules/faults.yaml) is stated as parameter changes on
    the shared topology; ngspice (the reference simulator) solves the physical fault,
    the same part with its collector and emitter pins exchanged. Node voltages and
    supply currents of drawn units must agree to the project's ngspice tolerance."""
    from diag.core import faults

    case = load_case(str(case_path))
    rules = load_rules()
    circuit = compile_case(case, rules)
    for q in (p for p in case.parts if p.kind in ("npn", "pnp")):
        spec = faults.single(case, rules, q, "ce-swapped")
        params = ensemble.draw_unit(circuit, spec, 3, np.random.default_rng(7))
        dc = solver.solve_dc(circuit, params)
        assert dc.ok.all(), f"{q.ref}: diag did not solve: {dc.why}"
        for b in range(3):
            one = {k: float(np.asarray(v).reshape(-1)[b if np.size(v) > 1 else 0])
                   for k, v in params.items()}
            unit = {name: one.get(f"{q.ref}.{name}", circuit.nominal[f"{q.ref}.{name}"])
                    for name in ("is", "bf", "br", "nf", "nr", "vaf", "var", "ikf", "ikr",
                                 "ise", "ne", "isc", "nc", "rb", "rc", "re", "irb", "rbm")}
            assert unit["bf"] < 20 < unit["br"], "the fault must run the part at its BR"
            ref = ngspice.run_ngspice(_physically_swapped(spice.netlist(circuit, one), q.ref,
                                                          unit))
            for n in case.nodes:
                ours, theirs = dc.v[b, circuit.node_index[n]], ref.v(spice.node_name(case, n))
                assert abs(ours - theirs) <= max(V_ATOL, V_RTOL * abs(theirs)), (
                    f"{q.ref} unit {b}: {n} diag {ours:.6g} V, ngspice {theirs:.6g} V")
            for s, sref in enumerate(circuit.supplies):
                ours, theirs = dc.i_supply[b, s], -ref.i(spice.source_name(sref))
                assert abs(ours - theirs) <= max(I_ATOL, I_RTOL * abs(theirs)), (
                    f"{q.ref} unit {b}: {sref} diag {ours:.6g} A, ngspice {theirs:.6g} A")
