"""Fault modes as data (rules/faults.yaml, rules/collateral.yaml) and the hypothesis set."""

from __future__ import annotations

import math
import re
import textwrap

import numpy as np
import pytest

from diag.core import ensemble, faults, netlist
from diag.core.case import load_case
from diag.core.errors import DiagError
from diag.core.rules import load_rules

# SPEC section 3: at least these modes per kind.
SPEC_MODES = {
    "resistor": {"open", "short", "high", "low"},
    "pot": {"open", "wiper-open"},
    "capacitor": {"open", "short", "leaky"},
    "electrolytic": {"open", "short", "leaky", "reversed"},
    "inductor": {"open", "short"}, "speaker": {"open", "short"},
    "fuse": {"open"}, "link": {"open"},
    "diode": {"open", "short"}, "led": {"open", "short"}, "zener": {"open", "short"},
    "npn": {"be-open", "be-short", "bc-open", "bc-short", "ce-short", "low-beta"},
    "pnp": {"be-open", "be-short", "bc-open", "bc-short", "ce-short", "low-beta"},
    "supply": {"low", "dead"},
}

ID = re.compile(r"^(healthy|[A-Za-z]+[0-9]*:[a-z-]+(\+[A-Za-z]+[0-9]*:[a-z-]+)*)$")


@pytest.fixture(scope="module")
def rules():
    return load_rules()


def test_every_spec_mode_is_in_the_rules(rules):
    kinds = rules["faults"]["kinds"]
    for kind, modes in SPEC_MODES.items():
        assert modes <= set(kinds[kind]["modes"]), kind


def test_mode_shares_sum_to_one(rules):
    for kind, kr in rules["faults"]["kinds"].items():
        shares = [m["share"] for m in kr["modes"].values()]
        assert math.isclose(sum(shares), 1.0, abs_tol=1e-9), kind  # definition of a split


def test_spreads_follow_the_issue(rules):
    """high x1.5 to x10, low-beta hFE 5 to 30, low supply 60 to 90 % (issue text)."""
    k = rules["faults"]["kinds"]
    assert k["resistor"]["modes"]["high"]["set"]["r"]["times"] == [1.5, 10]
    assert k["npn"]["modes"]["low-beta"]["set"]["bf"]["abs"] == [5, 30]
    assert k["supply"]["modes"]["low"]["set"]["v"]["times"] == [0.6, 0.9]
    rev = k["electrolytic"]["modes"]["reversed"]["set"]["leak"]["abs"]
    assert rev[1] / rev[0] >= 100  # spread over at least two decades (issue text)


def test_hypotheses_of_every_case(case_path, rules):
    case = load_case(case_path, rules)
    specs = faults.hypotheses(case, rules)
    ids = [s.id for s in specs]
    assert ids[0] == "healthy"
    assert len(ids) == len(set(ids))
    assert all(ID.match(i) for i in ids)
    for s in specs[1:]:
        assert s.text and s.confirm and s.weight > 0
    pri = faults.priors(specs, 0.02)
    assert math.isclose(sum(pri), 1.0, rel_tol=1e-9)  # normalised over the set
    assert pri[0] == 0.02
    # every change names a parameter the compiled circuit has (DEVELOPERS.md table)
    circ = netlist.compile_case(case, rules)
    for s in specs:
        for ch in s.changes:
            assert ch.key in circ.nominal, (s.id, ch.key)


CASE = textwrap.dedent("""\
    case: 1
    title: two stages with a fuse
    about: test circuit
    parts:
      V1: {kind: supply, plus: vcc, minus: gnd, volts: 12, r_source: 0.5}
      F1: {kind: fuse, nodes: [vcc, vf]}
      R1: {kind: resistor, nodes: [vf, b1], ohms: 47k}
      R2: {kind: resistor, nodes: [b1, gnd], ohms: 10k}
      R3: {kind: resistor, nodes: [vf, c1], ohms: 4k7}
      R4: {kind: resistor, nodes: [e1, gnd], ohms: 1k}
      Q1: {kind: npn, c: c1, b: b1, e: e1, model: npn-small}
      C1: {kind: capacitor, nodes: [c1, b2], farads: 100n}
      R5: {kind: resistor, nodes: [b2, gnd], ohms: 10k}
      R6: {kind: resistor, nodes: [vf, b2], ohms: 47k}
      Q2: {kind: npn, c: vf, b: b2, e: e2, model: npn-small}
      R7: {kind: resistor, nodes: [e2, gnd], ohms: 4R7}
    points:
      TP1: {node: c1, where: "Q1 collector"}
      TP2: {node: e2, where: "Q2 emitter"}
    """)


