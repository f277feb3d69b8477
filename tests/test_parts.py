"""Part models: constants, models.yaml, device equations, defaults, spreads.

`make_case` (also used by test_solver.py and test_handbook_dc.py) builds a Case by hand,
so these tests do not depend on the case loader.
"""

from __future__ import annotations

import math
import subprocess
import sys
from pathlib import Path
from types import MappingProxyType

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import constants

from diag.core import ensemble, netlist, solver
from diag.core.case import Case, Part
from diag.core.parts import REGISTRY, VT, base, check_models
from diag.core.parts.base import T_KELVIN, pnjlim
from diag.core.parts.bjt import BJTDevice
from diag.core.parts.passive import electrolytic_leak_limit
from diag.core.rules import load_rules

RULES = load_rules()
MODELS = RULES["models"]
SEMI = ("npn", "pnp", "diode", "led", "zener")
DEFAULT = {"npn": "npn-small", "pnp": "pnp-small", "diode": "si-diode", "led": "led-red",
           "zener": "zener"}
_counter = [0]


def part(ref, kind, nodes, value=None, tol=None, model=None, **fields):
    """A Part as the loader would give it (model resolved from rules/models.yaml, or an
    inline mapping of SPICE names)."""
    m = None
    if kind in SEMI:
        if isinstance(model, dict):
            m = {"name": "inline", **model}
        else:
            name = model or DEFAULT[kind]
            m = {"name": name, **MODELS[name]["params"]}
    if "hfe" in fields:
        fields["hfe"] = tuple(float(x) for x in fields["hfe"])
    return Part(ref, kind, tuple(nodes), value, tol, MappingProxyType(fields),
                None if m is None else MappingProxyType(m))


def make_case(*parts, ground="gnd") -> Case:
    nodes: list[str] = []
    for p in parts:
        for n in p.nodes:
            if n != ground and n not in nodes:
                nodes.append(n)
    _counter[0] += 1
    return Case(path="<hand-built>", version=1, title="test", about="", ground=ground,
                parts=tuple(parts), nodes=tuple(nodes), points=(), meter={},
                hash=f"handbuilt{_counter[0]}")


def compiled(*parts):
    return netlist.compile_case(make_case(*parts), RULES)


# ----------------------------------------------------------------------------- constants

def test_thermal_voltage_is_codata_kt_over_q():
    # CODATA via scipy.constants: kT/q = 25.85 mV at 300 K
    assert_allclose(constants.k * 300.0 / constants.e, 25.85e-3, atol=0.01e-3)
    # the solver's 27 °C (SPICE default) value: k * 300.15 K / q
    assert T_KELVIN == 300.15
    assert_allclose(VT, constants.k * 300.15 / constants.e, rtol=1e-15)
    assert_allclose(VT, 25.865e-3, atol=0.001e-3)
    # CODATA via scipy.constants: the written-out k and e are the exact SI values
    assert base.BOLTZMANN == constants.k and base.ELEMENTARY_CHARGE == constants.e


def test_core_import_does_not_load_scipy():
    """The constants are written out, so a core import pulls in no scipy (start-up time;
    common practice, no source)."""
    code = "import sys, diag.core.solver, diag.core.meter; print('scipy' in sys.modules)"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True, cwd=str(Path(__file__).resolve().parents[1]))
    assert out.stdout.strip() == "False"


# ----------------------------------------------------------------------------- models.yaml

def test_generic_models_exist_with_their_kinds():
    # SPEC section 1: these generic names must exist
    want = {"npn-small": "npn", "npn-power": "npn", "pnp-small": "pnp", "pnp-power": "pnp",
            "si-diode": "diode", "si-rectifier": "diode", "led-red": "led",
            "led-green": "led", "zener": "zener"}
    for name, kind in want.items():
        assert MODELS[name]["kind"] == kind
        assert MODELS[name]["about"]
    check_models(MODELS, RULES.file("models"))


