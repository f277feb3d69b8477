"""The Engine façade on a real bundled case: build and cache, diagnose, bands, simulate."""

from __future__ import annotations

import math
import shutil
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest

from diag.core import workers
from diag.core.case import load_case
from diag.core.engine import Engine, Reading
from diag.core.errors import DiagError
from diag.core.paths import cases_dir

RELAY = cases_dir() / "relay-switch.yaml"  # 12 V relay coil switched by one NPN
K = 32


@pytest.fixture(scope="module")
def eng():
    e = Engine(load_case(RELAY), K=K, seed=0)
    e.build()
    return e


def test_ensemble_shape_and_hypotheses(eng):
    ens = eng.ensemble
    H = len(ens.hypotheses)
    assert ens.samples.shape == (H, K, len(eng.case.observables))
    assert ens.hypotheses[0].id == "healthy"
    assert sum(h.prior for h in ens.hypotheses) <= 1.0 + 1e-9
    assert ens.group.shape == (H,)
    # healthy units read the 12 V rail at the supply pin: nominal 12 V, 5 % tolerance,
    # 0.2 Ω source (case file): within 11.3 to 12.7 V
    tp2 = [j for j, o in enumerate(eng.case.observables) if o.point == "TP2"][0]
    assert np.all((ens.samples[0, :, tp2] > 11.3) & (ens.samples[0, :, tp2] < 12.7))


def test_posterior_sums_to_one_and_prior_without_readings(eng):
    d = eng.diagnose([])
    assert sum(s.p for s in d.suspects) == pytest.approx(1.0, abs=1e-9)
    assert d.readings_used == 0 and d.fits
    assert d.next, "with no readings there is something to learn"
    pri = {h.id: h.prior for h in eng.ensemble.hypotheses}
    top = d.suspects[0]
    assert pri[top.fault] == max(pri.values())


@pytest.mark.parametrize("fault", ["R1:open", "Q1:be-open", "K1:open", "Q1:ce-short",
                                   "R2:short"])
def test_simulated_unit_ranks_its_fault_in_the_top_three(eng, fault):
    rng = np.random.default_rng(42)
    unit = eng.simulate(fault, rng)
    assert {(r.point, r.kind) for r in unit} == {(o.point, o.kind)
                                                for o in eng.case.observables}
    d = eng.diagnose(unit)
    ranks = [s.fault for s in d.suspects]
    group = {s.fault: s.group for s in d.suspects}
    top3_groups = {s.group for s in d.suspects[:3]}
    assert fault in ranks[:3] or group[fault] in top3_groups
    assert sum(s.p for s in d.suspects) == pytest.approx(1.0, abs=1e-9)


def test_a_reading_on_the_prediction_raises_that_fault(eng):
    mid = {b.observable.point: b.mid for b in eng.bands("R1:open")
           if b.observable.kind == "dc"}
    before = {s.fault: s.p for s in eng.diagnose([]).suspects}
    after = {s.fault: s.p for s in eng.diagnose([Reading("TP4", "dc", mid["TP4"])]).suspects}
    assert after["R1:open"] > before["R1:open"]


def test_blunder_does_not_drop_the_truth_below_top_three(eng):
    unit = list(eng.simulate("K1:open", np.random.default_rng(5)))
    # one slipped probe: the coil pin read as if on the 12 V rail side
    unit = [Reading(r.point, r.kind, 12.0) if r.point == "TP4" else r for r in unit]
    d = eng.diagnose(unit)
    groups3 = {s.group for s in d.suspects[:3]}
    g = {s.fault: s.group for s in d.suspects}
    assert g["K1:open"] in groups3


def test_readings_nobody_explains_do_not_fit(eng):
    # base at 4.5 V, collector at 0.2 V and 3 A from the 12 V supply at once: no single
    # or paired fault of this circuit does that (base divider 2.2k/10k from 5 V gives at
    # most 4.1 V; the 390 Ω coil limits the current to ~31 mA)
    odd = [Reading("TP4", "dc", 4.5), Reading("TP1", "dc", 3.0), Reading("TP5", "dc", 0.2),
           Reading("TP3", "dc", 1.0), Reading("TP6", "dc", 0.5)]
    d = eng.diagnose(odd)
    assert not d.fits
    assert "outside the model" in d.fit_text
    assert sum(s.p for s in d.suspects) == pytest.approx(1.0, abs=1e-9)


def test_healthy_prior_moves_healthy(eng):
    lo = {s.fault: s.p for s in eng.diagnose([], healthy_prior=0.01).suspects}
    hi = {s.fault: s.p for s in eng.diagnose([], healthy_prior=0.5).suspects}
    assert hi["healthy"] == pytest.approx(0.5) and lo["healthy"] == pytest.approx(0.01)
    with pytest.raises(DiagError):
        eng.diagnose([], healthy_prior=1.5)


def test_next_reading_why_names_leading_predictions(eng):
    d = eng.diagnose([Reading("TP1", "dc", 0.0)])
    assert d.next
    n = d.next[0]
    assert n.bits > 0 and ":" in n.why and (" V" in n.why or "A" in n.why)
    taken = {("TP1", "dc")}
    assert all((x.point, x.kind) not in taken for x in d.next)
    costs = {(o.point, o.kind): o.cost for o in eng.case.observables}
    ratio = [x.bits / costs[(x.point, x.kind)] for x in d.next]
    assert ratio == sorted(ratio, reverse=True)


def test_bands_and_hypothesis(eng):
    bands = eng.bands("healthy")
    assert len(bands) == len(eng.case.observables)
    assert all(b.low <= b.mid <= b.high for b in bands)
    h = eng.hypothesis("R1:open")
    assert h.text.startswith("R1") and h.confirm
    pair = eng.hypothesis("K1:open+R1:open")  # not in the built set: made on demand
    assert pair.parts == ("K1", "R1")
    assert len(eng.bands("K1:open+R1:open")) == len(bands)
    with pytest.raises(DiagError):
        eng.hypothesis("R1:evaporated")


