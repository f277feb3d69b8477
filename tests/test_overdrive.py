"""The large-signal limit on small-signal AC readings (diag/core/overdrive.py): by hand,
and against transient runs of ngspice (the reference simulator) at the case's own signal
level."""

from __future__ import annotations

import math
from collections.abc import Sequence
from pathlib import Path

import numpy as np
import pytest

from diag.core import ensemble, largesignal, meter, overdrive, solver, spice
from diag.core.case import load_case
from diag.core.engine import Engine
from diag.core.paths import cases_dir
from diag.core.rules import load_rules


def test_a_unit_below_the_onset_keeps_its_readings():
    # S = 12 V: a sine across the rails is 12 / (2√2) = 4.243 V rms (the rms of a sine is
    # its peak over √2, handbook); half of it 2.121 V.
    r = np.array([[9.0, 2.0, 0.05]])
    out = overdrive.limit(r, [1, 2], 12.0, np.array([[0.0, 0.0]]))
    np.testing.assert_array_equal(out, r)  # g = 2.0 / 4.243 = 0.47 < FLOOR: untouched


def test_an_overdriven_unit_reads_between_its_floor_and_the_rails():
    # S = 12 V, small-signal 8.485 V rms (g = 2): s lies in [FLOOR / g, 1] = [0.25, 1],
    # log-uniform in the draw; the result never passes S/2 = 6 V (a square wave between
    # the rails: of all waveforms confined to an interval it has the largest AC rms,
    # half the interval; handbook). The other AC point shrinks by its own draw; the DC
    # column is untouched.
    a = 12 / (2 * math.sqrt(2)) * 2
    r = np.array([[5.0, a, 0.2]] * 3)
    draws = np.array([[0.0, 0.0], [1.0, 1.0], [0.5, 0.5]])
    out = overdrive.limit(r, [1, 2], 12.0, draws)
    np.testing.assert_allclose(out[:, 0], 5.0)
    np.testing.assert_allclose(out[0, 1:], [a * 0.25, 0.2 * 0.25])
    np.testing.assert_allclose(out[1, 1:], [6.0, 0.2])           # capped at S/2
    np.testing.assert_allclose(out[2, 1:], [min(a * 0.5, 6.0), 0.2 * 0.5])  # √0.25
    assert np.all(out[:, 1] <= 6.0)


def _drawn(case_file: str, fault: str, n: int, seed: int):
    """(case, circuit, params, dc, ac) of n units of `fault` drawn by diag."""
    rules = load_rules()
    case = load_case(case_file if "/" in case_file else cases_dir() / case_file, rules)
    eng = Engine(case, rules, K=8)
    circ = eng.circuit
    params = ensemble.draw_unit(circ, eng._spec(fault), n, np.random.default_rng(seed))
    dc = solver.solve_dc(circ, params)
    return case, circ, params, dc, solver.solve_ac(circ, params, dc)