def test_models_check_names_a_bad_parameter():
    from diag.core.errors import DiagError

    with pytest.raises(DiagError, match="unknown model parameter 'BETA'"):
        check_models({"x": {"kind": "npn", "params": {"BETA": 100}}}, "models.yaml")
    # SPICE's base charge q1 = 1 / (1 - vbc/VAF - vbe/VAR) turns negative with a junction
    # forward below about 1 V
    with pytest.raises(DiagError, match="VAR 0.5 V is below a forward junction's voltage"):
        check_models({"x": {"kind": "npn", "params": {"VAR": 0.5}}}, "models.yaml")
    check_models({"x": {"kind": "npn", "params": {"VAR": 0, "CJE": 4.5e-12}}}, "models.yaml")


def _hfe_at(model: str, ic_target: float, vce: float = 5.0) -> float:
    """Ic/Ib of the intrinsic model at collector current ic_target (A), bisection on vbe."""
    c = compiled(part("Q1", "npn", ["c", "b", "gnd"], model=model))
    p = c.part_nominal("Q1")
    p.update(BJTDevice.prepare(p))
    dev = BJTDevice((0, 1, 2), 1.0)
    lo, hi = 0.3, 1.2
    for _ in range(80):
        vbe = 0.5 * (lo + hi)
        ic, ib, _, _ = dev.currents(p, np.array(vbe), np.array(vbe - vce))
        lo, hi = (vbe, hi) if ic < ic_target else (lo, vbe)
    return float(ic / ib)


def test_small_npn_gain_falls_at_100_ma():
    # common practice, no source: a small-signal NPN with low-current hFE ~200-300 has
    # hFE roughly 45-50 at 100 mA (high-current knee IKF)
    h_low = _hfe_at("npn-small", 2e-3)
    h_100 = _hfe_at("npn-small", 0.1)
    assert 200 <= h_low <= 300
    assert 45 <= h_100 <= 52


# ----------------------------------------------------------------------------- defaults

def test_speaker_dc_resistance_default_is_80_percent_of_rated():
    # IEC 60268-5: impedance not below 80 % of rated; r_dc default 0.8 x rated, z = rated
    c = compiled(part("V1", "supply", ["a", "gnd"], 1.0),
                 part("LS1", "speaker", ["a", "gnd"], 8.0))
    assert c.nominal["LS1.r"] == pytest.approx(6.4)
    assert c.nominal["LS1.z"] == pytest.approx(8.0)


def test_explicit_fields_are_used_as_given():
    c = compiled(part("V1", "supply", ["a", "gnd"], 9.0, r_source=1.5),
                 part("C1", "electrolytic", ["a", "gnd"], 100e-6, esr=0.7, leak=2e6),
                 part("L1", "inductor", ["a", "gnd"], 1e-3, r_dc=120.0),
                 part("LS1", "speaker", ["a", "gnd"], 8.0, r_dc=7.1),
                 part("F1", "fuse", ["a", "gnd"], 0.2), part("W1", "link", ["a", "gnd"]))
    n = c.nominal
    assert (n["V1.r"], n["C1.esr"], n["C1.leak"], n["L1.r"], n["LS1.r"], n["F1.r"]) == \
        (1.5, 0.7, 2e6, 120.0, 7.1, 0.2)
    assert 1e-3 <= n["W1.r"] <= 0.02      # from memory: a link is a few milliohms


def test_electrolytic_leakage_nominal_far_below_limit_and_spread_tops_at_limit():
    # common practice, no source: limit I = 0.01·C[µF]·V µA or 3 µA, whichever larger
    assert electrolytic_leak_limit(47e-6, 25.0) == pytest.approx(11.75e-6)
    assert electrolytic_leak_limit(1e-6, 16.0) == pytest.approx(3e-6)
    c = compiled(part("V1", "supply", ["a", "gnd"], 12.0),
                 part("C1", "electrolytic", ["a", "gnd"], 47e-6, volts_rated=25.0),
                 part("R1", "resistor", ["a", "gnd"], 1e3))
    i_nom = 25.0 / c.nominal["C1.leak"]
    assert i_nom <= 0.1 * 11.75e-6
    draws = ensemble.draw_healthy(c, 2000, np.random.default_rng(1))["C1.leak"]
    i = 25.0 / draws
    assert i.max() <= 11.75e-6 * (1 + 1e-12)
    assert i.max() > 0.5 * 11.75e-6     # the spread reaches up towards the limit


