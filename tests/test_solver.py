"""The batched solver: closed forms by hand, batched against single solves, extreme fault
values, floating nodes, AC and Thevenin, regions, every bundled case."""

from __future__ import annotations

import math

import numpy as np
import pytest
from numpy.testing import assert_allclose
from test_parts import RULES, compiled, part

from diag.core import ensemble, netlist, solver
from diag.core.case import load_case
from diag.core.errors import DiagError


def divider(r_source=None):
    extra = {} if r_source is None else {"r_source": r_source}
    return compiled(part("V1", "supply", ["vcc", "gnd"], 12.0, **extra),
                    part("R1", "resistor", ["vcc", "mid"], 10e3),
                    part("R2", "resistor", ["mid", "gnd"], 2.2e3))


def follower():
    """Divider-biased emitter follower with a load, 12 V."""
    return compiled(part("V1", "supply", ["vcc", "gnd"], 12.0, tol=0.05, r_source=0.5),
                    part("R1", "resistor", ["vcc", "b"], 47e3),
                    part("R2", "resistor", ["b", "gnd"], 47e3),
                    part("Q1", "npn", ["vcc", "b", "e"], hfe=[110, 450]),
                    part("R3", "resistor", ["e", "gnd"], 1e3),
                    part("C1", "electrolytic", ["e", "out"], 10e-6, volts_rated=25.0),
                    part("R4", "resistor", ["out", "gnd"], 10e3))


def test_divider_and_its_thevenin_resistance_by_hand():
    c = divider(r_source=0.0)
    dc = solver.solve_dc(c)
    # divider formula (handbook): 12 * 2.2k / 12.2k; nothing else loads the node
    assert_allclose(dc.v[0, c.node_index["mid"]], 12 * 2.2 / 12.2, rtol=1e-9)
    # Thevenin (handbook): R1 ∥ R2 = 1803.28 Ω to ground; between vcc and mid: R1 ∥ R2 too
    # (the ideal supply shorts vcc to ground for small signals)
    z = solver.thevenin(c, None, dc, [("mid", "gnd"), ("gnd", "mid"), ("vcc", "mid")])
    assert_allclose(z[0, 0], 10e3 * 2.2e3 / 12.2e3, rtol=1e-6)
    assert_allclose(z[0, 1], z[0, 0], rtol=1e-12)
    assert_allclose(z[0, 2], z[0, 0], rtol=1e-6)
    # the default 50 mΩ source resistance (parts.sources.SUPPLY_R), Ohm's law by hand
    c = divider()
    dc = solver.solve_dc(c)
    assert c.nominal["V1.r"] == 0.05
    assert_allclose(dc.i_supply[0, 0], 12 / (12.2e3 + 0.05), rtol=1e-9)


def test_supply_source_resistance_and_current():
    # Ohm's law by hand: I = 12 / (12.2k + 100), Vcc = 12 - 100 I
    c = divider(r_source=100.0)
    dc = solver.solve_dc(c)
    i = 12 / 12.3e3
    assert_allclose(dc.i_supply[0, 0], i, rtol=1e-9)
    assert_allclose(dc.v[0, c.node_index["vcc"]], 12 - 100 * i, rtol=1e-9)


def test_current_limited_supply_by_ohms_law():
    """A bench supply set to 12 V with a 100 mA limit across one resistor. Ohm's law by
    hand: below the limit I = 12 / (R + r); far beyond it the supply is a 100 mA source
    and the rail reads 0.1 R; the knee (parts.sources.limit_curve) keeps the current
    within 0.1 % of the straight line up to half the limit."""
    def one(r_load):
        return compiled(part("V1", "supply", ["vcc", "gnd"], 12.0, r_source=0.5,
                             limit=0.1),
                        part("R1", "resistor", ["vcc", "gnd"], r_load))

    c = one(1e3)
    loads = np.array([1e3, 240.0, 100.0, 10.0, 1.0, 1e-3])
    dc = solver.solve_dc(c, {"R1.r": loads})
    assert dc.ok.all()
    i, vcc = dc.i_supply[:, 0], dc.v[:, c.node_index["vcc"]]
    assert_allclose(i[:2], 12 / (loads[:2] + 0.5), rtol=1e-3)     # 12 mA, 50 mA
    assert_allclose(i[3:], 0.1, rtol=1e-9)                         # 1.2 A, 12 A, ... asked
    assert_allclose(vcc[3:], 0.1 * loads[3:], rtol=1e-9)
    assert 0.09 < i[2] < 0.1                                       # 120 mA asked: the knee
    assert_allclose(vcc, i * loads, rtol=1e-9)                     # KCL at the rail
    # the same supply with no limit: the source resistance alone
    free = compiled(part("V1", "supply", ["vcc", "gnd"], 12.0, r_source=0.5),
                    part("R1", "resistor", ["vcc", "gnd"], 1.0))
    assert_allclose(solver.solve_dc(free).i_supply[0, 0], 12 / 1.5, rtol=1e-9)