@pytest.fixture
def two_stage(tmp_path, rules):
    p = tmp_path / "two.yaml"
    p.write_text(CASE)
    return load_case(p, rules)


def test_linked_faults_found_by_topology(two_stage, rules):
    ids = {s.id for s in faults.hypotheses(two_stage, rules) if s.origin == "linked"}
    # shorted transistor takes its collector or emitter resistor with it, where that can
    # overheat: the whole 12 V across R7 (4.7 ohm) is 31 W (P = V^2 / R, Joule's law)
    assert {"Q2:ce-short+R7:open", "Q2:ce-short+R7:high"} <= ids
    # 12 V across R4 (1 kohm) is 0.144 W and across R3 (4.7 kohm) 31 mW, under the
    # 0.25 W default rating (rules/collateral.yaml): neither can overheat
    assert not [i for i in ids if "+R3:" in i or "+R4:" in i]
    # a resistor on the rail side of the fuse is not a collector resistor of Q2
    assert "Q2:ce-short+R1:open" not in ids
    # the output transistor with its collector on the fused rail blows the fuse
    assert "F1:open+Q2:ce-short" in ids
    # the coupling capacitor between the stages drags the next base
    assert "C1:short+Q2:be-open" in ids
    # members in reference order (SPEC section 3)
    for i in ids:
        refs = [m.split(":")[0] for m in i.split("+")]
        assert refs == sorted(refs, key=faults.ref_key)


def test_a_resistor_that_cannot_overheat_is_not_taken_with_a_short(tmp_path, rules,
                                                                   two_stage):
    r4 = two_stage.part("R4")  # no rating given: the default decides
    assert faults.can_overheat(two_stage, r4, 0.125)
    assert not faults.can_overheat(two_stage, r4, 0.25)
    # the same circuit with R4 rated 1/8 W: 0.144 W exceeds it, so the pair is back
    p = tmp_path / "rated.yaml"
    p.write_text(CASE.replace("ohms: 1k}", "ohms: 1k, watts: 0.125}"))
    case = load_case(p, rules)
    ids = {s.id for s in faults.hypotheses(case, rules) if s.origin == "linked"}
    assert "Q1:ce-short+R4:open" in ids and "Q1:ce-short+R3:open" not in ids
    assert faults.can_overheat(case, case.part("R4"), 0.25)  # its own rating counts