def test_electrolytic_without_rating_uses_the_supply_voltage():
    c = compiled(part("V1", "supply", ["a", "gnd"], 12.0),
                 part("C1", "electrolytic", ["a", "gnd"], 470e-6))
    lim = electrolytic_leak_limit(470e-6, 12.0)
    assert 12.0 / c.nominal["C1.leak"] == pytest.approx(lim / 20)


# ----------------------------------------------------------------------------- spreads

def test_draws_stay_inside_tolerance_and_hfe_range():
    c = compiled(part("V1", "supply", ["vcc", "gnd"], 12.0, tol=0.05),
                 part("R1", "resistor", ["vcc", "b"], 10e3, tol=0.01),
                 part("R2", "resistor", ["b", "gnd"], 2.2e3),
                 part("Q1", "npn", ["vcc", "b", "gnd"], hfe=[150, 450]))
    d = ensemble.draw_healthy(c, 5000, np.random.default_rng(7))
    assert np.all(np.abs(d["R1.r"] / 10e3 - 1) <= 0.01)
    assert np.all(np.abs(d["R2.r"] / 2.2e3 - 1) <= 0.05)      # default 5 % (issue text)
    assert np.all(np.abs(d["V1.v"] / 12 - 1) <= 0.05)
    assert d["Q1.bf"].min() >= 150 and d["Q1.bf"].max() <= 450
    # log-uniform: the median sits at the geometric mean
    assert_allclose(np.median(d["Q1.bf"]), math.sqrt(150 * 450), rtol=0.05)
    assert c.nominal["Q1.bf"] == pytest.approx(math.sqrt(150 * 450))
    # saturation current: log-normal about the nominal
    assert_allclose(np.median(np.log(d["Q1.is"] / c.nominal["Q1.is"])), 0.0, atol=0.03)
    again = ensemble.draw_healthy(c, 5000, np.random.default_rng(7))
    assert all(np.array_equal(d[k], again[k]) for k in d)


def test_a_card_of_the_case_own_borrows_the_generic_spread():
    """An inline card is one part's figures; the part fitted is as uncertain as any of
    its kind (transistor gain spreads about three to one: common practice, no source):
    BF is drawn over the generic model's hi/lo ratio around the card's BF, IS with the
    generic sigma, a diode's IS likewise; a part's own hfe still wins."""
    gen = MODELS["npn-small"]["spread"]
    lo, hi = (float(x) for x in gen["hfe"])
    c = compiled(part("V1", "supply", ["vcc", "gnd"], 12.0),
                 part("R1", "resistor", ["vcc", "b"], 100e3),
                 part("Q1", "npn", ["vcc", "b", "e"], model={"IS": 2e-14, "BF": 80.0}),
                 part("Q2", "npn", ["vcc", "b", "e"], model={"IS": 2e-14, "BF": 80.0},
                      hfe=[60, 90]),
                 part("R2", "resistor", ["e", "gnd"], 1e3),
                 part("R3", "resistor", ["vcc", "a"], 1e3),
                 part("D1", "diode", ["a", "gnd"], model={"IS": 1e-9, "N": 1.8}))
    d = ensemble.draw_healthy(c, 4000, np.random.default_rng(3))
    mid = math.sqrt(lo * hi)
    assert d["Q1.bf"].min() >= 80 * lo / mid - 1e-9 and d["Q1.bf"].max() <= 80 * hi / mid
    assert d["Q1.bf"].max() / d["Q1.bf"].min() > 0.9 * hi / lo        # the whole range
    assert_allclose(np.std(np.log(d["Q1.is"] / 2e-14)), gen["is_sigma"], rtol=0.1)
    assert d["Q2.bf"].min() >= 60 and d["Q2.bf"].max() <= 90
    assert_allclose(np.std(np.log(d["D1.is"] / 1e-9)),
                    MODELS["si-diode"]["spread"]["is_sigma"], rtol=0.1)