def test_limit_curve_is_smooth_and_safe():
    """The knee: f(s) = s up to s = 1/2 within 0.1 %, f -> 1 beyond, slope as the central
    finite difference (handbook numerical differentiation), finite at any s (no
    overflow), and s itself below zero (the knee's shape is a rule of the engine's own,
    parts/sources.py)."""
    from diag.core.parts.sources import limit_curve

    s = np.concatenate([np.linspace(-3, 3, 601), np.geomspace(3, 1e300, 50)])
    f, d = limit_curve(s)
    assert np.isfinite(f).all() and np.isfinite(d).all()
    assert (np.diff(f) >= 0).all() and (f <= 1).all()
    low = (s > 0) & (s <= 0.5)
    assert_allclose(f[low], s[low], rtol=1e-3)
    assert_allclose(f[s < 0], s[s < 0], rtol=0)
    assert_allclose(f[s > 1e3], 1.0, rtol=1e-12)
    h = 1e-6
    mid = np.linspace(0.01, 5, 50)
    fd = (limit_curve(mid + h)[0] - limit_curve(mid - h)[0]) / (2 * h)
    assert_allclose(limit_curve(mid)[1], fd, rtol=1e-5, atol=1e-8)


def test_batched_solve_equals_single_solves():
    # independent path: one batched solve against B separate one-variant solves
    c = follower()
    params = ensemble.draw_healthy(c, 16, np.random.default_rng(3))
    params["Q1.g_be"] = np.r_[np.zeros(15), 50.0]         # one variant with a BE short
    batch = solver.solve_dc(c, params)
    assert batch.ok.all()
    for b in range(16):
        one = solver.solve_dc(c, {k: v[b:b + 1] for k, v in params.items()})
        assert_allclose(batch.v[b], one.v[0], rtol=1e-9, atol=1e-9)
        assert_allclose(batch.i_supply[b], one.i_supply[0], rtol=1e-9, atol=1e-12)
    ac = solver.solve_ac(c, params, batch)
    assert ac.v.dtype == np.complex128 and ac.v.shape == (16, c.n_nodes)


def test_extreme_fault_values_converge_without_nan():
    c = compiled(part("V1", "supply", ["vcc", "gnd"], 12.0, r_source=0.2),
                 part("R1", "resistor", ["vcc", "b"], 22e3),
                 part("R2", "resistor", ["b", "gnd"], 4.7e3),
                 part("R3", "resistor", ["vcc", "c"], 2.2e3),
                 part("R4", "resistor", ["e", "gnd"], 470.0),
                 part("Q1", "npn", ["c", "b", "e"]),
                 part("D1", "diode", ["c", "vcc"]),
                 part("C1", "electrolytic", ["e", "gnd"], 100e-6))
    opens = [1e9, 1e10, 1e11, 1e12]
    shorts = [1e-3, 1e-2, 0.1, 1.0]
    rows = []
    for ref in ("R1", "R2", "R3", "R4"):
        rows += [{f"{ref}.r": v} for v in opens + shorts]
    for hook in ("g_be", "g_bc", "g_ce"):
        rows += [{f"Q1.{hook}": g} for g in (1.0, 10.0, 1e3)]
    rows += [{"Q1.k_be": 0.0}, {"Q1.k_bc": 0.0}, {"Q1.k_be": 0.0, "Q1.k_bc": 0.0},
             {"D1.k": 0.0}, {"D1.g_sh": 1e3}, {"C1.leak": 1e-3}, {"V1.v": 0.0},
             {"Q1.bf": 5.0}, {"Q1.g_ce": 1e3, "R3.r": 1e-3}]
    B = len(rows)
    params = {}
    for b, row in enumerate(rows):
        for k, v in row.items():
            params.setdefault(k, np.full(B, c.nominal[k]))[b] = v
    dc = solver.solve_dc(c, params)
    bad = [rows[b] for b in np.flatnonzero(~dc.ok)]
    assert not bad, f"did not converge: {bad}"
    assert np.isfinite(dc.v).all() and np.isfinite(dc.i_supply).all()
    # worked by hand: a 1 mΩ short of R2 puts the base at 12 V·1m/(22k) ≈ 0
    b = rows.index({"R2.r": 1e-3})
    assert abs(dc.v[b, c.node_index["b"]]) < 1e-5
    ac = solver.solve_ac(c, params, dc)
    assert np.isfinite(ac.v).all()