def _tran_check(ngspice, case_file: str, fault: str, n: int, seed: int,
                settle_cycles: int = 400, metered: Sequence[str] = ()):
    """For n units of `fault` drawn by diag: the ngspice transient AC rms at each AC
    point (away from the generator's node) and diag's range for it (meter.observe with
    every overdrive draw at 0 and at 1: the least and the most it can read), widened by
    what diag allows around its own AC predictions: the model error (rules/faults.yaml
    model_error ac_v, ac_rel) and the meter's accuracy (meter.accuracy). Rows: (point,
    overdrive g, small-signal reading, transient reading, the window before, low,
    high). The transient settles for `settle_cycles` periods of the tone. The points
    in `metered` are read by a run each with the case meter's input (r_in ∥ c_in,
    rules/meters.yaml) across the point, as a meter reads it; that matters where the
    meter's current is what biases the node (an emitter with no other DC path)."""
    from ngspice_util import tran_ac_rms

    rules = load_rules()
    case, circ, params, dc, ac = _drawn(case_file, fault, n, seed)
    obs = [case.observables[m] for m in overdrive.swung(case, case.observables)]
    small = meter.observe(circ, params, dc, ac, obs, case.meter, large_signal=False)

    def at(u: float) -> np.ndarray:
        p = {k: (np.full(n, u) if k.startswith(overdrive.PREFIX) else v)
             for k, v in params.items()}
        return meter.observe(circ, p, dc, ac, obs, case.meter)

    low, high = at(0.0), at(1.0)
    S = case.supply_span
    me = rules["faults"]["inference"]["model_error"]
    vpk = float(circ.nominal[f"{case.signal.ref}.vac"]) * math.sqrt(2)
    rows = []
    for b in range(n):
        one = {k: float(np.asarray(v).reshape(-1)[b if np.size(v) > 1 else 0])
               for k, v in params.items() if not k.startswith(overdrive.PREFIX)}
        names = [spice.node_name(case, case.point(o.point).node) for o in obs]
        text = spice.netlist(circ, one)
        src = spice.source_name(case.signal.ref)
        alone = [nm for nm, o in zip(names, obs, strict=True) if o.point in metered]
        tr = tran_ac_rms(text, src, vpk, float(circ.hz),
                         [nm for nm in names if nm not in alone], settle_cycles=settle_cycles)
        for name in alone:
            probe = (f"R_meter_in {name} 0 {case.meter['r_in']:.9g}\n"
                     f"C_meter_in {name} 0 {case.meter.get('c_in', 0.0) or 1e-18:.9g}\n")
            tr.update(tran_ac_rms(text.replace("\n.options", "\n" + probe + ".options", 1),
                                  src, vpk, float(circ.hz), [name],
                                  settle_cycles=settle_cycles))
        g = float(np.max(small[b])) / (S / (2 * math.sqrt(2)))
        for m, o in enumerate(obs):
            last, before = tr[names[m]]
            lo, hi = sorted((float(low[b, m]), float(high[b, m])))
            slack = (me["ac_v"] + me["ac_rel"] * hi
                     + float(meter.accuracy(hi, "ac", case.meter, "V")))
            rows.append((o.point, g, float(small[b, m]), last, before, lo - slack,
                         hi + slack))
    return rows


def test_an_off_junction_counts_as_driven_only_where_the_tone_s_peak_turns_it_on():
    """overdrive.junction_drive: line-driver's follower Q2 with R6 open sits off, and the
    tone's 0.5 V peak across its junction turns it on (Shockley: IS (exp((v_be + v_pk) /
    (NF VT)) - 1) past parts.bjt.ON_CURRENT), so its harmonic estimate v/(4 NF VT) is
    large; with its base-emitter junction open (hook k_be 0) it never conducts, and with
    the fault absent it conducts at its operating point as before."""
    from diag.core.parts.base import VT
    from diag.core.parts.bjt import ON_CURRENT

    for fault, driven in (("R6:open", True), ("Q2:be-open", False)):
        case, circ, params, dc, ac = _drawn("line-driver.yaml", fault, 8, 1)
        regions = solver.regions(circ, params, dc)
        assert not np.isin(regions["Q2"], ("active", "saturated")).any()
        vbe, h = overdrive.junction_drive(circ, params, dc, ac, regions)["Q2"]
        assert (h > overdrive.ONSET).all() if driven else (h == 0).all()
        if driven:   # the peak current by hand, against the 1 µA threshold: each
            # unit's own IS, as drawn, and its junction's DC bias plus the tone's peak
            is_ = np.asarray(params["Q2.is"], dtype=float)
            q2 = next(p for p in case.parts if p.ref == "Q2")
            bias = (solver.node_v(circ, dc.v, q2.terminal("b"))
                    - solver.node_v(circ, dc.v, q2.terminal("e")))
            assert ON_CURRENT == 1e-6 and np.all(is_ * np.expm1(
                (bias + math.sqrt(2) * vbe) / VT) > ON_CURRENT)


