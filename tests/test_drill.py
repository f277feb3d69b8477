"""Drills (diag/core/drill.py, `diag drill --summary`): the drawn unit, readings, naming,
scoring, exercise files and the class summary."""

from __future__ import annotations

import csv
from pathlib import Path

import numpy as np
import pytest

from diag.cli import main
from diag.core import meter
from diag.core.case import load_case
from diag.core.drill import (
    ABANDONED,
    FOUND,
    MAX_NAMINGS,
    NAMINGS_USED_UP,
    P_DONE,
    RESULT_FIELDS,
    REVEALED,
    Drill,
    Exercise,
    Points,
    Round,
    close_names,
    draw_unit,
    fault_family,
    follow_advice,
    load_exercises,
    pick_fault,
    read_results,
    summarise,
    work_points,
)
from diag.core.engine import Engine
from diag.core.errors import DiagError
from diag.core.meter import display_text
from diag.core.rules import load_rules

ROOT = Path(__file__).resolve().parents[1]
CASE = ROOT / "cases" / "sounder-driver.yaml"


@pytest.fixture(scope="module")
def engine() -> Engine:
    eng = Engine(load_case(str(CASE)), load_rules())
    eng.build()
    return eng


class Clock:
    """A clock the test moves by hand (seconds)."""

    def __init__(self) -> None:
        self.t = 100.0

    def __call__(self) -> float:
        return self.t


def test_same_seed_same_unit_and_same_as_simulate(engine):
    a = Round.start(Exercise(str(CASE), "R2:open", 41), engine)
    b = Round.start(Exercise(str(CASE), "R2:open", 41), engine)
    c = Round.start(Exercise(str(CASE), "R2:open", 42), engine)
    assert a.drawn.shown == b.drawn.shown
    np.testing.assert_array_equal(a.drawn.truth, b.drawn.truth)
    assert a.drawn.shown != c.drawn.shown
    # the drill draws exactly what `diag simulate --seed 41` prints
    assert a.drawn.shown == engine.simulate("R2:open", np.random.default_rng(41))
    # a fault drawn by the priors is replayable from the seed too
    r1 = Round.start(Exercise(str(CASE), None, 7), engine)
    r2 = Round.start(Exercise(str(CASE), None, 7), engine)
    assert r1.truth == r2.truth and r1.drawn.shown == r2.drawn.shown


@pytest.mark.parametrize("fault", ["healthy", "R2:open", "Q1:be-short", "C3:short",
                                   "R3:high"])
def test_readings_stay_inside_the_meter_accuracy_of_the_model(engine, fault):
    # The meter's stated accuracy, ±(pct % of reading + counts × resolution), per
    # rules/meters.yaml (handheld-3.5, SPEC section 1), plus half a display count for the
    # rounding of the shown digits.
    m = engine.case.meter
    for seed in range(12):
        u = draw_unit(engine, fault, np.random.default_rng(seed))
        for x, r, o in zip(u.truth, u.shown, engine.case.observables, strict=True):
            bound = float(meter.accuracy(np.array([x]), o.kind, m, o.unit)[0])
            q = float(meter.resolution(np.array([r.value]), m, o.unit)[0])
            assert abs(r.value - x) <= bound + q / 2 + 1e-12, (fault, seed, o, x, r.value)


def test_pick_fault_follows_the_priors(engine):
    # Binomial standard error sqrt(p(1-p)/n) (handbook formula): every fault's share of
    # 20 000 seeded draws lies within 5 standard errors of its renormalised prior.
    rng = np.random.default_rng(3)
    n = 20000
    draws = [pick_fault(engine, rng) for _ in range(n)]
    hyps = [h for h in engine.ensemble.hypotheses if h.id != "healthy"]
    total = sum(h.prior for h in hyps)
    assert "healthy" not in draws
    for h in hyps:
        p = h.prior / total
        share = draws.count(h.id) / n
        assert abs(share - p) <= 5 * np.sqrt(p * (1 - p) / n) + 1 / n, h.id