def test_node_isolated_by_an_open_is_reported():
    # R1 open leaves the base with no DC path but through the junction of an off transistor
    c = compiled(part("V1", "supply", ["vcc", "gnd"], 12.0),
                 part("R1", "resistor", ["vcc", "b"], 100e3),
                 part("Q1", "npn", ["c", "b", "gnd"]),
                 part("R2", "resistor", ["vcc", "c"], 1e3))
    dc = solver.solve_dc(c, {"R1.r": np.array([100e3, 1e12])})
    assert dc.why[0] is None
    assert dc.ok[1] and dc.why[1] is not None
    assert "node b has no DC path to ground" in dc.why[1]
    # the transistor is then off and the collector sits at the supply (by hand)
    assert abs(dc.v[1, c.node_index["c"]] - 12.0) < 1e-3
    assert solver.regions(c, {"R1.r": np.array([100e3, 1e12])}, dc)["Q1"][1] == "off"


def test_unknown_parameter_is_an_error():
    with pytest.raises(DiagError, match="unknown parameter 'R9.r'"):
        solver.solve_dc(divider(), {"R9.r": np.ones(2)})


def test_ac_rc_lowpass_and_series_inductor_by_hand():
    # handbook: |H| = 1 / sqrt(1 + (ωRC)^2) for R then C to ground (ESR given as 0)
    c = compiled(part("V1", "supply", ["vcc", "gnd"], 5.0),
                 part("V2", "signal", ["in", "gnd"], 1.0, r_source=50.0, hz=2e3),
                 part("R1", "resistor", ["in", "x"], 950.0),
                 part("C1", "capacitor", ["x", "gnd"], 100e-9, esr=0.0, leak=1e15),
                 part("L1", "inductor", ["x", "y"], 10e-3, r_dc=5.0),
                 part("R2", "resistor", ["y", "gnd"], 1e9),
                 part("R3", "resistor", ["vcc", "gnd"], 1e3))
    assert c.hz == 2e3
    dc = solver.solve_dc(c)
    ac = solver.solve_ac(c, None, dc)
    w = 2 * math.pi * 2e3
    h = 1 / (1 + 1j * w * 1000.0 * 100e-9)   # 50 Ω source + 950 Ω
    assert_allclose(ac.v[0, c.node_index["x"]], h, rtol=1e-6)
    assert_allclose(abs(ac.v[0, c.node_index["vcc"]]), 0.0, atol=1e-12)   # supply is AC ground
    z = solver.thevenin(c, None, dc, [("x", "gnd")], ac=ac)
    zc = 1 / (1j * w * 100e-9)
    assert_allclose(z[0, 0], 1 / (1 / 1000.0 + 1 / zc + 1 / (5.0 + 1j * w * 10e-3 + 1e9)),
                    rtol=1e-6)


def test_regions_by_hand():
    # a saturated switch (base overdriven), an off one (base grounded), an active stage
    c = compiled(part("V1", "supply", ["vcc", "gnd"], 12.0),
                 part("R1", "resistor", ["vcc", "b1"], 1e3),
                 part("R2", "resistor", ["vcc", "c1"], 1e3),
                 part("Q1", "npn", ["c1", "b1", "gnd"]),
                 part("R3", "resistor", ["vcc", "b2"], 1e3),
                 part("R4", "resistor", ["b2", "gnd"], 1e-3),
                 part("R5", "resistor", ["vcc", "c2"], 1e3),
                 part("Q2", "npn", ["c2", "b2", "gnd"]),
                 part("R6", "resistor", ["vcc", "b3"], 1e6),
                 part("R7", "resistor", ["vcc", "c3"], 1e3),
                 part("Q3", "npn", ["c3", "b3", "gnd"]))
    dc = solver.solve_dc(c)
    reg = solver.regions(c, None, dc)
    assert (reg["Q1"][0], reg["Q2"][0], reg["Q3"][0]) == ("saturated", "off", "active")