def test_simulate_is_seeded_and_shows_meter_resolution(eng):
    a = eng.simulate("R2:open", np.random.default_rng(3))
    b = eng.simulate("R2:open", np.random.default_rng(3))
    assert a == b
    # 2000-count meter (rules/meters.yaml handheld-3.5): a 12 V reading sits on the 20 V
    # range with 0.01 V resolution
    tp2 = [r.value for r in a if r.point == "TP2"][0]
    assert abs(tp2 * 100 - round(tp2 * 100)) < 1e-6


def test_cache_is_used_and_invalidated_by_a_case_edit(tmp_path, monkeypatch):
    monkeypatch.setenv("DIAG_HOME", str(tmp_path / "home"))
    path = tmp_path / "relay.yaml"
    shutil.copy(RELAY, path)
    e1 = Engine(load_case(path), K=16)
    assert not e1.build().from_cache
    e2 = Engine(load_case(path), K=16)
    assert e2.build().from_cache
    np.testing.assert_array_equal(e1.ensemble.samples, e2.ensemble.samples)
    path.write_text(path.read_text().replace("ohms: 10k", "ohms: 12k"))
    e3 = Engine(load_case(path), K=16)
    assert not e3.build().from_cache
    assert not np.array_equal(e3.ensemble.samples, e1.ensemble.samples, equal_nan=True)


def test_build_reports_progress_and_can_be_cancelled(tmp_path, monkeypatch):
    monkeypatch.setenv("DIAG_HOME", str(tmp_path / "home"))
    seen = []
    e = Engine(load_case(RELAY), K=8, seed=1)
    e.build(progress=seen.append)
    assert seen and seen[-1] == pytest.approx(1.0) and seen == sorted(seen)
    e = Engine(load_case(RELAY), K=8, seed=2)
    with pytest.raises(DiagError):
        e.build(cancelled=lambda: True)


def test_json_keys_per_spec(eng):
    d = eng.diagnose([Reading("TP1", "dc", 0.031)])
    j = d.to_json("cases/relay-switch.yaml", top=3)
    assert {"case", "readings_used", "fits", "suspects", "next"} <= set(j)
    assert len(j["suspects"]) == 3
    assert set(j["suspects"][0]) >= {"fault", "p", "group", "text"}
    assert set(j["next"][0]) >= {"point", "kind", "bits", "why"}
    ps = [s["p"] for s in j["suspects"]]
    assert ps == sorted(ps, reverse=True)


def test_bench_notes_from_readings_alone(eng):
    # Q1's emitter is on ground in this case, so TP4 (base) reads V_BE and TP5
    # (collector) reads V_CE directly. 0.55-0.8 V: a conducting silicon junction;
    # V_CE below ~0.3 V: saturation (rules/checks.yaml, # common practice, no source)
    d = eng.diagnose([Reading("TP4", "dc", 0.74), Reading("TP5", "dc", 0.08)])
    text = " ".join(d.notes)
    assert "Q1: base-emitter reads 0.74 V" in text and "conducting" in text
    assert "saturated" in text
    # collector at the supply: no collector current
    d = eng.diagnose([Reading("TP2", "dc", 12.0), Reading("TP5", "dc", 11.95),
                      Reading("TP4", "dc", 0.0)])
    text = " ".join(d.notes)
    assert "sits at vcc" in text and "off" in text
    assert d.to_json("x")["notes"] == list(d.notes)


def test_a_supply_reading_at_its_current_limit_gets_a_note():
    """pushpull-output's supply is limited to 250 mA: a supply reading within the
    limit's spread (5 %) and the meter's error of it says the supply holds its current
    and its rail has fallen; the idle 27 mA, or 200 mA, says nothing of the kind (a
    supply at its limit means a short: common practice, no source)."""
    from diag.core import notes
    from diag.core.rules import load_rules

    case = load_case(str(cases_dir() / "pushpull-output.yaml"))
    rules = load_rules()
    def said(amps):
        return " ".join(notes.bench_notes(case, rules, [Reading("TP1", "dc", amps)]))

    assert "at V1's current limit of" in said(0.245)
    assert "collapsed rail" in said(0.24)
    assert "current limit" not in said(0.027) + said(0.2)


def test_no_saturation_note_on_a_collapsed_rail():
    """lamp-switch's Q1 (collector c1, emitter at ground) reading 0.1 V collector to
    emitter is saturated while the 12 V rail stands; with the rail itself read at 0.4 V
    (a supply at its limit, or dead) every node sits that low and the small voltage says
    nothing of Q1 (rules/checks.yaml `live_rail`; common practice, no source)."""
    from diag.core import notes
    from diag.core.rules import load_rules

    case = load_case(str(cases_dir() / "lamp-switch.yaml"))
    rules = load_rules()

    def said(rail):
        return " ".join(notes.bench_notes(case, rules, [Reading("TP2", "dc", rail),
                                                        Reading("TP4", "dc", 0.1)]))

    assert "Q1: collector-emitter reads 0.1 V: saturated" in said(12.0)
    assert "saturated" not in said(0.4)