def test_a_generic_name_spreads_over_its_class_and_a_case_card_does_not():
    """A generic name stands for many part types: the card values rules/models.yaml
    spreads over the class (parts.bjt.CLASS_SPREAD: IS, VAF, IKF, ISE, as each model
    gives them; figures from memory, see there) are drawn log-uniformly over its
    factors, and a class spread of IS or ISE takes the place of the within-type one.
    An inline card is one part type and keeps the within-type spreads only (our own
    rule)."""
    from diag.core.parts.bjt import CLASS_SPREAD

    c = compiled(part("V1", "supply", ["vcc", "gnd"], 12.0),
                 part("R1", "resistor", ["vcc", "b"], 100e3),
                 part("Q1", "npn", ["vcc", "b", "e"]),
                 part("Q3", "npn", ["vcc", "b", "e"], model="npn-power"),
                 part("Q2", "npn", ["vcc", "b", "e"], model={"IS": 2e-14, "BF": 80.0,
                                                            "VAF": 60.0, "IKF": 0.1,
                                                            "ISE": 1e-13}),
                 part("R2", "resistor", ["e", "gnd"], 1e3))
    d = ensemble.draw_healthy(c, 4000, np.random.default_rng(5))
    seen = set()
    for ref, name in (("Q1", "npn-small"), ("Q3", "npn-power")):
        gen = MODELS[name]
        for key in CLASS_SPREAD:
            if key not in gen["spread"]:
                continue
            seen.add(key)
            lo, hi = (float(x) for x in gen["spread"][key])
            f = d[f"{ref}.{key}"] / float(gen["params"][key.upper()])
            assert f.min() >= lo * (1 - 1e-12) and f.max() <= hi * (1 + 1e-12)
            assert f.max() / f.min() > 0.9 * hi / lo                      # the whole range
            assert_allclose(np.median(np.log(f)), math.log(math.sqrt(lo * hi)), atol=0.1)
        if "is" not in gen["spread"]:      # IS within its type only
            assert_allclose(np.std(np.log(d[f"{ref}.is"] / float(gen["params"]["IS"]))),
                            gen["spread"]["is_sigma"], rtol=0.1)
    assert seen == set(CLASS_SPREAD)
    assert "Q2.vaf" not in d and "Q2.ikf" not in d
    gen = MODELS["npn-small"]["spread"]
    assert_allclose(np.std(np.log(d["Q2.ise"] / 1e-13)), gen["ise_sigma"], rtol=0.1)
    assert_allclose(np.std(np.log(d["Q2.is"] / 2e-14)), gen["is_sigma"], rtol=0.1)


def test_zener_bv_from_part_and_spread_per_model():
    c = compiled(part("V1", "supply", ["a", "gnd"], 15.0),
                 part("R1", "resistor", ["a", "k"], 1e3),
                 part("D1", "zener", ["gnd", "k"], bv=10.0))
    assert c.nominal["D1.bv"] == 10.0
    d = ensemble.draw_healthy(c, 2000, np.random.default_rng(2))["D1.bv"]
    tol = MODELS["zener"]["spread"]["bv_tol"]
    assert d.min() >= 10 * (1 - tol) and d.max() <= 10 * (1 + tol)


def test_every_kind_is_registered():
    from diag.core.case import TERMINALS

    assert set(TERMINALS) <= set(REGISTRY)


# ----------------------------------------------------------------------------- device maths