def test_a_drill_draws_no_fault_that_reads_like_a_good_unit(engine, tmp_path):
    # our own rule (pick_fault's `visible`): a fault in the good unit's group shows on no
    # offered reading, so a drill could only be won on it by guessing; drawn faults leave
    # that group out. Named "healthy" for such a fault given on purpose (--fault), the
    # score says how far the readings go instead of "found the fault".
    from diag.core.drill import _group_of

    group = _group_of(engine)
    hidden = [f for f, g in group.items() if g == group["healthy"] and f != "healthy"]
    assert hidden  # sounder-driver has such faults (an open bypass capacitor among them)
    rng = np.random.default_rng(8)
    draws = {pick_fault(engine, rng, visible=True) for _ in range(3000)}
    assert not draws & set(hidden) and "healthy" not in draws
    drill = Drill([Exercise(str(CASE), hidden[0], 5, "unseen")], lambda p: engine,
                  trainee="ana", results=str(tmp_path / "class.csv"), clock=Clock())
    drill.round.read("TP2", "dc")
    score = drill.name("healthy").score
    assert score.correct and score.same_group
    assert score.breakdown()[0][0].startswith(
        f"found as far as the offered readings go: {hidden[0]} reads like a good unit")


def test_scripted_drill_right_answer(engine, tmp_path):
    clock = Clock()
    results = tmp_path / "class.csv"
    drill = Drill([Exercise(str(CASE), "R2:open", 5, "bias")], lambda p: engine,
                  trainee="ana", results=str(results), clock=clock)
    rnd = drill.round
    r3 = rnd.read("TP3", "dc")
    assert r3.value == rnd.unit[("TP3", "dc")].value and r3.time
    rnd.read("TP5", "dc")
    rnd.read("TP3", "dc")  # asking again does not count twice
    clock.t += 42.0
    naming = drill.name("R2:open")
    assert naming.right and naming.readings == 2
    score = naming.score
    assert score.correct and not score.same_group and score.status == FOUND
    assert score.readings_used == 2
    assert score.seconds == pytest.approx(42.0)
    assert score.advice_readings >= 1
    # diag's advice, replayed on the unit as the trainee saw it, ends where it says
    steps, last = follow_advice(engine, rnd.unit)
    top = last.suspects[0]
    assert sum(s.p for s in last.suspects if s.group == top.group) >= P_DONE or \
        len(steps) == len(engine.case.observables) or not last.next
    assert score.advice_fault == top.fault
    assert drill.finished and drill.next_round() is None
    with pytest.raises(DiagError):
        rnd.read("TP4", "dc")  # scored: no more readings
    rows = list(csv.DictReader(results.open(encoding="utf-8")))
    assert len(rows) == 1
    assert tuple(rows[0]) == RESULT_FIELDS
    row = rows[0]
    assert (row["trainee"], row["exercise"], row["correct"], row["readings_used"],
            row["fault"], row["named"], row["seed"]) == ("ana", "bias", "1", "2", "R2:open",
                                                         "R2:open", "5")
    assert float(row["seconds"]) == pytest.approx(42.0)
    assert (row["part_family"], row["mode_class"]) == ("resistor", "open")
    # the points written are the points scored, no wrong naming: TP3 and TP5 cost 1 each
    assert (row["status"], row["wrong_namings"], row["named_wrong"], row["first_wrong_at"],
            row["reading_cost"]) == ("found", "0", "", "", "2")
    assert int(row["points"]) == score.points.total


def test_scripted_drill_wrong_answer_names_telling_readings(engine):
    drill = Drill([Exercise(str(CASE), "R2:open", 5, "a"),
                   Exercise(str(CASE), "Q1:be-short", 6, "b")], lambda p: engine)
    drill.round.read("TP2", "dc")
    naming = drill.name("LS1:open")
    assert not naming.right and naming.score is None  # a wrong naming: the exercise goes on
    with pytest.raises(DiagError):
        drill.next_round()  # not ended yet
    score = drill.reveal()
    assert not score.correct and score.status == REVEALED
    assert [w.fault for w in score.wrong] == ["LS1:open"]
    assert score.telling
    # the readings named as telling are offered ones, and R2 open at the base differs
    offered = set(drill.round.offered())
    assert all((t.point, t.kind) in offered for t in score.telling)
    assert drill.next_round() is not None
    assert drill.round.truth == "Q1:be-short" and drill.index == 1
    with pytest.raises(DiagError):
        drill.next_round()  # not scored yet
    with pytest.raises(DiagError):
        drill.name("R99:open")


def test_same_group_counts_as_right(engine):
    ens = engine.ensemble
    groups = {}
    for h, g in zip(ens.hypotheses, ens.group, strict=True):
        groups.setdefault(int(g), []).append(h.id)
    pair = next(m for m in groups.values() if len(m) >= 2 and "healthy" not in m)
    rnd = Round.start(Exercise(str(CASE), pair[0], 9), engine)
    naming = rnd.name(pair[1])
    assert naming.right and naming.same_group
    score = naming.score
    assert score.correct and score.same_group and not score.wrong