def test_junction_notes_follow_the_transistor_s_material():
    """A germanium card (tests/data/ge-pnp-stage.yaml, IS 0.3 µA) drops
    VT ln(1 + 1 mA / 0.3 µA) = 0.21 V at 1 mA (Shockley diode law, handbook; VT from
    CODATA constants at 27 °C), nearest rules/checks.yaml's germanium figure: its 0.2 V
    base to emitter is a conducting germanium junction, not a silicon one that is off
    (the figures: common practice, no source). The generic silicon cards stay silicon."""
    from scipy import constants

    from diag.core import notes
    from diag.core.rules import load_rules

    rules = load_rules()
    case = load_case(Path(__file__).parent / "data" / "ge-pnp-stage.yaml", rules)
    q1 = next(p for p in case.parts if p.ref == "Q1")
    vt = constants.k * (27 + constants.zero_Celsius) / constants.e
    assert vt * math.log1p(1e-3 / 3e-7) == pytest.approx(0.2098, abs=2e-4)
    mats = rules["checks"]["materials"]
    assert notes.material(q1, mats) == "germanium"
    for c in (load_case(p, rules) for p in sorted(cases_dir().glob("*.yaml"))):
        assert {notes.material(p, mats) for p in c.parts if p.kind in ("npn", "pnp")} \
            <= {"silicon"}
    # PNP on a negative rail: base -0.93 V, emitter -0.73 V
    got = " ".join(notes.bench_notes(case, rules, [Reading("TP2", "dc", -0.93),
                                                   Reading("TP3", "dc", -0.73)]))
    assert "Q1: base-emitter reads 0.2 V" in got and "conducting germanium junction" in got
    assert "silicon" not in got and " off " not in got
    got = " ".join(notes.bench_notes(case, rules, [Reading("TP2", "dc", -0.73),
                                                   Reading("TP3", "dc", -0.73)]))
    assert "too little for a germanium junction to conduct" in got
    got = " ".join(notes.bench_notes(case, rules, [Reading("TP2", "dc", -1.5),
                                                   Reading("TP3", "dc", -0.7)]))
    assert "more than a germanium junction drops" in got
    # a card that gives no IS has SPICE's 1e-16 A (parts.bjt.card): silicon, no error
    bare = q1.__class__(**{**q1.__dict__, "model": {"name": "inline", "BF": 80.0}})
    assert notes.material(bare, mats) == "silicon"
    # positive ground: the PNP's collector load returns to the -9 V rail, so a collector
    # at the rail carries no current (common practice, no source); at -6 V it does
    assert case.nothing_above_ground and not case.nothing_below_ground
    at_rail = [Reading("TP1", "dc", -8.6), Reading("TP4", "dc", -8.58),
               Reading("TP3", "dc", 0.0)]
    got = " ".join(notes.bench_notes(case, rules, at_rail))
    assert "Q1: the collector sits at vneg (-8.58 V), the far end of its load" in got
    at_rail[1] = Reading("TP4", "dc", -6.0)
    assert "far end of its load" not in " ".join(notes.bench_notes(case, rules, at_rail))


def test_a_note_is_stated_only_when_the_meter_band_lies_inside_its_range(eng):
    """The handheld meter's DC bound is 0.5 % of the reading + 2 counts (SPEC section 1,
    from memory): at 14 V on the 20 V range (10 mV counts), 0.09 V. V_CE worked out as
    14.00 - 13.85 V is 0.15 V ± 0.18 V,
    a band reaching past the saturation range's -0.05 V (rules/checks.yaml): no finding,
    and the note names the reading that settles it. A reading straight across collector
    and emitter (series-regulator's TP7) is used before the two readings to ground."""
    reg = Engine(load_case(cases_dir() / "series-regulator.yaml"), K=16)
    two = [Reading("TP3", "dc", 14.0), Reading("TP5", "dc", 13.85)]
    text = " ".join(reg.diagnose(two).notes)
    assert "saturated" not in text
    assert "Q1: collector-emitter works out at 0.15 V (± 0.18 V, from two readings)" in text
    assert "straight across, red probe on the collector and black on the emitter (the " \
        "case's TP7), would settle it" in text
    text = " ".join(reg.diagnose([*two, Reading("TP7", "dc", 0.15)]).notes)
    assert "Q1: collector-emitter reads 0.15 V: saturated" in text
    assert "from two readings" not in text and "too coarse" not in text
    # a power transistor passing amperes drops up to about 1.5 V base to emitter (data
    # sheets' VBE(on), from memory): 1.2 V across it read straight is no finding ...
    text = " ".join(reg.diagnose([Reading("TP4", "dc", 10.2), Reading("TP5", "dc", 9.0)]
                                 ).notes)
    assert "likely open" not in text
    # ... while a small-signal junction reading 1.2 V (relay-switch's emitter is on
    # ground, so TP4 reads V_BE straight) is past what it drops
    assert "likely open" in " ".join(eng.diagnose([Reading("TP4", "dc", 1.2)]).notes)


def test_a_reading_below_ground_past_the_meter_error_is_named(eng):
    """relay-switch: every supply positive and returned to ground, so no node sits below
    ground in DC. The handheld meter's DC bound is 0.5 % of the reading + 2 counts (SPEC
    section 1, from memory): at 50 mV on the 200 mV range (0.1 mV counts) 0.45 mV.
    -50 mV is past it (probes reversed on a node near 0 V): named, used as typed;
    -0.1 mV is inside it (a meter's offset at 0 V): nothing said."""
    note = [t for t in eng.diagnose([Reading("TP4", "dc", -0.05)]).notes
            if "below ground" in t]
    assert note == [note[0]] and note[0].startswith("TP4 reads -50 mV")
    assert "(± 450 µV)" in note[0] and "Used as typed" in note[0]
    assert not [t for t in eng.diagnose([Reading("TP4", "dc", -1e-4)]).notes
                if "below ground" in t]
    # a circuit with a supply below ground (diff-receiver's split rails) says nothing
    diff = Engine(load_case(cases_dir() / "diff-receiver.yaml"), K=16)
    node = next(p for p in diff.case.points if p.node and "dc" in p.reads)
    assert not diff.case.nothing_below_ground
    assert not [t for t in diff.diagnose([Reading(node.id, "dc", -0.05)]).notes
                if "below ground" in t]


def test_a_unit_slip_is_named_not_the_good_reading_beside_it():
    """series-regulator, a healthy unit's supply current and output, with the output
    typed in millivolts for volts. No modelled state gives a dead output with a normal
    supply current, so nothing fits; the note must name TP5 (the slipped reading, as
    volts it fits) and not blame TP1, which was read right. Readings drawn by the
    engine itself (nothing hard-coded)."""
    reg = Engine(load_case(cases_dir() / "series-regulator.yaml"), K=32)
    unit = {r.point: r for r in reg.simulate("healthy", np.random.default_rng(2))}
    slip = Reading("TP5", "dc", unit["TP5"].value / 1000)
    d = reg.diagnose([unit["TP1"], slip])
    assert not d.fits
    assert [x.split(" reads ")[0] for x in d.extra["unit_slips"]] == ["TP5 dc"]
    assert "a slip of the unit" in d.fit_text and d.extra["odd_readings"] == []
    # read right, the same unit fits and no slip is suggested
    d = reg.diagnose([unit["TP1"], unit["TP5"]])
    assert d.fits and d.extra["unit_slips"] == []


