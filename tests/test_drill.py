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
    P_DONE,
    RESULT_FIELDS,
    Drill,
    Exercise,
    Round,
    draw_unit,
    fault_family,
    follow_advice,
    load_exercises,
    pick_fault,
    read_results,
    summarise,
)
from diag.core.engine import Engine
from diag.core.errors import DiagError
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
    score = drill.name("R2:open")
    assert score.correct and not score.same_group
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


def test_scripted_drill_wrong_answer_names_telling_readings(engine):
    drill = Drill([Exercise(str(CASE), "R2:open", 5, "a"),
                   Exercise(str(CASE), "Q1:be-short", 6, "b")], lambda p: engine)
    drill.round.read("TP2", "dc")
    score = drill.name("LS1:open")
    assert not score.correct
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
    score = rnd.name(pair[1])
    assert score.correct and score.same_group


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