def test_pnjlim_limits_large_forward_steps_only():
    # SPICE pnjlim: a step above vcrit larger than 2 vt is compressed logarithmically
    v, lim = pnjlim(np.array([2.0, 0.60]), np.array([0.6, 0.59]), VT, 0.6)
    assert lim[0] and not lim[1]
    assert_allclose(v[0], 0.6 + VT * math.log(1 + 1.4 / VT), rtol=1e-12)
    assert v[1] == 0.60


def test_bjt_reduces_to_ebers_moll_with_extras_off():
    # Ebers-Moll transport model (handbook): Ic = IS(e^(vbe/vt) - e^(vbc/vt))
    #   - IS/BR (e^(vbc/vt) - 1);  Ib = IS/BF (e^(vbe/vt) - 1) + IS/BR (e^(vbc/vt) - 1)
    em = {"IS": 1e-15, "BF": 120.0, "BR": 3.0}
    c = compiled(part("Q1", "npn", ["c", "b", "gnd"], model=em))
    p = c.part_nominal("Q1")
    p.update(BJTDevice.prepare(p))
    vbe = np.array([0.55, 0.65, 0.7, 0.2])
    vbc = np.array([-3.0, -0.2, 0.6, 0.65])
    ic, ib, _, _ = BJTDevice((0, 1, 2), 1.0).currents(p, vbe, vbc)
    ebe, ebc = np.exp(vbe / VT), np.exp(vbc / VT)
    gmin = 1e-12   # SPICE gmin across each junction
    ic_em = 1e-15 * (ebe - ebc) - 1e-15 / 3.0 * (ebc - 1) - gmin * vbc
    ib_em = 1e-15 / 120.0 * (ebe - 1) + 1e-15 / 3.0 * (ebc - 1) + gmin * (vbe + vbc)
    assert_allclose(ic, ic_em, rtol=1e-9, atol=1e-18)
    assert_allclose(ib, ib_em, rtol=1e-9, atol=1e-18)


@pytest.mark.parametrize("kind", ["npn", "pnp"])
def test_bjt_jacobian_matches_finite_differences(kind):
    # independent path: central differences of the terminal currents
    c = compiled(part("Q1", kind, ["c", "b", "gnd"]))
    p = c.part_nominal("Q1")
    p.update(k_be=0.7, k_bc=0.9)
    p.update(BJTDevice.prepare(p))
    dev = BJTDevice((0, 1, 2), 1.0 if kind == "npn" else -1.0)
    s = dev.pol
    v = np.array([[s * 2.0], [s * 0.68], [0.0]])

    def cur(vv):
        J, ieq, _, _ = dev.eval(p, vv, None, limit=False)
        return np.array(ieq) + np.einsum("abk,bk->ak", np.array(J), vv)

    J = np.array(dev.eval(p, v, None, limit=False)[0])
    h = 1e-7
    for u in range(3):
        d = np.zeros((3, 1))
        d[u] = h
        fd = (cur(v + d) - cur(v - d)) / (2 * h)
        assert_allclose(J[:, u, 0], fd[:, 0], rtol=1e-4, atol=1e-12)


def test_wright_omega_matches_scipy():
    # reference: scipy.special.wrightomega (diag's core does not import scipy)
    from scipy.special import wrightomega

    z = np.concatenate([np.linspace(-740.0, -1.0, 500), np.linspace(-5.0, 5.0, 501),
                        np.geomspace(1.0, 1e5, 500)])
    assert_allclose(base.wright_omega(z), wrightomega(z), rtol=1e-13, atol=1e-300)