def test_dissipation_with_the_cause_in_place_follows_joules_law(tmp_path, rules):
    """Power in each candidate resistor with its cause fault solved (stress.py),
    against Ohm's and Joule's laws by hand (P = I^2 R), every part inside its tolerance;
    the current through the fuse likewise (I = V / R)."""
    from diag.core import stress

    p = tmp_path / "tol.yaml"
    p.write_text(CASE.replace("volts: 12,", "volts: 12, tol: 5%,")
                 .replace("F1: {kind: fuse, nodes: [vcc, vf]}",
                          "F1: {kind: fuse, nodes: [vcc, vf], ohms: 0.05}"))
    case = load_case(p, rules)
    circ = netlist.compile_case(case, rules)
    specs = {s.id: s for s in faults.singles(case, rules)}
    w = stress.worst(circ, case, {"Q1:ce-short": ("R4",), "Q2:ce-short": ("F1", "R7")},
                     specs)
    # Q2 shorted: 12 V (+-5 %) through the 0.5 ohm source, the 0.05 ohm fuse, the short
    # (1 mohm to 2 ohm, rules/faults.yaml) and R7 (4.7 ohm +-5 %, default tol). The most
    # P = V^2 R / (r + R)^2 can be is at 12.6 V, no short and R7 at its lowest (P falls
    # with R while R > r): 28.2 W; at 12 V, nominal R7 and a 0.1 ohm short, 23.6 W.
    top = 12.6 ** 2 * 4.465 / (0.55 + 4.465) ** 2
    mid = 12.0 ** 2 * 4.7 / (0.55 + 0.1 + 4.7) ** 2
    assert mid < w["Q2:ce-short"]["R7"] <= top * 1.001
    # the same current through the fuse: at most 12.6 / 5.015 = 2.51 A, and above
    # 12 / 5.35 = 2.24 A (a 0.1 ohm short, nominal parts)
    assert 12.0 / 5.35 < w["Q2:ce-short"]["F1"] <= 12.6 / (0.55 + 4.465) * 1.001
    # Q1 shorted: R3 (4.7 kohm) and R4 (1 kohm) in series across the rail, 2.1 mA; R4
    # takes 4.4 mW at nominal values, at most 5.5 mW inside the tolerances
    q1 = w["Q1:ce-short"]["R4"]
    assert 12.0 ** 2 * 1e3 / 5.7e3 ** 2 * 0.9 < q1 <= 12.6 ** 2 * 1050 / (4465 + 1050) ** 2


def test_the_engine_keeps_a_burnt_resistor_pair_only_if_the_cause_overloads_it(
        tmp_path, rules, monkeypatch):
    """The supply-span bound keeps R4 rated 1/8 W beside a shorted Q1 (12 V across it
    would be 0.144 W), but with Q1 shorted R4 is in series with R3 and takes 4.4 mW
    (Joule's law, the test above): the engine drops the pair. R7 beside a shorted Q2
    takes over 20 W and stays. A second engine reads the solved watts from the cache
    folder and solves nothing."""
    from diag.core import stress
    from diag.core.engine import Engine

    p = tmp_path / "rated.yaml"
    p.write_text(CASE.replace("ohms: 1k}", "ohms: 1k, watts: 0.125}"))
    case = load_case(p, rules)
    bound = {s.id for s in faults.hypotheses(case, rules) if s.origin == "linked"}
    assert "Q1:ce-short+R4:open" in bound
    ids = [s.id for s in Engine(case, rules).specs]
    linked = {i for i in ids if "+" in i}
    assert "Q1:ce-short+R4:open" not in linked and "Q1:bc-short+R4:high" not in linked
    assert {"Q2:ce-short+R7:open", "Q2:ce-short+R7:high"} <= linked
    assert bound - linked == {"Q1:ce-short+R4:open", "Q1:ce-short+R4:high",
                              "Q1:bc-short+R4:open", "Q1:bc-short+R4:high"}

    def no_solve(*a, **k):
        raise AssertionError("solved again on a warm start")

    monkeypatch.setattr(stress, "worst", no_solve)
    assert [s.id for s in Engine(case, rules).specs] == ids


def test_solved_watts_decide_and_an_unsolved_cause_keeps_its_pairs(two_stage, rules):
    """`stress` (cause -> resistor -> worst watts) against the rating; NaN (no unit of
    the cause solved) keeps the pair, as the supply-span bound alone would."""
    s = faults.singles(two_stage, rules)

    def pairs(stress):
        return {x.id for x in faults.linked(two_stage, rules, s, stress)
                if "+R7:" in x.id and x.id.startswith("Q2:ce-short")}

    both = {"Q2:ce-short+R7:open", "Q2:ce-short+R7:high"}
    assert pairs(None) == both
    assert pairs({"Q2:ce-short": {"R7": 0.2}}) == set()      # under the 0.25 W default
    assert pairs({"Q2:ce-short": {"R7": 0.3}}) == both
    assert pairs({"Q2:ce-short": {"R7": float("nan")}}) == both