def test_a_collapsed_reading_does_not_spread_the_unit_s_other_points(monkeypatch):
    """A pass that reads one point at a millionth of small-signal (r of 1e-6, |ln r|
    near 14: a junction the tone has all but cut off) and the others as before (r of
    1). The spread of every point follows the unit's largest |ln r|, taken up to
    overdrive.SPREAD_TOP (ln 10): at line-driver's Q1 collector the range stays within
    exp(±SPREAD·ln 10) of small-signal, where without the cap it reached twenty times
    (a rule of the engine's own: the pass's r is replaced here, so that the rule is
    tested whatever the pass gives; its figures are checked against ngspice in the
    tests below)."""
    case, circ, params, dc, ac = _drawn("line-driver.yaml", "R6:open", 4, 1)
    obs = [case.observables[m] for m in overdrive.swung(case, case.observables)]
    points = [o.point for o in obs]
    m, cut = points.index("TP6"), points.index("TP7")   # Q1 collector; Q2 emitter

    def collapsed(circuit, p, d, rows, pairs, load=None):
        return np.array([[1e-6 if pair == ("e2", "gnd") else 1.0 for pair in pairs]
                         for _ in rows])

    monkeypatch.setattr(largesignal, "ratios", collapsed)
    small = meter.observe(circ, params, dc, ac, obs, case.meter, large_signal=False)

    def at(u: float) -> np.ndarray:
        p = {k: (np.full(4, u) if k.startswith(overdrive.PREFIX) else v)
             for k, v in params.items()}
        return meter.observe(circ, p, dc, ac, obs, case.meter)

    bound = np.exp(overdrive.SPREAD * overdrive.SPREAD_TOP) * 1.001
    lo, hi = at(0.0), at(1.0)
    assert (hi[:, cut] < 1e-4 * small[:, cut]).all()     # the collapse went through
    for got in (lo, hi):
        assert (got[:, m] / small[:, m] <= bound).all()
        assert (small[:, m] / got[:, m] <= bound).all()
    assert (hi[:, m] / small[:, m] > 0.5 * bound).all()  # and the spread is that wide


@pytest.mark.ngspice
def test_a_junction_the_tone_turns_on_at_its_peaks_gets_the_large_signal_pass(ngspice):
    """line-driver with the follower's emitter resistor R6 open: Q2 sits off (its
    emitter's only DC paths are the output capacitor's leakage and the meter) with
    0.35 V rms of tone across its base-emitter junction, so it conducts on the tone's
    peaks only, charging C3 until it conducts little. The small-signal figures, with the
    meter's 10 MΩ biasing the emitter, are 60 to 90 mV there and up to 35 mV at the line;
    ngspice's transient, with the meter across the emitter as it reads it, settles
    (over seconds: C3 into the line) at about 16 mV there and 2 mV at the line (the
    meter's 10 MΩ against the line's 10 kΩ changes nothing), and diag's range, from the
    large-signal pass with the meter connected too (overdrive._metered; the junction's
    conduction at the tone's peak, overdrive.junction_drive, sends it there), holds
    each. Without the meter the emitter settles near 2 mV instead: the meter's current
    is what that node's bias is."""
    rows = _tran_check(ngspice, "line-driver.yaml", "R6:open", n=2, seed=1,
                       settle_cycles=6000, metered=("TP7",))
    for point, g, a, last, before, lo, hi in rows:
        assert last == pytest.approx(before, rel=0.05, abs=2e-4), (point, "not settled")
        assert lo <= last <= hi, (point, g, a, last, lo, hi)
    emitter = [(a, last) for point, g, a, last, *_ in rows if point == "TP7"]
    assert len(emitter) == 2 and all(last < a / 3 for a, last in emitter)


@pytest.mark.ngspice
@pytest.mark.parametrize("fault", ["R7:open", "Q3:be-open"])
def test_a_follower_the_tone_cuts_off_most_of_the_period_balances(ngspice, fault):
    """pushpull-output with its lower half dead (R7 open, or Q3's emitter lifted): Q2
    alone feeds the midpoint, and with Q1's gain it swings about 1.2 V at its base, so it
    conducts only on the peaks and tops up C2 by R4's current. ngspice's transient (3000
    periods) settles at about 5 mV rms at the midpoint and the speaker tag; the charge
    balance has to carry C2's hold half a volt down for that, where the operating
    point's slope gave steps of 13 mV (largesignal.STRETCH: before it, diag read 0 V
    and the evaluation's units were flagged as not fitting)."""
    rows = _tran_check(ngspice, "pushpull-output.yaml", fault, n=1, seed=1,
                       settle_cycles=3000)
    swung = [r for r in rows if r[0] in ("TP7", "TP9")]
    assert len(swung) == 2
    for point, g, a, last, before, lo, hi in swung:
        assert last == pytest.approx(before, rel=0.05), (point, "not settled")
        assert 0.002 < last < 0.02, (point, last)
        assert lo <= last <= hi, (point, g, a, last, lo, hi)