def test_a_pnp_collector_at_ground_is_named_so():
    """A high-side PNP whose load returns to ground carries no collector current when
    its collector sits at ground (common practice, no source)."""
    eng = Engine(load_case(cases_dir() / "lamp-switch.yaml"), K=16)
    d = eng.diagnose([Reading("TP2", "dc", 12.0), Reading("TP5", "dc", 11.9),
                      Reading("TP6", "dc", 0.0)])
    text = " ".join(d.notes)
    assert "Q2: the collector sits at gnd" in text and "vcc" not in text


def test_cache_is_invalidated_by_a_rules_edit(tmp_path, monkeypatch):
    from diag.core.paths import rules_dir
    from diag.core.rules import load_rules

    monkeypatch.setenv("DIAG_HOME", str(tmp_path / "home"))
    folder = tmp_path / "rules"
    shutil.copytree(rules_dir(), folder)
    case = load_case(RELAY)
    assert not Engine(case, load_rules(folder), K=16).build().from_cache
    assert Engine(case, load_rules(folder), K=16).build().from_cache
    faults_yaml = folder / "faults.yaml"
    faults_yaml.write_text(faults_yaml.read_text().replace("blunder: 0.02", "blunder: 0.03"))
    from diag.core import rules as rules_mod

    rules_mod._load.cache_clear()  # the loader caches per folder within a process
    assert not Engine(case, load_rules(folder), K=16).build().from_cache


def test_pairs_are_tried_when_no_single_fault_fits(eng):
    # R1 open turns Q1 off (coil pin at the rail) while a low 12 V supply (60-90 %)
    # pulls the rail down: no single fault does both (worked from the schematic)
    unit = eng.simulate("R1:open+V1:low", np.random.default_rng(11))
    d = eng.diagnose(unit)
    assert d.extra["pairs_tried"]
    top = [s.fault for s in d.suspects[:3]]
    assert "R1:open+V1:low" in top
    assert sum(s.p for s in d.suspects) == pytest.approx(1.0, abs=1e-9)


def test_a_reading_that_does_not_fit_is_named(eng):
    unit = list(eng.simulate("K1:open", np.random.default_rng(5)))
    unit = [Reading(r.point, r.kind, 12.0) if r.point == "TP4" else r for r in unit]
    d = eng.diagnose(unit)
    assert d.extra["odd_readings"] == ["TP4 dc"]  # the slipped probe above
    assert "TP4 dc does not fit" in d.fit_text
    # where to look: the parts at the node that reads off, not the closest suspect's
    near = [p.ref for p in eng.case.parts if eng.case.point("TP4").node in p.nodes]
    assert f"the parts at the readings that fit least ({', '.join(near)})" in d.fit_text
    clean = eng.diagnose(eng.simulate("K1:open", np.random.default_rng(5)))
    assert clean.extra["odd_readings"] == []
    # `fits` means explained without a slip (faults.yaml fit_blunders: false), and a slip
    # is likelier than a second fault matching the odd reading: no pairs are tried
    assert not d.fits and clean.fits
    assert not d.extra["pairs_tried"]


def test_pair_ensembles_are_cached_on_disk(tmp_path, monkeypatch):
    monkeypatch.setenv("DIAG_HOME", str(tmp_path / "home"))
    e1 = Engine(load_case(RELAY), K=16)
    first = e1.bands("K1:open+R1:open")
    e2 = Engine(load_case(RELAY), K=16)
    e2.build()

    def no_solve(*a, **k):
        raise AssertionError("solved again instead of reading the cache")

    monkeypatch.setattr(e2, "_solve", no_solve)
    assert e2.bands("K1:open+R1:open") == first


def test_kept_fit_references_and_extended_groups_give_the_direct_answer(monkeypatch):
    """The engine keeps goodness-of-fit references per (hypothesis, readings taken) and
    extends the built `apart` matrix by the pairs' rows only; an engine that computes
    both afresh every time (the former path) gives the same diagnosis, pairs included."""
    from diag.core import infer

    fast = Engine(load_case(RELAY), K=K, seed=0)
    units = [fast.simulate(f, np.random.default_rng(s)) for f, s in
             (("R1:open+V1:low", 11), ("K1:open", 5), ("healthy", 2))]
    units.append(units[0][:2])
    got = [fast.diagnose(u) for u in units + units]  # the second round from the caches

    class Forgetful(dict):  # keeps no reference: each is computed afresh
        def __setitem__(self, key, value):
            pass

    slow = Engine(load_case(RELAY), K=K, seed=0)
    slow._fit_refs = Forgetful()
    monkeypatch.setattr(infer, "apart_extend", lambda U, ap, lo, hi, q, sig, share:
                        infer.apart(U, q, sig, share))
    want = [slow.diagnose(u) for u in units + units]
    assert any(d.extra["pairs_tried"] for d in want)
    for a, b in zip(got, want, strict=True):
        assert a.to_json("c") == b.to_json("c")
        assert a.extra["p_value"] == b.extra["p_value"]


def test_ranking_without_advice_is_the_same_ranking():
    # The interface shows the ranking before the advice: both calls must rank alike
    # (an independent path: the same engine asked twice).
    from diag.core.case import load_case
    from diag.core.engine import Engine

    eng = Engine(load_case("sounder-driver"))
    readings = eng.simulate("R2:open", np.random.default_rng(2))[:3]
    full = eng.diagnose(readings)
    bare = eng.diagnose(readings, advise=False)
    assert bare.next == ()
    assert full.next
    assert [(s.fault, s.group) for s in bare.suspects] == [(s.fault, s.group)
                                                           for s in full.suspects]
    np.testing.assert_allclose([s.p for s in bare.suspects], [s.p for s in full.suspects],
                               rtol=0, atol=0)
    assert bare.fits == full.fits


def test_cache_keeps_only_the_newest_ensembles(tmp_path):
    """Every case or rules edit writes a new ensemble file; older ones (with their pair
    companions) go once more than CACHE_KEEP are there, newest kept."""
    import os

    from diag.core import ensemble

    names = [f"ens-c{i:02d}-r-K16-s0-v.npz" for i in range(ensemble.CACHE_KEEP + 3)]
    for i, n in enumerate(names):
        for p in (tmp_path / n, tmp_path / n.replace(".npz", "-extra.npz")):
            p.write_bytes(b"x")
            os.utime(p, (1000 + i, 1000 + i))
    (tmp_path / "session.json").write_text("{}")  # not an ensemble: never touched
    gone = ensemble.prune_cache(tmp_path)
    assert sorted(p.name for p in gone) == sorted(
        [n for n in names[:3]] + [n.replace(".npz", "-extra.npz") for n in names[:3]])
    left = sorted(p.name for p in tmp_path.glob("ens-*.npz") if "extra" not in p.name)
    assert left == names[3:]
    assert (tmp_path / "session.json").exists()