def test_circuit_is_cached_per_case_and_rules_hash(case_path):
    case = load_case(str(case_path))
    assert netlist.compile_case(case, RULES) is netlist.compile_case(case, RULES)


def test_every_bundled_case_solves_nominal_and_healthy_draws(case_path):
    case = load_case(str(case_path))
    c = netlist.compile_case(case, RULES)
    dc = solver.solve_dc(c)
    assert dc.ok.all() and dc.why == [None]
    assert dc.v.shape == (1, len(case.nodes)) and dc.i_supply.shape == (1, len(c.supplies))
    # every supply delivers current into its circuit (a healthy unit draws power)
    assert (dc.i_supply > 0).all()
    params = ensemble.draw_healthy(c, 200, np.random.default_rng(0))
    many = solver.solve_dc(c, params)
    assert many.ok.all() and all(w is None for w in many.why)
    if case.signal is not None:
        ac = solver.solve_ac(c, params, many)
        assert np.isfinite(ac.v).all()


def test_pot_divider_and_speaker_faults_in_ac_by_hand():
    # divider formula (handbook): wiper at set 0.25 from a (a on 10 V, b grounded) reads
    # 10 V x 0.75, the wiper contact adding nothing without load
    c = compiled(part("V1", "supply", ["vcc", "gnd"], 10.0, r_source=0.0),
                 part("RV1", "pot", ["vcc", "w", "gnd"], 10e3, set=0.25),
                 part("V2", "signal", ["in", "gnd"], 1.0, r_source=8.0),
                 part("LS1", "speaker", ["in", "gnd"], 8.0))
    # a fault sets the coil's DC resistance and its AC impedance each (rules/faults.yaml)
    params = {"LS1.r": np.array([6.4, 1e9, 0.5]), "LS1.z": np.array([8.0, 1e9, 0.2])}
    dc = solver.solve_dc(c, params)
    assert_allclose(dc.v[:, c.node_index["w"]], 7.5, rtol=1e-6)
    ac = solver.solve_ac(c, params, dc)
    # divider formula: healthy, 8 Ω source into the rated 8 Ω: half the signal; an open
    # coil: all of it; a coil shorted to 0.2 Ω: 0.2 / 8.2 of it (not scaled again by r)
    assert_allclose(abs(ac.v[0, c.node_index["in"]]), 0.5, rtol=1e-9)
    assert_allclose(abs(ac.v[1, c.node_index["in"]]), 1.0, rtol=1e-6)
    assert_allclose(abs(ac.v[2, c.node_index["in"]]), 0.2 / 8.2, rtol=1e-9)


def test_a_variant_that_does_not_converge_is_flagged_never_answered(monkeypatch):
    # never a silent wrong answer: with one Newton iteration allowed and no fall-backs a
    # moved variant cannot be accepted; it comes back not ok, NaN, with the reason
    c = follower()
    assert solver.solve_dc(c).ok.all()      # the nominal point is solved and kept first
    orig = solver._newton

    def one_step(*a, **k):
        k["maxit"] = 1
        return orig(*a, **k)

    monkeypatch.setattr(solver, "_newton", one_step)
    monkeypatch.setattr(solver, "GMIN_STEPS", ())
    monkeypatch.setattr(solver, "SOURCE_STEPS", ())
    dc = solver.solve_dc(c, {"R2.r": np.array([47e3, 33e3])})
    assert dc.ok.tolist() == [True, False]
    assert np.isnan(dc.v[1]).all() and np.isfinite(dc.v[0]).all()
    assert dc.why[1].startswith("did not converge")
    ac = solver.solve_ac(c, {"R2.r": np.array([47e3, 33e3])}, dc)
    assert np.isnan(ac.v[1]).all()