@pytest.mark.ngspice
@pytest.mark.parametrize("case_file, fault", [
    ("mic-preamp.yaml", "R4:short"),      # first-stage emitter resistor shorted: the
    ("mic-preamp.yaml", "R9:short"),      # second stage's, the output clips
])
def test_clipped_readings_fall_in_the_predicted_range(ngspice, case_file, fault):
    rows = _tran_check(ngspice, case_file, fault, n=2, seed=1)
    assert max(g for _, g, *_ in rows) > 1.0, "the fault should overdrive the unit"
    for point, g, a, last, before, lo, hi in rows:
        assert last == pytest.approx(before, rel=0.03, abs=2e-4), (point, "not settled")
        assert lo <= last <= hi, (point, g, a, last, lo, hi)


@pytest.mark.ngspice
@pytest.mark.parametrize("fault", ["R4:short", "R4:low", "R3:high"])
def test_a_saturated_stage_swung_by_a_large_tone(ngspice, fault):
    # 0.5 V rms into a degenerated stage (gain 4.7). Each fault saturates it (R4 shorted
    # or low: the base divider's 2.1 V drives far more current than R3 can pass; R3
    # high: the same with less collector current to spare), and the tone pulls it out of
    # saturation every cycle: ngspice's transient collector reads 4 to 5 V rms, where
    # the small-signal figure (near zero gain in saturation) is 0.02 to 0.6 V.
    path = str(Path(__file__).parent / "data" / "ce-stage-unbypassed.yaml")
    rows = _tran_check(ngspice, path, fault, n=2, seed=1)
    assert max(last / a for _, _, a, last, *_ in rows if a > 0) > 3.0
    for point, g, a, last, _before, lo, hi in rows:
        assert lo <= last <= hi, (point, g, a, last, lo, hi)


CASCODE = str(Path(__file__).parent / "data" / "cascode.yaml")


@pytest.mark.ngspice
@pytest.mark.parametrize("fault", ["R5:short", "C3:short"])
def test_a_tone_through_a_saturated_base_collector_junction(ngspice, fault):
    # A cascode with the lower transistor's emitter shorted to ground (R5 or its bypass
    # C3): the lower stage draws more than the upper one's load passes, so the upper one
    # saturates and its forward-biased base-collector junction carries the output's
    # 20 mV of tone, about 0.27 of second harmonic by the junction's exponential law.
    # Each base-emitter junction stays under the onset (0.04 at most), yet ngspice's
    # transient output reads 1.2 to 1.6 times small-signal; `saturation_drive` sends the
    # unit through the large-signal pass and the reading falls in diag's range.
    case, circ, params, dc, ac = _drawn(CASCODE, fault, 2, 1)
    be = max(float(np.max(h)) for _, h in overdrive.junction_drive(circ, params, dc, ac)
             .values())
    assert be < overdrive.ONSET
    assert np.all(overdrive.saturation_drive(circ, params, dc, ac) > overdrive.ONSET)
    rows = _tran_check(ngspice, CASCODE, fault, n=2, seed=1)
    assert max(last / a for point, _, a, last, *_ in rows if point != "TP3") > 1.2
    for point, g, a, last, before, lo, hi in rows:
        assert last == pytest.approx(before, rel=0.03, abs=2e-4), (point, "not settled")
        assert lo <= last <= hi, (point, g, a, last, lo, hi)


def test_a_saturated_unit_keeps_its_points_in_step():
    # TP6 (the upper collector) and TP7 (the output, through a 1 µF coupling capacitor
    # into 22 kΩ: 159 Ω of reactance at 1 kHz, 1/(2πfC), handbook) carry the same
    # tone. How far the tone swings a saturated stage is one unknown of the part, so
    # each unit's readings at both sit at the same ratio to their small-signal figures,
    # anywhere from 1 to the pass's r (about 1.5 here)
    case, circ, params, dc, ac = _drawn(CASCODE, "R5:short", 64, 3)
    obs = [case.observables[m] for m in overdrive.swung(case, case.observables)]
    small = meter.observe(circ, params, dc, ac, obs, case.meter, large_signal=False)
    big = meter.observe(circ, params, dc, ac, obs, case.meter)
    names = [o.point for o in obs]
    ratio = big / small
    i6, i7 = names.index("TP6"), names.index("TP7")
    np.testing.assert_allclose(ratio[:, i6], ratio[:, i7], rtol=1e-3)
    assert ratio[:, i6].min() < 1.1 and ratio[:, i6].max() > 1.3