@pytest.mark.parametrize("processes", [False, True])
def test_build_does_not_depend_on_threads_processes_or_chunks(processes):
    """Each hypothesis draws from its own random stream and the solver keeps its work
    buffers per thread, so solving in parallel chunks, on threads or forked processes,
    gives the same arrays."""
    if processes and not workers.forkable():
        pytest.skip("worker processes are forked on Linux only, from a single thread")
    e = Engine(load_case(RELAY), K=16)
    one = e._solve(e.specs, 16, threads=1, chunk=16)
    two = e._solve(e.specs, 16, threads=2, chunk=5, processes=processes)
    for a, b in zip(one[:2], two[:2], strict=True):
        np.testing.assert_array_equal(a, b)
    assert one[2] == two[2]


def test_kernel_widths_worked_out_by_chunk_equal_the_whole_array_s(tmp_path, monkeypatch):
    """Our own rule: the build works out each chunk's cross-validation scores where the
    chunk is solved and chooses the widths once every unit is in; the widths are those
    of infer.kernel_spread over the whole array, bit for bit."""
    from diag.core import infer

    monkeypatch.setenv("DIAG_HOME", str(tmp_path))
    e = Engine(load_case(RELAY), K=K, seed=0)
    monkeypatch.setattr(e, "_solve", lambda *a, **k: Engine._solve(
        e, *a, **{**k, "chunk": 5, "threads": 2, "processes": False}))
    e.build()
    whole = infer.kernel_spread(e._U, e.ensemble.ref["ref_z"], infer.blunder_range(e._U)[1],
                                float(e.inf["blunder"]), e._kernel_grid())
    np.testing.assert_array_equal(e._spread, whole)
    sp = infer.spread(e._U)
    factors = np.unique(np.round(whole[sp > 0] / sp[sp > 0], 9))
    assert factors.size > 1  # the widths were chosen, not all left at one factor


MIC = cases_dir() / "mic-preamp.yaml"  # 83 hypotheses: 83 x 64 units pass THREAD_MIN_UNITS


def _in_thread(fn):
    """fn() run on a second thread, as the interface builds (a process with another
    thread running may not fork workers itself); its result, or its exception raised."""
    import threading

    out: dict = {}

    def run():
        try:
            out["r"] = fn()
        except BaseException as exc:  # noqa: BLE001 - handed back to the test
            out["e"] = exc

    th = threading.Thread(target=run)
    th.start()
    th.join()
    if "e" in out:
        raise out["e"]
    return out["r"]


@pytest.mark.skipif(not workers.forkable(), reason="worker processes are forked on Linux only")
def test_a_cold_build_from_a_thread_runs_in_a_child_and_gives_the_same_ensemble(
        tmp_path, monkeypatch):
    """Our own rule: from a process running threads, a cold build of a large case runs in
    a child process (diag.core.buildjob) that forks its own workers; the ensemble read
    back from the cache is the one built here, and its progress reaches 1."""
    monkeypatch.setenv("DIAG_HOME", str(tmp_path / "a"))
    seen: list[float] = []
    e = Engine(load_case(MIC), K=64)
    ens = _in_thread(lambda: e.build(progress=seen.append))
    assert ens.from_cache  # read back from what the child saved
    assert seen and seen[-1] == 1.0 and all(0 <= f <= 1 for f in seen)
    monkeypatch.setenv("DIAG_HOME", str(tmp_path / "b"))
    h = Engine(load_case(MIC), K=64)
    here = h.build(in_child=False)
    assert not here.from_cache
    np.testing.assert_array_equal(ens.samples, here.samples)
    np.testing.assert_array_equal(e._spread, h._spread)


@pytest.mark.skipif(not workers.forkable(), reason="worker processes are forked on Linux only")
def test_a_child_build_that_fails_is_done_here_and_one_cancelled_stops(tmp_path, monkeypatch):
    """Our own rule: should the child not run (here: no interpreter at sys.executable),
    the build runs in this process; a build cancelled while the child runs raises the
    same DiagError as one cancelled here."""
    import sys

    monkeypatch.setenv("DIAG_HOME", str(tmp_path))
    monkeypatch.setattr(sys, "executable", "/bin/false")
    e = Engine(load_case(MIC), K=64)
    ens = _in_thread(e.build)
    assert not ens.from_cache and np.isfinite(ens.samples).any()
    monkeypatch.undo()
    import subprocess

    started = []
    popen = subprocess.Popen

    def spy(*a, **k):
        started.append(popen(*a, **k))
        return started[-1]

    monkeypatch.setattr(subprocess, "Popen", spy)
    monkeypatch.setenv("DIAG_HOME", str(tmp_path / "c"))
    e = Engine(load_case(MIC), K=64)
    with pytest.raises(DiagError, match="cancelled"):
        _in_thread(lambda: e.build(cancelled=lambda: True))
    assert len(started) == 1 and started[0].returncode is not None  # stopped and reaped
    assert started[0].returncode < 0  # by a signal, not run to its end


def test_a_speaker_lead_reading_zero_is_inside_the_healthy_band():
    """The speaker side of an output capacitor sits at microvolts (the capacitor's
    leakage into 8 Ω): the meter shows 0.0 mV there, and the healthy band as the meter
    shows it holds that reading (it once read as off-healthy by 257 nV)."""
    from diag.core.session import band_offset

    eng = Engine(load_case(str(cases_dir() / "chime-buffer.yaml")), K=64)
    band = {(b.observable.point, b.observable.kind): b for b in eng.bands()}[("TP6", "dc")]
    assert band.low == band.high == 0.0
    assert band_offset(band, 0.0) == 0.0