def test_reading_not_offered_is_refused(engine):
    rnd = Round.start(Exercise(str(CASE), "R2:open", 1), engine)
    with pytest.raises(DiagError, match="no ac reading is offered at TP2"):
        rnd.read("TP2", "ac")


def test_fault_family(engine):
    case = engine.case
    assert fault_family(case, "Q1:be-open") == ("junction", "open")
    assert fault_family(case, "Q1:ce-short") == ("junction", "short")
    assert fault_family(case, "R3:high") == ("resistor", "drift")
    assert fault_family(case, "C3:reversed") == ("capacitor", "drift")
    assert fault_family(case, "V1:dead") == ("supply", "open")
    assert fault_family(case, "Q1:ce-short+R4:open") == ("multiple", "multiple")


def test_example_exercises_load_and_run(engine):
    ex = load_exercises(str(ROOT / "examples" / "exercises.yaml"))
    assert len(ex) >= 5
    for e in ex:
        assert Path(e.case).is_file(), e
    first = [e for e in ex if Path(e.case).name == "sounder-driver.yaml"]
    for e in first:
        rnd = Round.start(e, engine)
        assert rnd.truth == (e.fault or rnd.truth)
    assert any(e.fault is None for e in ex)  # one drawn by the priors


def test_bad_exercise_files(tmp_path):
    bad = tmp_path / "ex.yaml"
    bad.write_text("exercises:\n  - {case: sounder-driver, seed: 1}\n"
                   "  - {case: sounder-driver, seed: -3}\n", encoding="utf-8")
    with pytest.raises(DiagError) as exc:
        load_exercises(str(bad))
    assert exc.value.line == 3 and "seed" in str(exc.value)
    bad.write_text("exercises:\n  - {case: sounder-driver, colour: red}\n", encoding="utf-8")
    with pytest.raises(DiagError, match="unknown field 'colour'"):
        load_exercises(str(bad))
    bad.write_text("exercises:\n  - {seed: 2}\n", encoding="utf-8")
    with pytest.raises(DiagError, match="missing `case`"):
        load_exercises(str(bad))
    assert load_exercises(str(bad), default_case=str(CASE))[0].case == str(CASE)
    bad.write_text("drills: []\n", encoding="utf-8")
    with pytest.raises(DiagError, match="exercises"):
        load_exercises(str(bad))


def _row(who, correct, used, advice, family, mode):
    return {"trainee": who, "exercise": "x", "correct": str(correct),
            "readings_used": str(used), "seconds": "10", "case": "c", "fault": "f",
            "seed": "1", "named": "n", "same_group": "0", "advice_readings": str(advice),
            "part_family": family, "mode_class": mode, "finished": ""}


def test_class_summary_says_who_needs_what(tmp_path, capsys):
    path = tmp_path / "class.csv"
    rows = [_row("ana", 0, 3, 3, "junction", "short"), _row("ana", 0, 2, 4, "junction", "open"),
            _row("ana", 1, 3, 3, "resistor", "open"),
            _row("ben", 1, 9, 3, "resistor", "open"), _row("ben", 1, 8, 3, "capacitor", "drift")]
    with path.open("w", encoding="utf-8", newline="") as fh:
        w = csv.DictWriter(fh, fieldnames=RESULT_FIELDS)
        w.writeheader()
        w.writerows(rows)
    people = {t.trainee: t for t in summarise(read_results([str(path)]))}
    ana, ben = people["ana"], people["ben"]
    assert (ana.exercises, ana.correct) == (3, 1)
    assert ana.by_family == {"junction": (2, 2), "resistor": (0, 1)}
    assert ana.needs[0] == "junction faults: missed 2 of 2"
    assert not any("resistor" in n for n in ana.needs)
    assert any(n.startswith("naming too early: 1") for n in ana.needs)
    assert not any("over-reading" in n for n in ana.needs)
    assert ben.correct == 2
    assert ben.needs == ("over-reading: 17 readings where diag's advice needed 6",)
    assert main(["drill", "--summary", str(path)]) == 0
    out = capsys.readouterr().out
    assert "ana" in out and "junction faults: missed 2 of 2" in out
    assert "ben" in out and "over-reading" in out


def test_summary_of_a_bad_file(tmp_path, capsys):
    path = tmp_path / "x.csv"
    path.write_text("who,what\nana,1\n", encoding="utf-8")
    assert main(["drill", "--summary", str(path)]) == 1
    assert "missing column 'trainee'" in capsys.readouterr().err
    with pytest.raises(SystemExit) as exc:
        main(["drill"])
    assert exc.value.code == 2


