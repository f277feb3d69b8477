"""DC operating points worked by hand from handbook formulas, and a fact of the trade."""

from __future__ import annotations

import math

import numpy as np
from numpy.testing import assert_allclose
from test_parts import MODELS, compiled, part

from diag.core import solver
from diag.core.parts import VT

# an ideal Ebers-Moll transistor: VAF, IKF infinite, ISE 0, no series resistances
EM = {"IS": 1e-15, "BF": 100.0, "BR": 1.0}


def _bias_by_hand(vcc, r1, r2, re, bf, is_):
    """Handbook divider-bias equations: Vth = Vcc R2/(R1+R2), Rth = R1 ∥ R2,
    Ie = (Vth - Vbe)/(Re + Rth/(BF+1)), Vbe = vt ln(Ic/IS + 1), Ic = BF/(BF+1) Ie;
    the Vbe fixed point iterated to convergence. Returns (Vb, Ve, Ic)."""
    vth, rth = vcc * r2 / (r1 + r2), r1 * r2 / (r1 + r2)
    vbe = 0.65
    for _ in range(200):
        ie = (vth - vbe) / (re + rth / (bf + 1))
        ic = bf / (bf + 1) * ie
        vbe = VT * math.log(ic / is_ + 1)
    ve = ie * re
    return ve + vbe, ve, ic


def test_emitter_follower_bias_by_hand():
    c = compiled(part("V1", "supply", ["vcc", "gnd"], 12.0, r_source=0.0),
                 part("R1", "resistor", ["vcc", "b"], 33e3),
                 part("R2", "resistor", ["b", "gnd"], 47e3),
                 part("Q1", "npn", ["vcc", "b", "e"], model=EM),
                 part("R3", "resistor", ["e", "gnd"], 2.2e3))
    dc = solver.solve_dc(c)
    vb, ve, ic = _bias_by_hand(12.0, 33e3, 47e3, 2.2e3, 100.0, 1e-15)
    assert_allclose(dc.v[0, c.node_index["b"]], vb, atol=1e-4)   # handbook formula by hand
    assert_allclose(dc.v[0, c.node_index["e"]], ve, atol=1e-4)


def test_degenerated_common_emitter_bias_by_hand():
    c = compiled(part("V1", "supply", ["vcc", "gnd"], 12.0, r_source=0.0),
                 part("R1", "resistor", ["vcc", "b"], 47e3),
                 part("R2", "resistor", ["b", "gnd"], 10e3),
                 part("R3", "resistor", ["vcc", "c"], 4.7e3),
                 part("R4", "resistor", ["e", "gnd"], 1e3),
                 part("Q1", "npn", ["c", "b", "e"], model={**EM, "BF": 200.0}))
    dc = solver.solve_dc(c)
    vb, ve, ic = _bias_by_hand(12.0, 47e3, 10e3, 1e3, 200.0, 1e-15)
    # handbook formula by hand: Vc = Vcc - Rc Ic (BC junction reverse biased)
    assert_allclose(dc.v[0, c.node_index["b"]], vb, atol=1e-4)
    assert_allclose(dc.v[0, c.node_index["e"]], ve, atol=1e-4)
    assert_allclose(dc.v[0, c.node_index["c"]], 12.0 - 4.7e3 * ic, atol=1e-3)
    assert solver.regions(c, None, dc)["Q1"][0] == "active"


def test_shockley_diode_voltage_at_the_solved_current():
    # Shockley equation (handbook) with series resistance: V = N vt ln(I/IS + 1) + I RS
    m = MODELS["si-diode"]["params"]
    c = compiled(part("V1", "supply", ["vcc", "gnd"], 10.0, r_source=0.0),
                 part("R1", "resistor", ["vcc", "a"], 1e3),
                 part("D1", "diode", ["a", "gnd"]))
    dc = solver.solve_dc(c)
    i = dc.i_supply[0, 0]
    v = m["N"] * VT * math.log(i / m["IS"] + 1) + i * m["RS"]
    assert_allclose(dc.v[0, c.node_index["a"]], v, atol=1e-6)
    assert_allclose(i, (10.0 - v) / 1e3, rtol=1e-9)                # Ohm's law


