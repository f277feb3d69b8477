"""Operating points a real unit leaves (solver.saddle) and the switched states beside
them (solver.solve_dc's settling): every bundled case's point is stable; a two-transistor
latch's balance point is a saddle, and ngspice's transient run (the reference simulator)
leaves it for the state diag settles in, where it returns to the point with the loop
broken. The determinant test of solver.saddle is checked against the growth rates
themselves (scipy's generalized eigenvalues of the same linearised circuit)."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from test_parts import RULES

from diag.core import bands, ensemble, faults, netlist, solver, spice
from diag.core.case import load_case

LATCH = Path(__file__).parent / "data" / "latch.yaml"
THYRISTOR = Path(__file__).parent / "data" / "thyristor.yaml"


def _compiled(path):
    return netlist.compile_case(load_case(path, RULES), RULES)


def _growing(circ, params, dc) -> np.ndarray:
    """Count (B,) of real positive eigenvalues of C dx/dt = -J x (1 F from every node to
    ground, none on the branch currents), from scipy's generalized eigenvalues."""
    from scipy.linalg import eigvals

    plan = solver._plan(circ)
    B, P = solver._batch(circ, params)
    B = max(B, dc.v.shape[0])
    A_lin, _ = solver._linear(circ, plan, P, B, None)
    xp = np.vstack([dc.x.T, np.zeros((1, B))])
    act = np.flatnonzero(dc.ok)
    J = plan.dense(solver._jacobian(circ, plan, solver._prepared(plan, P), A_lin, xp, act))
    C = np.diag([1.0] * circ.n_nodes + [0.0] * (plan.n - circ.n_nodes))
    out = np.full(B, -1)
    for q, Jq in zip(act, J, strict=True):
        lam = eigvals(-Jq, C)
        lam = lam[np.isfinite(lam)]
        tol = 1e-9 * np.max(np.abs(lam))
        out[q] = int(np.sum((lam.real > tol) & (np.abs(lam.imag) <= tol)))
    return out


def test_every_bundled_case_is_stable(case_paths):
    # every bundled circuit is an amplifier, regulator or switch driven from outside:
    # no growing mode at the nominal point or in 16 healthy units, by the determinant
    # test and by scipy's generalized eigenvalues (_growing)
    for path in case_paths:
        circ = _compiled(path)
        dc = solver.solve_dc(circ, {})
        assert not solver.saddle(circ, {}, dc)[0], path
        assert _growing(circ, {}, dc)[0] == 0, path
        params = ensemble.draw_unit(circ, faults.healthy_spec(), 16,
                                    np.random.default_rng(0))
        dc = solver.solve_dc(circ, params)
        assert not solver.saddle(circ, params, dc)[dc.ok].any(), path
        assert np.all(_growing(circ, params, dc)[dc.ok] == 0), path


def test_the_latch_balance_point_is_a_saddle_and_settles_both_ways():
    # two transistors cross-coupled through 22 kΩ into 47 kΩ, each collecting through
    # an LED and 1 kΩ: the loop gain at the symmetric point is far above one, so one
    # mode (the two collectors moving apart) grows
    circ = _compiled(LATCH)
    bal = solver.solve_dc(circ, {}, settle=False)
    assert solver.saddle(circ, {}, bal)[0] and _growing(circ, {}, bal)[0] == 1
    assert bal.v[0, circ.node_index["c1"]] == pytest.approx(
        bal.v[0, circ.node_index["c2"]], abs=1e-6)
    params = ensemble.draw_unit(circ, faults.healthy_spec(), 16, np.random.default_rng(1))
    dcs = solver.solve_dc(circ, params)
    assert dcs.ok.all() and dcs.settled.all()
    assert not solver.saddle(circ, params, dcs).any()
    assert np.all(_growing(circ, params, dcs) == 0)
    c1, c2 = dcs.v[:, circ.node_index["c1"]], dcs.v[:, circ.node_index["c2"]]
    # one transistor saturated (its collector under 0.2 V), the other off (its LED lit
    # from the collector side: above 6 V), half the units each way, alternating (the
    # thresholds: common practice, no source; the states themselves are checked against
    # ngspice below)
    on1 = c1 < 0.2
    assert np.all(on1 ^ (c2 < 0.2)) and np.all(np.where(on1, c2, c1) > 6.0)
    assert on1[1::2].all() and not on1[0::2].any()
    # a cross-coupling resistor open breaks the loop: nothing to settle
    dc_open = solver.solve_dc(circ, {"R3.r": 1e12})
    assert not dc_open.settled[0] and not solver.saddle(circ, {"R3.r": 1e12}, dc_open)[0]
    assert _growing(circ, {"R3.r": 1e12}, dc_open)[0] == 0