def test_bench_checks_name_every_suspect_close_to_the_leader():
    """The powered-off check of the leader, and of each suspect within a factor of ten
    of it (at most three), so two suspects the readings leave close can be told apart
    at the bench; suspects without a check (healthy) are skipped."""
    from diag.core.engine import Diagnosis, Suspect

    confirm = {"R4:low": "measure R4", "C2:reversed": "look at C2's stripe",
               "healthy": "", "C2:leaky": "lift C2", "R1:low": "measure R1"}

    def diag(ps):
        names = ["R4:low", "C2:reversed", "healthy", "C2:leaky", "R1:low"]
        sus = tuple(Suspect(n, p, 0, n) for n, p in zip(names, ps, strict=True))
        return Diagnosis(5, True, sus, (), extra={"confirm": confirm})

    assert diag([0.48, 0.40, 0.06, 0.05, 0.01]).bench_checks() == [
        ("R4:low", "measure R4"), ("C2:reversed", "look at C2's stripe"),
        ("C2:leaky", "lift C2")]
    assert diag([0.97, 0.02, 0.005, 0.003, 0.002]).bench_checks() == [("R4:low", "measure R4")]
    assert Diagnosis(0, True, (), ()).bench_checks() == []
    # before any reading, while one can be taken: the priors alone, so read first
    # (our own rule)
    from diag.core.engine import NextReading
    first = (NextReading("TP1", "dc", 1.0, "why"),)
    before = diag([0.48, 0.40, 0.06, 0.05, 0.01])
    assert replace(before, readings_used=0, next=first).bench_checks() == []
    assert replace(before, readings_used=0).bench_checks() != []


def test_healthy_alike_only_when_a_good_unit_is_in_the_leading_group():
    """The sentence that the readings also fit a good unit appears exactly when readings
    were taken, the leader fits them, and `healthy` shares the leader's group; not when
    healthy sits in another group, when nothing fits, or before any reading. (The
    rule itself, worked on hand-made diagnoses: no outside fact is involved.)"""
    from diag.core.engine import Diagnosis, Suspect

    def d(healthy_group, fits=True, used=4):
        return Diagnosis(used, fits, (Suspect("C3:leaky", 0.5, 0, "C3 leaky"),
                                      Suspect("healthy", 0.3, healthy_group, "no fault"),
                                      Suspect("R1:open", 0.2, 2, "R1 open")), ())

    assert "also fit a good unit" in d(0).healthy_alike()
    assert "good unit" in d(0).healthy_alike(short=True)
    assert d(1).healthy_alike(short=True) == ""
    assert d(1).healthy_alike() == ""
    assert d(0, fits=False).healthy_alike() == ""
    assert d(0, used=0).healthy_alike() == ""
    assert Diagnosis(3, True, (), ()).healthy_alike() == ""
    no_good = d(0)
    no_good.extra["healthy_fits"] = False  # the engine found a good unit misfits them
    assert no_good.healthy_alike() == "" and not no_good.reads_healthy()


def test_a_unit_drawn_healthy_is_said_to_read_like_a_good_one():
    """End to end on sounder-driver (leaky electrolytics share the healthy group there,
    `diag faults`): a unit drawn healthy gets the sentence in the text and the report; a
    unit with R1 open does not: with its only bias feed open the base carries no current,
    the transistor is off and the collector sits at the supply (common practice, no
    source), volts away from a good unit."""
    from diag.commands.diagnose import format_text
    from diag.core.session import new_session, report_markdown

    case = load_case("cases/sounder-driver.yaml")
    eng = Engine(case, K=128, seed=0)
    rng = np.random.default_rng(11)
    good = eng.diagnose(list(eng.simulate("healthy", rng)))
    assert good.healthy_alike()
    assert good.healthy_alike() in format_text(case, good, 10)
    assert good.healthy_alike() in report_markdown(case, new_session(case), good, [], "")
    bad = eng.diagnose(list(eng.simulate("R1:open", rng)))
    assert bad.suspects[0].fault == "R1:open" and bad.healthy_alike() == ""
    assert "also fit a good unit" not in format_text(case, bad, 10)


def test_no_good_unit_sentence_when_a_good_unit_cannot_give_the_readings():
    """sounder-driver: the reversed output electrolytic C2 shares the healthy group
    (`diag faults`: its mild end reads like a good unit), but the first three drawn
    units with its far end that the leader fits (the fit test's 5 % of self-drawn units
    that fail it aside) put more than 0.1 V DC on the speaker tag. A good coupling
    capacitor blocks DC, so a good unit's speaker tag reads 0 V (common practice, no
    source). The
    leader's group holds healthy, the readings fit the leader, and yet the text must
    not say they also fit a good unit: a good unit fails the fit test on them."""
    from diag.commands.diagnose import format_text
    from diag.core.engine import healthy_leads

    case = load_case("cases/sounder-driver.yaml")
    eng = Engine(case, K=128, seed=0)
    far = []                # the first drawn units at the far end that fit
    for seed in range(60):
        readings = list(eng.simulate("C2:reversed", np.random.default_rng(seed)))
        spk = next(r.value for r in readings if (r.point, r.kind) == ("TP6", "dc"))
        if spk > 0.1 and eng.diagnose(readings).fits:   # volts: DC on the speaker,
            far.append(readings)                          # which a good unit never shows
        if len(far) == 3:
            break
    assert len(far) == 3
    for readings in far:
        d = eng.diagnose(readings)
        assert d.suspects[0].fault == "C2:reversed" and healthy_leads(d.suspects)
        assert d.extra["healthy_fits"] is False
        assert not d.reads_healthy() and d.healthy_alike() == ""
        assert "also fit a good unit" not in format_text(case, d, 10)


def test_a_voltage_from_two_readings_shows_the_meter_error_of_both():
    """sounder-driver: Q1's emitter sits on R4, so V_BE is TP3 - TP4, two readings. The
    default meter (SPEC section 1: DC ±(0.5 % of reading + 2 counts), 2000 counts
    autoranging, typical figures, from memory) on its 2 V range (1 mV per count):
    1.600 V ± (8.0 + 2) mV and 0.950 V ± (4.75 + 2) mV, so V_BE = 0.65 V ± 16.75 mV,
    shown rounded up to two figures: ± 17 mV. A terminal on ground carries no error
    (test_bench_notes_from_readings_alone)."""
    eng = Engine(load_case(cases_dir() / "sounder-driver.yaml"), K=16)
    d = eng.diagnose([Reading("TP3", "dc", 1.600), Reading("TP4", "dc", 0.950)])
    assert "Q1: base-emitter reads 0.65 V (± 17 mV, from two readings)" in " ".join(d.notes)