def test_a_fuse_blows_only_past_twice_its_rating_with_the_cause_in_place(tmp_path, rules):
    """With Q2 shorted 2.24 to 2.51 A flow through F1 (Ohm's law, the test above). A fuse
    rated 1 A blows past 2.1 A (IEC 60127-2, rules/collateral.yaml): the pair is kept;
    one rated 2 A (4.2 A) holds: no pair, though the topology rule would have paired it.
    Not only a collector-emitter short: a shorted R6 or base-collector junction puts
    Q2's base on the rail, and its emitter follows about a volt below into R7 (4.7 ohm),
    roughly 2 A: past a 0.5 A fuse's 1.05 A. A shorted R7 leaves Q2 a follower biased
    from 47 kohm: tens of milliamperes, no pair."""
    from diag.core.engine import Engine

    def linked_with_fuse(amps: str) -> set[str]:
        p = tmp_path / f"f{amps}.yaml"
        p.write_text(CASE.replace("F1: {kind: fuse, nodes: [vcc, vf]}",
                                  f"F1: {{kind: fuse, nodes: [vcc, vf], amps: {amps}}}"))
        ids = {s.id for s in Engine(load_case(p, rules), rules).specs if "F1:" in s.id}
        return ids - {"F1:open"}

    assert "F1:open+Q2:ce-short" in linked_with_fuse("1")
    # the sentence says what the solved cause puts through the fuse against its rating
    p = tmp_path / "f1.yaml"
    text = next(s.text for s in Engine(load_case(p, rules), rules).specs
                if s.id == "F1:open+Q2:ce-short")
    amps = float(re.search(r"up to ([0-9.]+) A through a fuse rated 1 A", text).group(1))
    assert 12.0 / 5.35 < amps <= 12.6 / 5.015 * 1.01  # Ohm's law, the test above
    assert linked_with_fuse("2") == set()
    half = linked_with_fuse("0.5")
    assert {"F1:open+Q2:ce-short", "F1:open+Q2:bc-short", "F1:open+R6:short"} <= half
    assert not {"F1:open+R7:short", "F1:open+Q1:ce-short"} & half


def test_a_current_limit_below_the_blowing_current_keeps_the_fuse(tmp_path, rules):
    """The case of the test above on a bench supply limited to 1 A (`limit:`): a fuse
    rated 0.5 A blows past 1.05 A (IEC 60127-2, rules/collateral.yaml), which the supply
    never delivers, so no fault takes the fuse with it; limited to 2 A it can, and the
    pairs of the test above return."""
    from diag.core.engine import Engine

    def linked(limit: str) -> set[str]:
        p = tmp_path / f"l{limit}.yaml"
        p.write_text(CASE.replace(
            "F1: {kind: fuse, nodes: [vcc, vf]}", "F1: {kind: fuse, nodes: [vcc, vf], amps: 0.5}"
        ).replace("volts: 12, r_source: 0.5}", f"volts: 12, r_source: 0.5, limit: {limit}}}"))
        return {s.id for s in Engine(load_case(p, rules), rules).specs
                if "F1:" in s.id} - {"F1:open"}

    assert linked("1") == set()
    assert {"F1:open+Q2:ce-short", "F1:open+R6:short"} <= linked("2")


def test_supply_span_is_the_rails_apart(tmp_path, rules):
    # rails from ground through the supplies, each at the top of its tolerance
    def span(parts: str) -> float:
        p = tmp_path / "s.yaml"
        p.write_text(textwrap.dedent("""\
            case: 1
            title: rails
            about: test circuit
            parts:
            """) + textwrap.indent(textwrap.dedent(parts), "  ") + textwrap.dedent("""\
            points:
              TP1: {node: a, where: "a"}
            """))
        return load_case(p, rules).supply_span

    both = """\
        V1: {kind: supply, plus: a, minus: gnd, volts: 12, tol: 5%}
        V2: {kind: supply, plus: gnd, minus: b, volts: 9}
        R1: {kind: resistor, nodes: [a, b], ohms: 1k}
        R2: {kind: resistor, nodes: [a, gnd], ohms: 1k}
        """
    assert span(both) == pytest.approx(12.6 + 9.0)           # a dual supply: 21.6 V
    same_side = both.replace("plus: gnd, minus: b", "plus: b, minus: gnd")
    assert span(same_side) == pytest.approx(12.6)              # 12 V and 9 V rails
    stacked = both.replace("plus: gnd, minus: b", "plus: b, minus: a")
    assert span(stacked) == pytest.approx(21.6)                # 9 V on top of 12 V