def test_saturation_drive_by_hand():
    # the junction's exponential law: a sine of peak v across a junction of emission
    # coefficient N makes a second harmonic of v / (4 N VT) (Taylor series, handbook);
    # here only the saturated transistor counts
    from diag.core.parts.base import VT

    case, circ, params, dc, ac = _drawn(CASCODE, "R5:short", 2, 1)
    reg = solver.regions(circ, params, dc)
    assert list(reg["Q2"]) == ["saturated"] * 2 and "saturated" not in list(reg["Q1"])
    vbc = np.abs(solver.node_v(circ, ac.v, "bb2") - solver.node_v(circ, ac.v, "c2"))
    np.testing.assert_allclose(overdrive.saturation_drive(circ, params, dc, ac),
                               vbc * math.sqrt(2) / (4 * circ.nominal["Q2.nr"] * VT),
                               rtol=1e-12)
    case, circ, params, dc, ac = _drawn(CASCODE, "healthy", 2, 1)
    assert np.all(overdrive.saturation_drive(circ, params, dc, ac) == 0.0)


@pytest.mark.ngspice
def test_a_healthy_unit_reads_its_small_signal_prediction(ngspice):
    # a linear stage: the transient rms is the small-signal one (superposition), and
    # diag leaves it alone (g under FLOOR)
    rows = _tran_check(ngspice, "mic-preamp.yaml", "healthy", n=2, seed=2)
    for point, g, a, last, _before, _lo, _hi in rows:
        assert g < overdrive.FLOOR
        assert last == pytest.approx(a, rel=0.03, abs=2e-4), point


UNBYPASSED = str(Path(__file__).parent / "data" / "ce-stage-unbypassed.yaml")


@pytest.mark.ngspice
@pytest.mark.parametrize("fault", ["R4:short", "R4:low", "R3:high"])
def test_the_charge_balance_centres_the_large_signal_reading(ngspice, fault):
    """The centre of diag's large-signal range, the small-signal reading times the pass's
    ratio r, against ngspice's transient reading at every AC point of the saturated test
    stage: within ln 0.4 (a factor 1.5) with the coupling capacitors' charge balanced
    (largesignal.py); without it the pass was up to ln 1.2 (a factor 3.3) off. The
    transistor has its card's own figures here where the generic name spreads them over
    its class (VAF, IKF, ISE; rules/models.yaml): the further off the pass is the lower the
    high-current knee (measured 2026-12-05 on R4:low's first unit: IKF 19, 24, 40, 80
    mA off by ln 0.46, 0.36, 0.25, 0.19), so a unit drawn at the class's low end would
    test the knee, not the balance."""
    from ngspice_util import tran_ac_rms

    from diag.core.parts.bjt import CLASS_SPREAD

    case, circ, params, dc, ac = _drawn(UNBYPASSED, fault, 2, 1)
    pin = set(CLASS_SPREAD) & set(load_rules()["models"]["npn-small"]["spread"])
    params = {k: (np.full(2, circ.nominal[k]) if k.split(".")[-1] in pin else v)
              for k, v in params.items()}
    dc = solver.solve_dc(circ, params)
    ac = solver.solve_ac(circ, params, dc)
    obs = [case.observables[m] for m in overdrive.swung(case, case.observables)]
    nodes = [case.point(o.point).node for o in obs]
    small = np.abs(np.stack([solver.node_v(circ, ac.v, n) for n in nodes], axis=1))
    r = largesignal.ratios(circ, params, dc, np.arange(2), [(n, case.ground) for n in nodes])
    vpk = float(circ.nominal[f"{case.signal.ref}.vac"]) * math.sqrt(2)
    for b in range(2):
        one = {k: float(np.asarray(v).reshape(-1)[b if np.size(v) > 1 else 0])
               for k, v in params.items() if not k.startswith(overdrive.PREFIX)}
        names = [spice.node_name(case, n) for n in nodes]
        tr = tran_ac_rms(spice.netlist(circ, one), spice.source_name(case.signal.ref),
                         vpk, float(circ.hz), names)
        for m, name in enumerate(names):
            off = math.log(small[b, m] * r[b, m] / tr[name][0])
            assert abs(off) < 0.4, (obs[m].point, b, small[b, m], r[b, m], tr[name][0])


def _clamp():
    from test_parts import compiled, part

    return compiled(part("V1", "supply", ["vcc", "gnd"], 12.0, r_source=0.5),
                    part("R2", "resistor", ["vcc", "gnd"], 10e3),
                    part("S1", "signal", ["in", "gnd"], 2.0, r_source=50.0),
                    part("C1", "capacitor", ["in", "x"], 1e-6),
                    part("D1", "diode", ["x", "gnd"], model="si-diode"),
                    part("R1", "resistor", ["x", "gnd"], 100e3))