def test_zener_breakdown_voltage_is_bv_at_ibv():
    # SPICE diode model (ngspice manual): the reverse current is IBV at V = -BV and grows
    # by e per N·vt beyond it, so |V| = BV + N vt ln(I/IBV) + I RS at current I
    m = MODELS["zener"]["params"]
    c = compiled(part("V1", "supply", ["vin", "gnd"], 15.0, r_source=0.0),
                 part("R1", "resistor", ["vin", "k"], 1e3),
                 part("D1", "zener", ["gnd", "k"], bv=10.0))
    dc = solver.solve_dc(c, {"R1.r": np.array([1e3, 2.2e3, 560.0])})
    i = dc.i_supply[:, 0]
    v = 10.0 + m["N"] * VT * np.log(i / m["IBV"]) + i * m["RS"]
    assert_allclose(dc.v[:, c.node_index["k"]], v, atol=1e-6)


def test_reversed_emitter_base_junction_holds_near_bvebo():
    # A transistor's emitter-base junction driven in reverse acts as a zener of about
    # 6 to 9 V (common practice, no source). diag places it as the SPICE diode breakdown
    # law (ngspice manual, as in the zener check above) with BV = the card's BVEBO at
    # IBV = 10 µA, N = BD_N and the series resistance RS = the card's RBV, so with the
    # base grounded and the emitter fed through R:
    # |V| = BVEBO + N vt ln(I / IBV) + I RBV, I = (Vs - V) / R, solved here by fixed
    # point (a contraction while RBV < R). At 10 kΩ the series resistance adds tens of
    # millivolts; at 100 Ω, tens of milliamperes through it, volts. A lifted emitter lead
    # takes the junction with it: the emitter then sits at the divider R, 1 MΩ.
    from diag.core.parts.bjt import BD_N, BD_TEST_AMPS

    c = compiled(part("V1", "supply", ["vs", "gnd"], 12.0, r_source=0.0),
                 part("R1", "resistor", ["vs", "e"], 10e3),
                 part("R2", "resistor", ["e", "gnd"], 1e6),
                 part("Q1", "npn", ["gnd", "gnd", "e"], model="npn-small"))
    bv = np.array([6.0, 7.5, 9.0, 7.5, 7.5])
    feed = np.array([10e3, 10e3, 10e3, 100.0, 100.0])
    rbv = np.array([39.0, 39.0, 39.0, 39.0, 10.0])
    dc = solver.solve_dc(c, {"Q1.bvebo": bv, "R1.r": feed, "Q1.rbv": rbv})
    v = bv.copy()
    for _ in range(400):
        i = (12.0 - v) / feed - v / 1e6
        v = bv + BD_N * VT * np.log(i / BD_TEST_AMPS) + i * rbv
    assert_allclose(dc.v[:, c.node_index["e"]], v, atol=1e-6)
    assert np.all((v[:3] > bv[:3]) & (v[:3] < bv[:3] + 0.3))   # a few tenths above BVEBO
    assert v[3] - v[4] > 0.5                                   # the resistance, at 25 mA
    lifted = solver.solve_dc(c, {"Q1.k_be": 0.0})
    assert_allclose(lifted.v[0, c.node_index["e"]], 12.0 * 1e6 / (1e6 + 10e3), rtol=1e-6)


def test_collector_feedback_stage_sits_near_one_and_a_half_volts():
    # common practice, no source: single NPN on 5 V, 33 Ω collector resistor, 330 Ω
    # collector to base, gain ~45-50 at the ~100 mA it runs at: the collector sits near
    # 1.5 V with about 3.5 V across the collector resistor
    c = compiled(part("V1", "supply", ["vcc", "gnd"], 5.0, r_source=0.0),
                 part("R1", "resistor", ["vcc", "col"], 33.0),
                 part("R2", "resistor", ["col", "base"], 330.0),
                 part("Q1", "npn", ["col", "base", "gnd"], model="npn-small"))
    dc = solver.solve_dc(c)
    vc, vb = dc.v[0, c.node_index["col"]], dc.v[0, c.node_index["base"]]
    ib = (vc - vb) / 330.0
    ic = dc.i_supply[0, 0] - ib
    assert 45 <= ic / ib <= 52
    assert 1.35 <= vc <= 1.7
    assert 3.3 <= 5.0 - vc <= 3.65
    assert 0.09 <= dc.i_supply[0, 0] <= 0.115