def test_parse_fault_id(two_stage, rules):
    s = faults.parse_fault_id(two_stage, rules, "R3:open+Q1:ce-short")
    assert s.id == "Q1:ce-short+R3:open"
    for bad in ("R3", "R99:open", "R3:melted", "R3:open+R3:short"):
        with pytest.raises(DiagError):
            faults.parse_fault_id(two_stage, rules, bad)


def test_fault_draws_follow_the_rules(two_stage, rules):
    circ = netlist.compile_case(two_stage, rules)
    spec = faults.parse_fault_id(two_stage, rules, "R3:high")
    p = ensemble.draw_unit(circ, spec, 500, np.random.default_rng(1))
    ratio = p["R3.r"] / circ.nominal["R3.r"]
    # x1.5 to x10 on top of a 5 % tolerance draw (default tol, DEVELOPERS.md)
    assert ratio.min() >= 1.5 * 0.95 and ratio.max() <= 10 * 1.05
    spec = faults.parse_fault_id(two_stage, rules, "Q1:be-open")
    p = ensemble.draw_unit(circ, spec, 4, np.random.default_rng(1))
    assert np.all(p["Q1.k_be"] == 0.0)
    a = ensemble.draw_hypotheses(circ, [spec], 8, seed=5)
    b = ensemble.draw_hypotheses(circ, [faults.healthy_spec(), spec], 8, seed=5)
    for k in a:  # a hypothesis draws the same units whatever is built beside it
        np.testing.assert_array_equal(a[k], b[k][8:])


def test_ambient_temperature_shifts_junctions_by_the_handbook_coefficient(two_stage, rules):
    """A unit at 40 °C stamped on the 27 °C solver: every junction's forward voltage at a
    fixed current moves -2 mV/K (handbook figure for silicon, rules/faults.yaml
    `ambient`), i.e. N VT ln(IS_T / IS_27) = 2 mV/K x 13 K; BF x (T/T0)^XTB, SPICE's law."""
    from diag.core.parts.base import VT

    circ = netlist.compile_case(two_stage, rules)
    amb = dict(faults.inference(rules)["ambient"], celsius=[40.0, 40.0])
    base = ensemble.draw_healthy(circ, 6, np.random.default_rng(3))
    warm = ensemble.apply_ambient(circ, base, 6, np.random.default_rng(4), amb)
    dT = 40.0 + 273.15 - 300.15
    for part in circ.parts:
        if part.kind not in ("npn", "pnp"):
            continue
        ref = part.ref
        is0 = base.get(f"{ref}.is", np.full(6, circ.nominal[f"{ref}.is"]))
        dv = circ.nominal[f"{ref}.nf"] * VT * np.log(warm[f"{ref}.is"] / is0)
        np.testing.assert_allclose(dv, 2.0e-3 * dT, rtol=1e-9)
        bf0 = base.get(f"{ref}.bf", np.full(6, circ.nominal[f"{ref}.bf"]))
        np.testing.assert_allclose(warm[f"{ref}.bf"] / bf0,
                                   ((dT + 300.15) / 300.15) ** 1.5, rtol=1e-12)
    # the fault's own value still rules: low beta sets BF whatever the temperature
    spec = faults.parse_fault_id(two_stage, rules, "Q1:low-beta")
    p = ensemble.draw_unit(circ, spec, 200, np.random.default_rng(1), amb)
    assert p["Q1.bf"].min() >= 5 and p["Q1.bf"].max() <= 30