def test_command_line_builds_the_drill(tmp_path, capsys):
    from diag.cli import build_parser
    from diag.commands.drill import build_drill

    args = build_parser().parse_args(["drill", "sounder-driver", "--fault", "R2:open",
                                      "--seed", "3", "--trainee", "ana", "--hints"])
    d = build_drill(args)
    assert (d.round.truth, d.round.seed, d.trainee, d.hints) == ("R2:open", 3, "ana", True)
    ex = tmp_path / "ex.yaml"
    ex.write_text("exercises:\n  - {fault: R3:open, seed: 1}\n  - {seed: 2}\n",
                  encoding="utf-8")
    args = build_parser().parse_args(["drill", str(CASE), "--exercises", str(ex)])
    d = build_drill(args)
    assert [e.fault for e in d.exercises] == ["R3:open", None]
    assert d.round.truth == "R3:open"
    # a fault the case does not have is a bad input (exit 1), found before the screen
    assert main(["drill", str(CASE), "--fault", "R9:open"]) == 1
    assert "R9" in capsys.readouterr().err


# ---- points, namings, giving up and leaving ----------------------------------------


@pytest.mark.parametrize(("found", "cost", "advice", "wrong", "expected"), [
    # 100 - round(5 x (5 - 2.4)) - 20 x 1 = 100 - 13 - 20
    (True, 5, 2.4, 1, Points(100, -13, -20, 67)),
    # fewer readings than the advice needed: nothing taken off, no bonus either
    (True, 2, 3.0, 0, Points(100, 0, 0, 100)),
    # 5 x (3 - 2.9) = 0.5 rounds up to 1; 5 x (3 - 2.92) = 0.4 rounds down to 0
    (True, 3, 2.9, 0, Points(100, -1, 0, 99)),
    (True, 3, 2.92, 0, Points(100, 0, 0, 100)),
    # 5 x 18 = 90 is held at the 40 limit; two wrong namings 40: 100 - 40 - 40
    (True, 20, 2.0, 2, Points(100, -40, -40, 20)),
    # never below 0
    (True, 20, 2.0, 4, Points(100, -40, -80, 0)),
    # not found: the deductions are worked out but the score is 0
    (False, 6, 2.0, 1, Points(0, -20, -20, 0)),
])
def test_points_worked_by_hand(found, cost, advice, wrong, expected):
    assert work_points(found, cost, advice, wrong) == expected


def _bound_dc_volts(x: float) -> float:
    """handheld-3.5 DC volts (SPEC section 1): ±(0.5 % of reading + 2 counts), 2000
    counts, autoranging over 0.2/2/20/200/1000 V: a count is range/2000 on the smallest
    range that shows the value in 1999 counts or fewer."""
    for rng in (0.2, 2.0, 20.0, 200.0, 1000.0):
        count = rng / 2000
        if round(abs(x) / count) <= 1999:
            return 0.005 * abs(x) + 2 * count
    return float("inf")


def test_wrong_naming_costs_points_and_says_what_it_would_read(engine):
    clock = Clock()
    rnd = Round.start(Exercise(str(CASE), "R2:open", 5), engine, clock=clock)
    taken = [rnd.read("TP3", "dc"), rnd.read("TP5", "dc")]
    wrong = ["R1:open", "healthy"]
    for i, fault in enumerate(wrong):
        naming = rnd.name(fault)
        assert not naming.right and naming.score is None and rnd.score is None
        assert naming.readings == 2 and rnd.namings_left == MAX_NAMINGS - 1 - i
        # a reading speaks against the named fault exactly when it lies outside that
        # fault's band widened by the meter's stated accuracy at each edge (by hand)
        bands = {(b.observable.point, b.observable.kind): b for b in engine.bands(fault)}
        off = set()
        for r in taken:
            b = bands[(r.point, r.kind)]
            if not (b.low - _bound_dc_volts(b.low) <= r.value
                    <= b.high + _bound_dc_volts(b.high)):
                off.add((r.point, r.kind))
        assert {(c.point, c.kind) for c in naming.against} == off
        assert off, fault  # R2 open lifts the base: neither fault explains TP3
        for c in naming.against:
            assert c.measured == rnd.unit[(c.point, c.kind)].value
            assert c.why.startswith(f"{fault} would read ") and "you measured" in c.why
    # R1 open leaves the base with no bias: 0 V at TP3, the meter's 0.0 mV
    r1 = rnd.namings[0].against
    assert r1[0].point == "TP3" and r1[0].why.startswith("R1:open would read 0.0 mV at TP3")
    with pytest.raises(DiagError, match="named R1:open already"):
        rnd.name("R1:open")  # no second charge for the same part
    with pytest.raises(DiagError, match="did you mean R2:open"):
        rnd.name("R22:open")
    rnd.read("TP4", "dc")
    clock.t += 30.0
    score = rnd.name("R2:open").score
    assert score.status == FOUND and score.correct
    assert [w.fault for w in score.wrong] == wrong
    assert score.readings_used == 3 and score.reading_cost == 3.0  # TP3, TP5, TP4: cost 1
    # by hand: 100 - min(40, round(5 x (3 - advice))) - 2 x 20
    extra = max(0.0, 3.0 - score.advice_cost)
    assert score.points.total == max(0, 100 - min(40, int(5 * extra + 0.5)) - 40)
    lines = score.breakdown()
    assert lines[-1] == ("score", score.points.total)
    assert sum(p for _, p in lines[:-1]) == score.points.total
    assert "wrong namings: 2 (R1:open, healthy)" in lines[2][0]
    with pytest.raises(DiagError, match="already scored"):
        rnd.name("R3:open")