def test_the_determinant_test_agrees_with_the_growth_rates_on_faulty_units(case_paths):
    # over every modelled fault of three cases (shorts and opens move conductances by
    # decades, the determinant's range with them): saddle is True exactly when the
    # count of growing modes scipy's generalized eigenvalues give is odd
    from diag.core.engine import Engine

    for name in ("mic-preamp.yaml", "pushpull-output.yaml", "series-regulator.yaml"):
        path = next(p for p in case_paths if p.name == name)
        eng = Engine(load_case(path, RULES), RULES, K=8)
        circ = eng.circuit
        specs = [s for s in eng.specs if "+" not in s.id]
        params = ensemble.draw_hypotheses(circ, specs, 4, 0)
        with np.errstate(all="ignore"):  # as the engine solves them: a failed unit is NaN
            dc = solver.solve_dc(circ, params)
            grow = _growing(circ, params, dc)
            sad = solver.saddle(circ, params, dc)
        assert dc.ok.sum() > 0.9 * len(dc.ok)
        np.testing.assert_array_equal(sad[dc.ok], grow[dc.ok] % 2 == 1)


def test_check_says_so_and_its_bands_cover_both_states():
    # diag's own report (common practice, no source): the band of a collector of a
    # latch runs from saturated (under 0.2 V) to off (above 6 V)
    res = bands.healthy_bands(load_case(LATCH, RULES), RULES, K=16)
    assert res.switched and not res.saddle
    js = res.to_json()
    assert js["switched_states"] is True and js["unstable_operating_point"] is False
    assert "two switched states" in res.stability_text()
    tp2 = next(p for p in res.points if p.point == "TP2")     # Q1 collector
    assert tp2.low < 0.2 and tp2.high > 6.0
    assert "is unstable" in bands.stability_text(True, False)
    assert bands.stability_text(False, False) == ""


@pytest.mark.ngspice
@pytest.mark.parametrize("opened, grows", [(None, True), ("R3", False)])
def test_ngspice_leaves_the_balance_point_for_a_state_diag_settles_in(ngspice, opened,
                                                                      grows):
    """ngspice solves the same balance point (.op), and a transient run started there
    (1 nF from every node to ground; any capacitance would do: the count is odd
    whatever they are), with a 1 mV kick between the collectors either way, ends in one
    of the two states diag's settling gives (within 5 mV at every node); with R3 open
    the kick dies away and the run ends where it started."""
    from ngspice_util import run_ngspice, tran_from

    circ = _compiled(LATCH)
    params = {} if opened is None else {f"{opened}.r": 1e12}
    bal = solver.solve_dc(circ, params, settle=False)
    text = spice.netlist(circ, params)
    op = run_ngspice(text)
    nodes = list(circ.case.nodes)
    names = {n: spice.node_name(circ.case, n) for n in nodes}
    v = {n: float(bal.v[0, circ.node_index[n]]) for n in nodes}
    for n in nodes:
        assert op.v(names[n]) == pytest.approx(v[n], abs=5e-3), n
    assert bool(solver.saddle(circ, params, bal)[0]) == grows
    # two units of the same values: diag settles the first one way, the second the other
    pair = solver.solve_dc(circ, {**params, "R1.r": np.full(2, circ.nominal["R1.r"])})
    states = [{n: float(pair.v[k, circ.node_index[n]]) for n in nodes} for k in (0, 1)]
    for kick in (0.5e-3, -0.5e-3):
        start = {names[n]: v[n] for n in nodes}
        start[names["c1"]] += kick
        start[names["c2"]] -= kick
        end = tran_from(text, start, 1e-9, 2e-3, [names[n] for n in nodes])
        if grows:
            assert any(all(abs(end[names[n]] - st[n]) < 5e-3 for n in nodes)
                       for st in states), (kick, end, states)
        else:
            for n in nodes:
                assert end[names[n]] == pytest.approx(v[n], abs=1e-4), n