def test_leading_suspects_are_scored_on_their_further_units(eng):
    """Engine._refine (our own rule, rules/faults.yaml `refine_top`): each leading
    suspect's likelihood is the kernel mixture over its K units and its further ones
    (at the K units' kernel width), the others' over their K; the posterior is Bayes'
    rule on those."""
    from diag.core import infer

    unit = eng.simulate("R1:open", np.random.default_rng(3))
    d = eng.diagnose(unit)
    idx, vals, _ = eng._match(unit)
    u = eng._noise_obj.u(vals, idx)
    specs = list(eng.specs)
    lp = np.log(eng._priors(float(eng.inf["healthy_prior"]), specs))
    W = eng._blunder[1]
    eps = float(eng.inf["blunder"])
    base = infer.score(eng._U, idx, u, lp, eps, W, eng._spread)
    top = int(eng.inf["refine_top"])
    lead = np.argsort(-(lp + base.loglik), kind="stable")[:top]
    ll = base.loglik.copy()
    s = np.sqrt(1.0 + infer.bandwidth(eng._U, len(idx), eng._spread)[:, idx] ** 2)
    for h in lead:
        Uh = np.concatenate([eng._U[h], eng._noise_obj.u(eng._stores["-more"].mem[
            specs[h].id][1])])
        assert len(Uh) == K * (1 + int(eng.inf["refine_draws"]))
        ll[h] = infer.loglik_units(Uh, idx, u[None], s[h], eps, W)[0][0]
    want = infer.posterior(lp + ll)
    got = {s.fault: s.p for s in d.suspects}
    np.testing.assert_allclose([got[s.id] for s in specs], want, rtol=1e-9, atol=1e-15)
    assert not np.allclose(want, base.posterior)  # the further units do count


def test_a_ranking_does_not_depend_on_what_was_diagnosed_before(tmp_path, monkeypatch):
    # our own rule: every hypothesis draws its further units from a stream of its own,
    # so which units were diagnosed first (which suspects were refined) changes nothing
    monkeypatch.setenv("DIAG_HOME", str(tmp_path / "home"))
    first = Engine(load_case(RELAY), K=16, seed=0)
    units = [first.simulate(f, np.random.default_rng(s))
             for f, s in (("R2:open", 1), ("Q1:be-short", 2), ("healthy", 3))]
    a = [first.diagnose(x).to_json("c") for x in units]
    monkeypatch.setenv("DIAG_HOME", str(tmp_path / "other"))
    second = Engine(load_case(RELAY), K=16, seed=0)
    b = [second.diagnose(x).to_json("c") for x in reversed(units)][::-1]
    assert a == b


def test_further_units_are_cached_on_disk(tmp_path, monkeypatch):
    # our own rule: a suspect's further units are solved once per case and rules, then
    # read from the cache file beside the ensemble's (the same answer, no solve)
    monkeypatch.setenv("DIAG_HOME", str(tmp_path / "home"))
    e1 = Engine(load_case(RELAY), K=16)
    unit = e1.simulate("R1:open", np.random.default_rng(5))
    want = e1.diagnose(unit).to_json("c")
    e2 = Engine(load_case(RELAY), K=16)
    e2.build()

    def no_solve(*a, **k):
        raise AssertionError("solved again instead of reading the cache")

    monkeypatch.setattr(e2, "_solve", no_solve)
    assert e2.diagnose(unit).to_json("c") == want