def test_breakdown_with_series_resistance_solves_the_series_circuit():
    # A junction in breakdown with RBV in series (ngspice's diode RS): the terminal
    # voltage vd splits into the junction's own vj and RBV i, vd = vj + RBV i(vj), with
    # i the SPICE diode law (parts/diode.py diode_iv, ngspice manual). Reference: that
    # equation solved by a root-finder (scipy.optimize.brentq) for each vd; the device's
    # conductance against central differences of its current.
    from scipy.optimize import brentq

    from diag.core.parts.bjt import Breakdown
    from diag.core.parts.diode import diode_iv

    dev = Breakdown((0, 1), "bvebo", "k_be")
    vd = -np.array([7.45, 7.5, 7.6, 8.0, 9.0, 12.0, 20.0])
    B = len(vd)
    p = {"bvebo": np.full(B, 7.5), "k_be": np.ones(B),
         "rbv": np.array([39.0, 39.0, 39.0, 39.0, 10.0, 100.0, 3.0])}
    q = dev.prepare(p)

    def cur(v):
        J, ieq, _, _ = dev.eval(q, np.array([v, np.zeros(B)]), None, limit=False)
        return ieq[0] + J[0][0] * v, J[0][0]

    i, g = cur(vd)
    for k in range(B):
        r, xbv, vte = p["rbv"][k], q["_xbv"][k], float(q["_vte"])

        def f(vj, k=k, r=r, xbv=xbv, vte=vte):
            return vj + r * float(diode_iv(np.array([vj]), q["is"], vte, xbv)[0][0]) - vd[k]

        vj = brentq(f, vd[k], 0.0, xtol=1e-14, rtol=1e-15)
        ref = float(diode_iv(np.array([vj]), q["is"], vte, xbv)[0][0])
        assert_allclose(i[k], ref, rtol=1e-7, atol=1e-15)
    h = 1e-6
    fd = (cur(vd + h)[0] - cur(vd - h)[0]) / (2 * h)
    assert_allclose(g, fd, rtol=1e-5, atol=1e-12)
    assert i[-1] < -1.0                      # 20 V reverse through 3 Ω: amperes, not 1e30


def test_bjt_open_hooks_lift_the_leads_and_leave_the_junctions():
    # fault hooks (DEVELOPERS.md): k_be / k_bc scale the emitter / collector lead
    # conductance, as a lifted lead; the junction equations are untouched (worked by
    # hand: a lead of max(R, 1 µΩ) times k)
    c = compiled(part("Q1", "npn", ["c", "b", "gnd"], model={"IS": 1e-15, "RE": 0.0}))
    assert {"Q1.ci", "Q1.ei"} <= set(c.unknowns)          # always, even with RE = 0
    p = c.part_nominal("Q1")
    t = c.terms[0]
    kind = c.kinds[0]
    leads = {(i, j): g for i, j, g in kind.dc_stamps(c.parts[0], p, t)[0] if j in
             (t["ci"], t["ei"])}
    assert leads[(t["e"], t["ei"])] == pytest.approx(1e6)  # 1 / 1 µΩ
    p.update(k_be=0.0, k_bc=0.5)
    leads = {(i, j): g for i, j, g in kind.dc_stamps(c.parts[0], p, t)[0] if j in
             (t["ci"], t["ei"])}
    assert leads[(t["e"], t["ei"])] == 0.0
    assert leads[(t["c"], t["ci"])] == pytest.approx(0.5 / p["rc"] if p["rc"] else 0.5e6)
    p.update(BJTDevice.prepare(p))
    q = c.part_nominal("Q1")
    q.update(BJTDevice.prepare(q))
    dev = BJTDevice((0, 1, 2), 1.0)
    got = dev.currents(p, np.array(0.7), np.array(0.6))[:2]
    want = dev.currents(q, np.array(0.7), np.array(0.6))[:2]
    assert_allclose(got, want, rtol=1e-15)
    # and in a solve the lifted emitter carries nothing (Kirchhoff: Ie = 0)
    c2 = compiled(part("V1", "supply", ["vcc", "gnd"], 5.0),
                  part("R1", "resistor", ["vcc", "b"], 100e3),
                  part("R2", "resistor", ["vcc", "c"], 1e3),
                  part("R3", "resistor", ["e", "gnd"], 1e3),
                  part("Q1", "npn", ["c", "b", "e"]))
    dc = solver.solve_dc(c2, {"Q1.k_be": 0.0})
    assert abs(dc.v[0, c2.node_index["e"]]) < 1e-9         # no current through R3