@pytest.mark.ngspice
def test_a_diode_clamp_shifts_the_tone_and_does_not_clip_it(ngspice, monkeypatch):
    """A diode clamp (DC restorer: 2 V rms through 1 µF onto a diode and 100 kΩ to
    ground). Handbook clamper: the capacitor charges to the peak less the diode's drop,
    so the node carries the whole tone shifted below ground and its AC rms stays the
    tone's. diag's pass with the charge balance reads the tone's own rms (r = 1 within
    1 %), as ngspice's transient run does; held at its operating voltage instead, the
    capacitor lets the diode clip half of every cycle (r about 0.68)."""
    from ngspice_util import tran_ac_rms

    circ = _clamp()
    dc = solver.solve_dc(circ, {})
    ac = solver.solve_ac(circ, {}, dc)
    small = abs(solver.node_v(circ, ac.v, "x")[0])
    assert small == pytest.approx(2.0, rel=0.01)        # the small-signal divider is ~1
    r = largesignal.ratios(circ, {}, dc, np.array([0]), [("x", "gnd")])[0, 0]
    tr = tran_ac_rms(spice.netlist(circ, {}), spice.source_name("S1"), 2.0 * math.sqrt(2),
                     float(circ.hz), [spice.node_name(circ.case, "x")])
    last, before = tr[spice.node_name(circ.case, "x")]
    assert last == pytest.approx(before, rel=1e-3)      # settled
    assert r == pytest.approx(1.0, abs=0.01)
    assert small * r == pytest.approx(last, rel=0.01)
    monkeypatch.setattr(largesignal, "BALANCE_STEPS", 0)
    held = largesignal.ratios(circ, {}, dc, np.array([0]), [("x", "gnd")])[0, 0]
    assert held < 0.75


@pytest.mark.parametrize("case_file, fault", [
    ("mic-preamp.yaml", "R4:short"),       # clipped second stage
    ("sounder-driver.yaml", "R2:low"),     # a stage driven hard
    (UNBYPASSED, "R3:high"),               # saturated, swung out of it
    (UNBYPASSED, "R4:low"),                # saturated: its small run sits on a kink
    (CASCODE, "R5:short"),                 # the saturated upper transistor
])
def test_the_four_phase_reference_run_matches_the_full_one(monkeypatch, case_file, fault):
    """largesignal.ratios takes its reference run (at SMALL of the tone) at four phases
    and runs it again at PHASES only where those four show it is not near enough
    linear. Against the reference run at PHASES for every unit (ODD_TOL below zero
    forces that): within ODD_TOL / 3 + EVEN_TOL² / 8 in ln r (1.3e-3: the odd term's
    error and the even term's, each at its bound, as largesignal.py derives them), and
    the saturated stage's units whose run sits on a kink take the full run (their
    four-phase figure alone was 14 % off). The reference is the pass's own
    run at PHASES; the bounds come from the handbook identity sin³ = (3 sin − sin 3φ)/4
    and the rms of a second harmonic adding in quadrature (largesignal.py)."""
    bound = largesignal.ODD_TOL / 3.0 + largesignal.EVEN_TOL ** 2 / 8.0
    case, circ, params, dc, ac = _drawn(case_file, fault, 12, 1)
    obs = [case.observables[m] for m in overdrive.swung(case, case.observables)]
    pairs = overdrive.node_pairs(case, obs)
    rows = np.arange(12)
    redone = []
    inputs = largesignal._inputs

    def counted(c, p, d, r, segments, load=None):
        if len(segments) == 1:
            redone.append(len(r))
        return inputs(c, p, d, r, segments, load)

    monkeypatch.setattr(largesignal, "_inputs", counted)
    quick = largesignal.ratios(circ, params, dc, rows, pairs)
    quick_redone = sum(redone)
    monkeypatch.setattr(largesignal, "ODD_TOL", -1.0)
    full = largesignal.ratios(circ, params, dc, rows, pairs)
    assert np.all(np.isfinite(quick) == np.isfinite(full))
    ok = np.isfinite(full)
    assert np.max(np.abs(np.log(quick[ok] / full[ok]))) < bound
    if fault == "R4:low":
        assert quick_redone > 0