def test_a_series_resistance_absent_from_the_model_cannot_be_varied():
    # the topology is fixed at compile time: RS = 0 means no node behind it
    c = compiled(part("V1", "supply", ["a", "gnd"], 5.0),
                 part("R1", "resistor", ["a", "k"], 1e3),
                 part("D1", "diode", ["k", "gnd"], model={"IS": 1e-14, "N": 1.0}))
    assert "D1.j" not in c.unknowns
    with pytest.raises(DiagError, match="D1.rs cannot change"):
        solver.solve_dc(c, {"D1.rs": np.array([0.0, 1.0])})
    assert solver.solve_dc(c, {"D1.rs": np.zeros(2)}).ok.all()


def test_load_branch_is_the_same_as_a_resistor_part():
    """solve_dc / solve_ac `load`: a conductance (DC) or admittance (AC) between two
    nodes per variant stamps exactly as a resistor (and capacitor) part there would
    (modified nodal analysis, worked by hand: the same matrix entries)."""
    base = [part("V1", "supply", ["vcc", "gnd"], 12.0, r_source=0.5),
            part("V2", "signal", ["in", "gnd"], 0.1),
            part("C0", "capacitor", ["in", "b"], 1e-6),
            part("R1", "resistor", ["vcc", "b"], 470e3),
            part("R2", "resistor", ["b", "gnd"], 100e3),
            part("Q1", "npn", ["c", "b", "e"]),
            part("RC", "resistor", ["vcc", "c"], 4.7e3),
            part("RE", "resistor", ["e", "gnd"], 1e3)]
    c = compiled(*base)
    with_r = compiled(*base, part("RM", "resistor", ["b", "e"], 1e6),
                      part("CM", "capacitor", ["b", "e"], 100e-12))
    g = np.array([1e-6, 0.0])                       # variant 1: no load at all
    # (agreement to 1e-6: each solve stops within the Newton tolerance, solver.RELTOL)
    dc = solver.solve_dc(c, load=[("b", "e", g)])
    ref = solver.solve_dc(with_r, {"CM.leak": 1e30})
    bare = solver.solve_dc(c)
    assert_allclose(dc.v[0], ref.v[0], rtol=1e-6, atol=1e-9)
    assert_allclose(dc.v[1], bare.v[0], rtol=1e-6, atol=1e-9)
    # starting Newton from the loaded answer itself changes nothing
    again = solver.solve_dc(c, load=[("b", "e", g)], x_start=dc.x)
    assert_allclose(again.v, dc.v, rtol=1e-6, atol=1e-9)
    y = g + 1j * 2 * np.pi * c.hz * 100e-12 * (g > 0)
    ac = solver.solve_ac(c, {}, dc, load=[("b", "e", y)])
    ac_ref = solver.solve_ac(with_r, {"CM.leak": 1e30}, ref)
    assert_allclose(ac.v[0], ac_ref.v[0], rtol=1e-6, atol=1e-12)
    assert_allclose(ac.v[1], solver.solve_ac(c, {}, bare).v[0], rtol=1e-6, atol=1e-12)


def test_reused_work_buffers_carry_nothing_between_solves_or_threads():
    """solve_dc keeps its Newton work arrays between calls (per thread): a solve after a
    larger and a smaller one, and solves running in two threads at once, give exactly the
    answers of the first solve (the same arithmetic on the same inputs; no outside value
    needed, the solver is compared with itself)."""
    import threading

    c = follower()
    rng = np.random.default_rng(5)
    params = ensemble.draw_healthy(c, 300, rng)
    params["Q1.k_be"] = np.r_[np.ones(299), 0.0]          # one lifted emitter lead
    first = solver.solve_dc(c, params)
    solver.solve_dc(c, ensemble.draw_healthy(c, 700, rng))
    solver.solve_dc(c, ensemble.draw_healthy(c, 3, rng))
    again = solver.solve_dc(c, params)
    assert np.array_equal(first.x, again.x) and np.array_equal(first.ok, again.ok)
    assert first.why == again.why and np.array_equal(first.iterations, again.iterations)
    other = ensemble.draw_healthy(c, 500, rng)
    alone = solver.solve_dc(c, other)
    got = {}

    def run(tag, p):
        for _ in range(5):
            got.setdefault(tag, []).append(solver.solve_dc(c, p).x)

    threads = [threading.Thread(target=run, args=("a", params)),
               threading.Thread(target=run, args=("b", other))]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert all(np.array_equal(x, first.x, equal_nan=True) for x in got["a"])
    assert all(np.array_equal(x, alone.x) for x in got["b"])