def test_swapped_transistor_takes_its_reverse_parameters(two_stage, rules):
    """`ce-swapped` exchanges the forward and reverse parameters of the unit's own drawn
    part (a `like` change reads the value before any change of the same fault), and the
    reverse gain is spread half to twice the card's BR (rules/faults.yaml, from memory)."""
    circ = netlist.compile_case(two_stage, rules)
    spec = faults.parse_fault_id(two_stage, rules, "Q1:ce-swapped")
    rng = np.random.default_rng(11)
    p = ensemble.draw_unit(circ, spec, 300, rng)
    base = ensemble.draw_healthy(circ, 300, np.random.default_rng(11))
    nom = circ.nominal
    np.testing.assert_array_equal(p["Q1.br"], base["Q1.bf"])     # BF went to the reverse side
    ratio = p["Q1.bf"] / nom["Q1.br"]
    assert ratio.min() >= 0.5 and ratio.max() <= 2.0 and ratio.max() / ratio.min() > 3
    assert np.all(p["Q1.rc"] == nom["Q1.re"]) and np.all(p["Q1.re"] == nom["Q1.rc"])
    assert np.all(p["Q1.nf"] == nom["Q1.nr"]) and np.all(p["Q1.nr"] == nom["Q1.nf"])
    assert p["Q1.vaf"].min() >= 5 and p["Q1.vaf"].max() <= 50
    # the emitter-base junction now faces the collector lead: its breakdown goes with it
    # (the part's own drawn BVEBO, rules/models.yaml), none is left at the emitter lead
    np.testing.assert_array_equal(p["Q1.bvcbo"], base["Q1.bvebo"])
    assert np.all(np.isinf(p["Q1.bvebo"])) and np.all(np.isfinite(base["Q1.bvebo"]))


def test_like_change_errors_name_the_mode(two_stage):
    import copy

    from diag.core.rules import Rules

    base = load_rules()
    for bad, msg in (({"like": 3}, "like"), ({"like": "br", "abs": [1, 2]}, "like")):
        data = copy.deepcopy(base.data)
        data["faults"]["kinds"]["npn"]["modes"]["ce-swapped"]["set"]["bf"] = bad
        with pytest.raises(DiagError, match=msg) as err:
            faults.hypotheses(two_stage, Rules(folder=base.folder, data=data, hash="x"))
        assert "npn.ce-swapped" in str(err.value)
    data = copy.deepcopy(base.data)
    data["faults"]["kinds"]["npn"]["modes"]["ce-swapped"]["set"]["bf"] = {"like": "beta"}
    spec = faults.hypotheses(two_stage, Rules(folder=base.folder, data=data, hash="x"))
    circ = netlist.compile_case(two_stage, base)
    bad_spec = next(s for s in spec if s.id == "Q1:ce-swapped")
    with pytest.raises(DiagError, match="Q1.beta"):
        ensemble.draw_unit(circ, bad_spec, 2, np.random.default_rng(0))


def test_an_open_coupling_capacitor_reaches_a_lifted_lead():
    """mic-preamp: C5 (10 µF) couples Q2's collector into R11 (47 kΩ). With a lead
    lifted only the stray capacitance across the gap is left, about 1 pF (from memory):
    Xc = 1 / (2 pi f C) = 159 MΩ at 1 kHz (handbook formula), so the output reads
    47 kΩ / 159 MΩ = 3e-4 of the collector's signal, about 0.25 mV for its 0.8 V.
    Some of the engine's C5:open units must read that low (below 1 mV); a floor of
    1e-5 of the nominal (100 pF, 1.6 MΩ) could not go below about 25 mV."""
    from diag.core.engine import Engine

    eng = Engine(load_case("cases/mic-preamp.yaml"), K=128, seed=0)
    ens = eng.ensemble
    ids = [hy.id for hy in ens.hypotheses]
    h = ids.index("C5:open")
    j = next(i for i, o in enumerate(eng.observables) if (o.point, o.kind) == ("TP9", "ac"))
    xc = 1.0 / (2 * math.pi * 1e3 * 1e-12)
    assert xc == pytest.approx(159e6, rel=0.01)
    col = float(np.median(ens.samples[ids.index("healthy"), :, j]))
    assert 0.6 < col < 1.0  # volts rms: the healthy output, nearly all of the collector's
    assert np.nanmin(ens.samples[h, :, j]) < 1e-3
    assert np.nanmin(ens.samples[h, :, j]) < 4 * col * 47e3 / xc