def test_further_units_built_in_steps_are_the_same_and_saved(tmp_path, monkeypatch):
    # our own rule: the interface's background build (Engine.build_further with a chunk)
    # solves the same units as one solve, the most likely hypotheses first, and writes
    # the cache file after each step (a session closed halfway keeps what was solved);
    # a later engine then has nothing pending
    from diag.core import ensemble

    monkeypatch.setenv("DIAG_HOME", str(tmp_path / "whole"))
    whole = Engine(load_case(RELAY), K=16)
    whole.build_further()
    monkeypatch.setenv("DIAG_HOME", str(tmp_path / "steps"))
    steps = Engine(load_case(RELAY), K=16)
    assert steps.further_pending() == len(steps.specs)
    solved, saved, seen = [], [], []
    solve, save = steps._solve, ensemble.save_cache

    def spy_solve(specs, *a, **k):
        solved.append([s.id for s in specs])
        return solve(specs, *a, **k)

    monkeypatch.setattr(steps, "_solve", spy_solve)
    monkeypatch.setattr(ensemble, "save_cache", lambda *a: (saved.append(a[0]), save(*a)))
    steps.build_further(progress=seen.append, chunk=3)
    assert all(len(ids) <= 3 for ids in solved) and len(solved) == -(-len(steps.specs) // 3)
    pri = dict(zip([s.id for s in steps.specs],
                   steps._priors(float(steps.inf["healthy_prior"]), steps.specs), strict=True))
    order = [pri[i] for ids in solved for i in ids]
    assert order == sorted(order, reverse=True)
    assert len(saved) == len(solved) and seen == sorted(seen) and seen[-1] == 1.0
    for s in steps.specs:
        np.testing.assert_array_equal(steps._stores["-more"].mem[s.id][1],
                                      whole._stores["-more"].mem[s.id][1])
    assert Engine(load_case(RELAY), K=16).further_pending() == 0


def test_a_ranking_during_the_background_build_is_the_same(tmp_path, monkeypatch):
    # our own rule: a diagnosis asked for while another thread solves further units in
    # steps waits for one step at most and solves its own leading suspects, and no step
    # starts while it runs: the answer is what it is with everything solved beforehand
    import threading

    monkeypatch.setenv("DIAG_HOME", str(tmp_path / "bg"))
    bg = Engine(load_case(RELAY), K=16)
    unit = bg.simulate("R2:open", np.random.default_rng(4))
    steps, during = [], []
    on_demand = bg._on_demand

    def spy(name, specs, *a, **k):
        if name == "-more" and len(specs) == 2 and threading.current_thread() is t:
            steps.append(bg._active)
        return on_demand(name, specs, *a, **k)

    def diagnose_at_once():
        during.append(bg._active)
        return bg._diagnose(unit, None, True)

    monkeypatch.setattr(bg, "_on_demand", spy)
    t = threading.Thread(target=bg.build_further, kwargs={"chunk": 2})
    t.start()
    with bg._foreground():
        got = diagnose_at_once().to_json("c")
    t.join()
    assert during == [1] and steps and sum(steps) <= 1  # at most the step in flight
    monkeypatch.setenv("DIAG_HOME", str(tmp_path / "fg"))
    fg = Engine(load_case(RELAY), K=16)
    fg.build_further()
    assert got == fg.diagnose(unit).to_json("c")


def test_without_refinement_the_ranking_is_the_ensemble_s_own(eng, monkeypatch):
    # our own rule: refine_top 0 turns it off, the posterior is infer.score's on the K
    # units
    from diag.core import infer

    monkeypatch.setitem(eng.inf, "refine_top", 0)
    unit = eng.simulate("R2:open", np.random.default_rng(8))
    d = eng.diagnose(unit)
    idx, vals, _ = eng._match(unit)
    lp = np.log(eng._priors(float(eng.inf["healthy_prior"]), eng.specs))
    base = infer.score(eng._U, idx, eng._noise_obj.u(vals, idx), lp,
                       float(eng.inf["blunder"]), eng._blunder[1], eng._spread)
    got = {s.fault: s.p for s in d.suspects}
    np.testing.assert_allclose([got[s.id] for s in eng.specs], base.posterior, rtol=1e-12)
    # and there is nothing to solve in the background for it
    assert eng.further_pending() == 0
    monkeypatch.setattr(eng, "_on_demand", lambda *a, **k: pytest.fail("solved units"))
    eng.build_further(chunk=4)


FUSED_FOLLOWER = """\
case: 1
title: Emitter follower on a fused rail
ground: gnd
parts:
  V1: {kind: supply, plus: vin, minus: gnd, volts: 12, tol: 2%, r_source: 0.1}
  F1: {kind: fuse, nodes: [vin, vcc], amps: 1}
  R1: {kind: resistor, nodes: [vcc, base], ohms: 10k}
  R2: {kind: resistor, nodes: [base, gnd], ohms: 10k}
  Q1: {kind: npn, c: vcc, b: base, e: emit, model: npn-small}
  R3: {kind: resistor, nodes: [emit, gnd], ohms: 1k}
points:
  TP1: {node: vcc}
  TP2: {node: base}
  TP3: {node: emit}
  TP4: {node: base, minus: emit}
"""


@pytest.fixture
def fused_case(tmp_path):
    """The path of FUSED_FOLLOWER written as a case file."""
    path = tmp_path / "fused.yaml"
    path.write_text(FUSED_FOLLOWER)
    return path


def _turned(readings, point: str) -> list:
    """`readings` with the DC reading at `point` typed with its sign turned."""
    return [Reading(r.point, r.kind, -r.value) if (r.point, r.kind) == (point, "dc") else r
            for r in readings]


def test_a_collector_on_a_fused_rail_is_not_read_as_carrying_no_current(fused_case):
    """An emitter follower's collector wired to the rail through the supply lead's fuse
    sits at the rail by design: no "no collector current" note (a fuse or link is a
    wire at DC: common practice, no source). Its base-emitter reading of -0.4 V is a
    reverse-biased junction, not one with too little forward voltage (our own rule)."""
    from diag.core import notes
    from diag.core.rules import load_rules

    rules = load_rules()
    case = load_case(fused_case, rules)
    got = " ".join(notes.bench_notes(case, rules, [
        Reading("TP1", "dc", 11.98), Reading("TP2", "dc", 5.95), Reading("TP3", "dc", 5.3)]))
    assert "conducting silicon junction" in got and "sits at" not in got
    got = " ".join(notes.bench_notes(case, rules, [Reading("TP4", "dc", -0.4)]))
    assert "reverse-biased" in got and "too little" not in got
    got = " ".join(notes.bench_notes(case, rules, [Reading("TP4", "dc", 0.1)]))
    assert "too little for a silicon junction to conduct" in got


def test_a_reading_with_its_sign_turned_is_named_as_probes_reversed(fused_case, tmp_path,
                                                                    monkeypatch):
    """A reading across two nodes typed with the probes the wrong way round (its
    negative fits every other reading) is named, with the probe order to take it again
    (our own rule). The unit is a good one drawn by the engine itself."""
    monkeypatch.setenv("DIAG_HOME", str(tmp_path / "home"))
    eng = Engine(load_case(fused_case), K=64)
    unit = {(r.point, r.kind): r for r in eng.simulate("healthy", np.random.default_rng(4))}
    assert unit[("TP4", "dc")].value > 0.5
    d = eng.diagnose(_turned(unit.values(), "TP4"))
    assert not d.fits
    assert "probes the wrong way round? Take TP4 again, red probe on base, black on emit" \
        in d.fit_text
    # the mis-taken reading explains it all: no hunt for a fault outside the model
    assert "outside the model" not in d.fit_text and "retake that reading" in d.fit_text
    from diag.commands.diagnose import format_text

    assert "ONE READING LOOKS MIS-TAKEN" in format_text(eng.case, d, 5)
    assert "probes" not in eng.diagnose(list(unit.values())).fit_text


def test_a_supply_current_with_its_sign_turned_names_the_ammeter_leads(tmp_path,
                                                                       monkeypatch):
    """diff-receiver's +9 V ammeter reading typed negative (a current into the supply,
    which two supplies allow) while its positive fits: the ammeter's leads are named,
    not a probe (our own rule)."""
    monkeypatch.setenv("DIAG_HOME", str(tmp_path / "home"))
    eng = Engine(load_case(cases_dir() / "diff-receiver.yaml"), K=64)
    d = eng.diagnose(_turned(eng.simulate("healthy", np.random.default_rng(2)), "TP1"))
    assert not d.fits
    assert "the meter's leads the wrong way round in the supply lead? Take TP1 again" \
        in d.fit_text