def test_a_supply_limit_leaves_every_other_draw_as_it_was(tmp_path):
    """Giving diff-receiver's two rails a 20 mA limit (it draws about 2 mA): the healthy
    draws of every other parameter, and the faults' values drawn after them, are the
    same numbers (the limit draws from a stream of its own), and the solved units agree
    to 1e-9 V, so a limit no unit reaches changes nothing (a rule of the engine's own)."""
    from diag.core.paths import cases_dir

    text = (cases_dir() / "diff-receiver.yaml").read_text()
    lim = tmp_path / "lim.yaml"
    lim.write_text(text.replace("r_source: 1,", "r_source: 1, limit: 20m,"))
    a = netlist.compile_case(load_case(str(cases_dir() / "diff-receiver.yaml")))
    b = netlist.compile_case(load_case(str(lim)))
    da = ensemble.draw_healthy(a, 64, np.random.default_rng(5))
    rb = np.random.default_rng(5)
    db = ensemble.draw_healthy(b, 64, rb)
    ra = np.random.default_rng(5)
    ensemble.draw_healthy(a, 64, ra)
    assert ra.random() == rb.random()             # the stream goes on alike
    assert set(db) - set(da) == {"V1.ilim", "V3.ilim"}
    for k in da:
        assert_allclose(db[k], da[k], rtol=0)
    va = solver.solve_dc(a, da).v
    vb = solver.solve_dc(b, db).v
    assert_allclose(vb, va, atol=1e-9)


def test_breakdown_resistance_leaves_every_other_draw_as_it_was():
    """The transistors' breakdown series resistance (`.rbv`) draws from a side stream of
    its own: without those spreads, mic-preamp's other healthy draws are the same
    numbers and the main stream goes on alike; and as no healthy unit breaks a junction
    down, the solved units agree to 1e-9 V (a rule of the engine's own)."""
    import dataclasses

    from diag.core.paths import cases_dir

    a = netlist.compile_case(load_case(str(cases_dir() / "mic-preamp.yaml")))
    b = dataclasses.replace(a, spreads=tuple(s for s in a.spreads
                                             if not s.keys[0].endswith(".rbv")))
    assert len(b.spreads) < len(a.spreads)
    ra, rb = np.random.default_rng(5), np.random.default_rng(5)
    da = ensemble.draw_healthy(a, 64, ra)
    db = ensemble.draw_healthy(b, 64, rb)
    assert ra.random() == rb.random()
    assert set(da) - set(db) == {"Q1.rbv", "Q2.rbv"}
    for k in db:
        assert_allclose(da[k], db[k], rtol=0)
    assert_allclose(solver.solve_dc(a, da).v, solver.solve_dc(b, db).v, atol=1e-9)


@pytest.mark.parametrize("name", ["latch.yaml", "thyristor.yaml", "lamp-switch.yaml"])
def test_saddle_screen_settles_what_the_full_check_settles(name, monkeypatch):
    """solver._settle checks for saddles only the variants whose determinant sign, as
    Newton accepted them, differs from the network's sign past every growth rate (a rule
    of the engine's own, for speed): on the two latch fixtures (about a third of their
    units start on the balance point) and a bundled case, with every hypothesis of the
    engine drawn, the solutions and the variants moved are the same as when every
    variant gets the full check."""
    from pathlib import Path

    from diag.core.engine import Engine
    from diag.core.paths import cases_dir

    data = Path(__file__).parent / "data"
    path = data / name if (data / name).exists() else cases_dir() / name
    eng = Engine(load_case(str(path)), RULES, K=16)
    params = ensemble.draw_hypotheses(eng.circuit, eng.specs, 16, 0, eng.inf.get("ambient"))
    with np.errstate(all="ignore"):
        screened = solver.solve_dc(eng.circuit, params)
        full_settle = solver._settle
        monkeypatch.setattr(solver, "_settle",
                            lambda *a, dsign=None: full_settle(*a[:9]))
        full = solver.solve_dc(eng.circuit, params)
    np.testing.assert_array_equal(screened.ok, full.ok)
    np.testing.assert_array_equal(screened.settled, full.settled)
    np.testing.assert_array_equal(screened.x, full.x)
    assert screened.settled.any() == (name != "lamp-switch.yaml")