def test_namings_run_out(engine):
    rnd = Round.start(Exercise(str(CASE), "R2:open", 5), engine)
    rnd.read("TP3", "dc")
    names = ["R1:open", "R3:open", "LS1:open"][:MAX_NAMINGS]
    for fault in names[:-1]:
        assert rnd.name(fault).score is None
    last = rnd.name(names[-1])
    assert not last.right and last.score is not None
    s = last.score
    assert s.status == NAMINGS_USED_UP and not s.correct and s.points.total == 0
    assert [w.fault for w in s.wrong] == names
    assert s.breakdown()[1][1] is None and s.breakdown()[-1] == ("score", 0)
    with pytest.raises(DiagError):
        rnd.read("TP4", "dc")


def test_giving_up_and_leaving_are_recorded(engine, tmp_path):
    results = tmp_path / "class.csv"
    drill = Drill([Exercise(str(CASE), "R2:open", 5, "one"),
                   Exercise(str(CASE), "Q1:be-short", 6, "two")], lambda p: engine,
                  trainee="bo", results=str(results))
    drill.round.read("TP1", "dc")
    drill.name("C3:short")
    score = drill.reveal()
    assert score.status == REVEALED and score.points.total == 0 and score.named == "C3:short"
    assert drill.reveal() is score  # once
    drill.next_round()
    for p in ("TP2", "TP3", "TP6"):
        drill.round.read(p, "dc")
    left = drill.abandon()
    assert left.status == ABANDONED and left.readings_used == 3 and left.reading_cost == 4.0
    assert drill.abandon() is None  # already ended: nothing more to record
    rows = list(csv.DictReader(results.open(encoding="utf-8")))
    assert [(r["exercise"], r["status"], r["correct"], r["points"], r["readings_used"],
             r["wrong_namings"], r["named_wrong"], r["first_wrong_at"]) for r in rows] == [
        ("one", "revealed", "0", "0", "1", "1", "C3:short", "1"),
        ("two", "abandoned", "0", "0", "3", "0", "", "")]


def test_quitting_the_interface_records_the_running_exercise(engine, tmp_path):
    import io

    from diag.commands.drill import record_left

    results = tmp_path / "class.csv"
    drill = Drill([Exercise(str(CASE), "R2:open", 5, "one")], lambda p: engine,
                  trainee="cy", results=str(results))
    drill.round.read("TP3", "dc")
    out = io.StringIO()
    record_left(drill, out=out)
    assert "recorded as abandoned with 1 reading(s)" in out.getvalue()
    record_left(drill, out=out)  # ended already: no second row
    rows = list(csv.DictReader(results.open(encoding="utf-8")))
    assert [(r["trainee"], r["status"], r["readings_used"]) for r in rows] == \
        [("cy", "abandoned", "1")]