def test_diagnose_and_triage_carry_the_warning(tmp_path):
    # diag's own output carries the note (common practice, no source)
    from diag.core import triage
    from diag.core.engine import Engine

    eng = Engine(load_case(LATCH, RULES), RULES, K=32)
    rng = np.random.default_rng(3)
    units = {f"U{k}": eng.simulate("healthy", rng) for k in range(2)}
    d = eng.diagnose(units["U0"])
    assert d.notes and d.notes[0] == eng.stability_warning() != ""
    assert "two switched states" in eng.stability_warning()
    res = triage.triage(eng, units)
    s = triage.summarise(res)
    assert s["stability_warning"] == eng.stability_warning()
    assert eng.stability_warning() in triage.to_markdown(res, str(LATCH))
    # a stable case says nothing
    from diag.core.paths import cases_dir

    stable = Engine(load_case(cases_dir() / "line-driver.yaml", RULES), RULES, K=32)
    assert stable.stability_warning() == ""


def test_a_thyristor_pair_has_two_stable_states_and_units_in_both(case_paths):
    # a PNP and an NPN each driving the other's base (a thyristor): off, with both bases
    # held off by 10 kΩ, and on, each transistor keeping the other saturated (common
    # practice, no source; both states against ngspice below); neither is a saddle, so
    # only a second start finds the on state
    circ = _compiled(THYRISTOR)
    assert solver.two_states(circ)
    for path in case_paths:
        assert not solver.two_states(_compiled(path)), path
    assert not solver.two_states(_compiled(LATCH))     # its balance point is _settle's
    params = ensemble.draw_unit(circ, faults.healthy_spec(), 8, np.random.default_rng(2))
    dc = solver.solve_dc(circ, params)
    assert dc.ok.all() and not solver.saddle(circ, params, dc).any()
    np.testing.assert_array_equal(dc.settled, np.arange(8) % 2 == 1)
    reg = solver.regions(circ, params, dc)
    for q in range(8):
        want = "saturated" if q % 2 else "off"
        assert reg["Q1"][q] == want and reg["Q2"][q] == want, (q, reg)
    res = bands.healthy_bands(load_case(THYRISTOR, RULES), RULES, K=8)
    assert res.switched and "two switched states" in res.stability_text()


@pytest.mark.ngspice
@pytest.mark.parametrize("trigger", [False, True])
def test_ngspice_holds_the_thyristor_in_the_state_it_is_put_in(ngspice, trigger):
    """ngspice's transient run from diag's off state (1 nF from every node to ground)
    stays there, and with a 1 mA, 10 µs pulse into the NPN's base it ends in the on
    state, to 5 mV at every node of diag's other state (the state a unit is in depends on
    its history: that is why diag draws both)."""
    from ngspice_util import tran_from

    circ = _compiled(THYRISTOR)
    two = solver.solve_dc(circ, {"RL.r": np.full(2, circ.nominal["RL.r"])})
    assert list(two.settled) == [False, True]
    nodes = list(circ.case.nodes)
    names = {n: spice.node_name(circ.case, n) for n in nodes}
    off = {n: float(two.v[0, circ.node_index[n]]) for n in nodes}
    on = {n: float(two.v[1, circ.node_index[n]]) for n in nodes}
    pulse = (f"I_trig 0 {names['b2']} PULSE(0 1m 1e-4 1e-7 1e-7 1e-5 1)",) if trigger else ()
    end = tran_from(spice.netlist(circ, {}), {names[n]: off[n] for n in nodes}, 1e-9,
                    5e-3, [names[n] for n in nodes], extra=pulse)
    want = on if trigger else off
    for n in nodes:
        assert end[names[n]] == pytest.approx(want[n], abs=5e-3), (n, end, want)