def test_display_text_as_a_3_5_digit_display_shows_it(engine):
    # handheld-3.5 (SPEC section 1): 2000 counts; a range's digits are those of one count,
    # in the range's own prefix (200 mV: 0.1 mV; 2 V: 1 mV; 20 V: 10 mV; 20 mA: 10 µA)
    m = engine.case.meter
    assert display_text(0.0455, "ac", "V", m) == "45.5 mV rms"
    assert display_text(1.483, "dc", "V", m) == "1.483 V"
    assert display_text(8.54, "dc", "V", m) == "8.54 V"
    assert display_text(-0.65, "dc", "V", m) == "-0.650 V"
    assert display_text(0.0, "dc", "V", m) == "0.0 mV"
    assert display_text(123.4, "dc", "V", m) == "123.4 V"
    assert display_text(0.01231, "dc", "A", m) == "12.31 mA"
    assert display_text(0.001075, "dc", "A", m) == "1.075 mA"
    assert display_text(0.0771, "dc", "A", m) == "77.1 mA"
    assert display_text(float("inf"), "dc", "V", m) == "OL"


def test_close_names_for_a_typed_slip():
    ids = ["healthy", "R2:open", "R2:short", "R9:open", "Q1:be-short", "Q1:bc-short",
           "Q1:ce-short", "LS1:open"]
    assert close_names("R99:open", ids)[0] == "R9:open"
    assert close_names("Q1:be-shrt", ids)[0] == "Q1:be-short"
    assert close_names("helthy", ids)[0] == "healthy"
    assert close_names("LS:open", ids)[0] == "LS1:open"
    assert close_names("zzzz", ids) == []
    assert close_names("", ids) == []
    assert len(close_names("R2:opn", ids, n=2)) == 2


def _result(who, correct, used, advice, family, mode, status, points, first_wrong=""):
    return {"trainee": who, "exercise": "x", "correct": str(correct),
            "readings_used": str(used), "seconds": "10", "case": "c", "fault": "f",
            "seed": "1", "named": "n", "same_group": "0", "advice_readings": str(advice),
            "part_family": family, "mode_class": mode, "finished": "", "status": status,
            "points": str(points), "wrong_namings": "1" if first_wrong != "" else "0",
            "named_wrong": "", "first_wrong_at": str(first_wrong), "reading_cost": str(used),
            "advice_cost": str(advice)}


def test_class_summary_with_points_and_left_exercises(tmp_path, capsys):
    path = tmp_path / "class.csv"
    rows = [_result("cy", 1, 5, 3, "junction", "short", "found", 67, first_wrong=1),
            _result("cy", 0, 1, 2, "resistor", "open", "abandoned", 0),
            _result("cy", 0, 4, 2, "capacitor", "drift", "revealed", 0)]
    with path.open("w", encoding="utf-8", newline="") as fh:
        w = csv.DictWriter(fh, fieldnames=RESULT_FIELDS)
        w.writeheader()
        w.writerows(rows)
    (cy,) = summarise(read_results([str(path)]))
    assert (cy.exercises, cy.correct, cy.left) == (3, 1, 1)
    # the exercise left is no miss of a resistor fault; the one given up is a miss
    assert cy.by_family == {"junction": (0, 1), "capacitor": (1, 1)}
    assert cy.points == pytest.approx((67 + 0 + 0) / 3)
    # a first wrong naming on 1 reading where the advice needed 3
    assert cy.early_misses == 1
    # 5 + 4 readings against 3 + 2 advised: 9 > 1.5 x 5
    assert cy.needs == ("capacitor faults: missed 1 of 1", "drift faults: missed 1 of 1",
                        "over-reading: 9 readings where diag's advice needed 5",
                        cy.needs[3], "left 1 exercise(s) before naming a fault")
    assert cy.needs[3].startswith("naming too early: 1 ")
    assert main(["drill", "--summary", str(path)]) == 0
    out = capsys.readouterr().out
    assert "    22  " in out  # the mean points, 67 / 3


def test_drill_without_a_terminal_exits_2_and_points_to_simulate(tmp_path):
    import os
    import subprocess
    import sys

    env = dict(os.environ, DIAG_HOME=str(tmp_path))
    cmd = [sys.executable, "-m", "diag", "drill", str(CASE), "--seed", "3"]
    done = subprocess.run(cmd, stdin=subprocess.DEVNULL, capture_output=True, text=True,
                          env=env, timeout=120)
    assert done.returncode == 2, done.stderr
    assert "needs a terminal" in done.stderr and "diag simulate" in done.stderr
    assert done.stdout == ""  # no screen drawn into the pipe
    # a bad fault id is still reported as bad input first
    done = subprocess.run(cmd + ["--fault", "R9:open"], stdin=subprocess.DEVNULL,
                          capture_output=True, text=True, env=env, timeout=120)
    assert done.returncode == 1 and "R9" in done.stderr
