"""Pilot tests of the drill screen (a scripted drill: reading, naming, scoring) and of the
batch screen (browse a triaged batch, open one unit in a session screen)."""

from __future__ import annotations

import csv
from pathlib import Path

import numpy as np
import pytest
from textual.widgets import DataTable, Input, Static
from tui_support import (  # noqa: F401
    diag_home,
    settle,
    shared_cache,
    sync,
)

from diag.core.case import load_case
from diag.core.drill import Drill, Exercise
from diag.core.engine import Engine
from diag.core.rules import load_rules
from diag.core.triage import triage
from diag.tui.app import DiagApp
from diag.tui.batch_screen import BatchScreen, UnitOpened
from diag.tui.drill_screen import (
    ConfirmDialog,
    DrillNamed,
    DrillReadingTaken,
    DrillScored,
    DrillScreen,
    NameFaultDialog,
)
from diag.tui.suspects_table import SuspectsTable

ROOT = Path(__file__).resolve().parents[1]
CASE = ROOT / "cases" / "sounder-driver.yaml"


@pytest.fixture
def engine(diag_home) -> Engine:  # noqa: F811  (the fixture of tui_support)
    eng = Engine(load_case(str(CASE)), load_rules())
    eng.build()
    return eng


def _drill(engine, hints=False, results=None, n=1):
    ex = [Exercise(str(CASE), "R2:open", 5, "bias"),
          Exercise(str(CASE), "Q1:be-short", 6, "junction")][:n]
    return Drill(ex, lambda p: engine, trainee="ana", hints=hints, results=results)


def _class_drill(engine, tmp_path):
    """(results file, drill writing to it, the app on it) for one exercise."""
    results = tmp_path / "class.csv"
    drill = _drill(engine, results=str(results))
    return results, drill, DiagApp(drill=drill)


def _once(seen, kind) -> list:
    """Messages of a type, each once (a message bubbling from the screen to the app
    reaches the hook at both)."""
    out = {}
    for m in seen:
        if isinstance(m, kind):
            out[id(m)] = m
    return list(out.values())


def _text(screen, selector: str) -> str:
    """The text a Static shows (its markup rendered, styles dropped)."""
    from textual.content import Content

    return Content.from_markup(str(screen.query_one(selector, Static).content)).plain


def _shows(screen, point, kind) -> str:
    table = screen.query_one("#drill-points", DataTable)
    return str(table.get_cell(f"{point}|{kind}", "shows"))


async def _open_naming(pilot) -> NameFaultDialog:
    """Press n on the drill screen; the naming dialog that opens."""
    await pilot.press("n")
    await pilot.pause()
    dialog = pilot.app.screen
    assert isinstance(dialog, NameFaultDialog)
    return dialog


async def _name(pilot, text: str) -> None:
    dialog = await _open_naming(pilot)
    dialog.query_one("#name-input", Input).value = text
    await pilot.pause()
    await pilot.press("enter")
    await settle(pilot)


@sync
async def test_scripted_drill_reading_naming_scoring(engine, tmp_path):
    results, drill, app = _class_drill(engine, tmp_path)
    seen = []
    async with app.run_test(size=(120, 40), message_hook=seen.append) as pilot:
        await settle(pilot)
        screen = app.screen
        assert isinstance(screen, DrillScreen)
        # no ranking while the drill runs (hints are off)
        assert not screen.query(SuspectsTable)
        assert screen.query_one("#drill-hidden", Static)
        table = screen.query_one("#drill-points", DataTable)
        obs = engine.case.observables
        target = next(i for i, o in enumerate(obs) if (o.point, o.kind) == ("TP3", "dc"))
        table.move_cursor(row=target, animate=False)
        await pilot.press("enter")
        await settle(pilot)
        taken = _once(seen, DrillReadingTaken)
        assert [(m.reading.point, m.reading.kind) for m in taken] == [("TP3", "dc")]
        assert taken[0].reading.value == drill.round.unit[("TP3", "dc")].value
        assert _shows(screen, "TP3", "dc").endswith("V")
        assert _shows(screen, "TP2", "dc") == ""
        await _name(pilot, "R2:open")
        scored = _once(seen, DrillScored)
        assert len(scored) == 1 and scored[0].score.correct
        text = str(screen.query_one("#drill-score", Static).content)
        assert "Right." in text and "readings: 1 taken" in text
        # scored: the read and name actions no longer apply
        assert not screen.check_action("read", ())
        assert not screen.check_action("name", ())
        assert not screen.check_action("reveal", ())
    rows = list(csv.DictReader(results.open(encoding="utf-8")))
    assert [(r["trainee"], r["fault"], r["named"], r["correct"], r["readings_used"])
            for r in rows] == [("ana", "R2:open", "R2:open", "1", "1")]
    # the score on screen is the one written to the results file
    assert f"Score {rows[0]['points']} / 100" in text


@sync
async def test_drill_with_hints_and_next_exercise(engine):
    drill = _drill(engine, hints=True, n=2)
    app = DiagApp(drill=drill)
    async with app.run_test(size=(120, 40)) as pilot:
        await settle(pilot)
        screen = app.screen
        hints = screen.query_one("#drill-hints", SuspectsTable)
        assert hints.row_count > 0  # the prior ranking before any reading
        screen.take("TP3", "dc")
        screen.take("TP5", "dc")
        await settle(pilot)
        d = engine.diagnose(drill.round.taken)
        assert hints.selected_fault() is not None
        assert [s.fault for s in hints.suspects] == [s.fault for s in d.suspects[:hints.limit]]
        assert not screen.check_action("next", ())
        await _name(pilot, "C3:short")
        # a wrong naming costs points; the exercise goes on
        assert drill.round.score is None and [n.fault for n in drill.round.wrong] == \
            ["C3:short"]
        assert "Not C3:short." in _text(screen, "#drill-feedback")
        assert not screen.check_action("next", ())
        await pilot.press("r")  # give up: asks first
        await pilot.pause()
        assert isinstance(app.screen, ConfirmDialog)
        await pilot.press("y")
        await settle(pilot)
        assert drill.round.score is not None and not drill.round.score.correct
        text = _text(screen, "#drill-score")
        assert "Given up." in text and "R2:open" in text and "Score 0 / 100" in text
        assert screen.check_action("next", ())
        await pilot.press("x")
        await settle(pilot)
        assert drill.index == 1 and drill.round.truth == "Q1:be-short"
        title = str(screen.query_one("#drill-title", Static).content)
        assert "exercise 2 of 2" in title
        assert _shows(screen, "TP3", "dc") == ""


@sync
async def test_name_dialog_filters_and_cancels(engine):
    drill = _drill(engine)
    app = DiagApp(drill=drill)
    async with app.run_test(size=(120, 40)) as pilot:
        await settle(pilot)
        dialog = await _open_naming(pilot)
        from textual.widgets import OptionList

        ol = dialog.query_one("#name-options", OptionList)
        assert ol.option_count == len(engine.ensemble.hypotheses)
        dialog.query_one("#name-input", Input).value = "Q1:"
        await pilot.pause()
        assert 0 < ol.option_count < len(engine.ensemble.hypotheses)
        assert all("Q1" in str(ol.get_option_at_index(i).id) for i in range(ol.option_count))
        await pilot.press("escape")
        await pilot.pause()
        assert isinstance(app.screen, DrillScreen)
        assert drill.round.score is None


@sync
async def test_batch_screen_browses_and_opens_a_unit(engine):
    from diag.tui.session_screen import SessionScreen

    rng = np.random.default_rng(8)
    units = {f"B{i}": list(engine.simulate(f, rng))
             for i, f in enumerate(["R2:open", "healthy", "R3:open", "Q1:be-open"])}
    units["B2"] = units["B2"][:-1]
    res = triage(engine, units)
    seen = []
    app = DiagApp(batch=res)
    async with app.run_test(size=(120, 40), message_hook=seen.append) as pilot:
        await settle(pilot)
        screen = app.screen
        assert isinstance(screen, BatchScreen)
        table = screen.query_one("#batch-units", DataTable)
        assert table.row_count == 4
        assert "4 units" in str(screen.query_one("#batch-summary", Static).content)
        await pilot.press("f")  # filter: units with a fault found
        assert screen.filter == "fault"
        assert table.row_count == sum(u.status == "fault" for u in res.units)
        await pilot.press("f")  # filter: undecided (no fault more likely than not)
        assert screen.filter == "undecided"
        assert table.row_count == sum(u.status == "undecided" for u in res.units)
        for _ in range(3):
            await pilot.press("f")
        assert screen.filter == "incomplete" and table.row_count == 1
        await pilot.press("enter")
        await settle(pilot)
        assert [m.unit for m in _once(seen, UnitOpened)] == ["B2"]
        session = app.screen
        assert isinstance(session, SessionScreen)
        assert [(r.point, r.kind, r.value) for r in session.session.readings] == \
            [(r.point, r.kind, r.value) for r in units["B2"]]


def _move_to(screen, point, kind) -> None:
    table = screen.query_one("#drill-points", DataTable)
    table.move_cursor(row=table.get_row_index(f"{point}|{kind}"), animate=False)


@sync
async def test_a_reading_is_quoted_as_the_meter_shows_it(engine):
    drill = _drill(engine)
    seen = []
    app = DiagApp(drill=drill)
    async with app.run_test(size=(120, 36), message_hook=seen.append) as pilot:
        await settle(pilot)
        screen = app.screen
        _move_to(screen, "TP1", "dc")
        await pilot.press("enter")
        await settle(pilot)
        (taken,) = _once(seen, DrillReadingTaken)
        amps = drill.round.unit[("TP1", "dc")].value
        # supply current on a 2000-count meter: between 20 and 200 mA it autoranges to
        # 200 mA, one count 0.1 mA, so it shows one decimal in mA
        assert 0.02 <= amps < 0.2
        assert taken.shown == f"{amps * 1e3:.1f} mA"
        feedback = _text(screen, "#drill-feedback")
        assert f"Reading 1: TP1 dc (bench supply's ammeter, 12 V lead to the sounder " \
               f"board): the meter shows {taken.shown}." in feedback
        assert _shows(screen, "TP1", "dc") == taken.shown
        sheet = screen.query_one("#drill-sheet", DataTable)
        assert [str(c) for c in sheet.get_row_at(0)] == ["1", "TP1", "dc", taken.shown]
        assert "readings 1 · wrong namings 0" in _text(screen, "#drill-tally")
        await pilot.press("enter")  # the same reading again: quoted, not counted
        await settle(pilot)
        assert "was taken already" in _text(screen, "#drill-feedback")
        assert sheet.row_count == 1 and len(drill.round.taken) == 1
        screen.take("TP6", "dc")  # the speaker tag costs 2 (the case says so)
        await settle(pilot)
        assert sheet.row_count == 2
        assert "readings 2 (cost 3)" in _text(screen, "#drill-tally")


@sync
async def test_name_dialog_says_when_nothing_matches(engine):
    drill = _drill(engine)
    app = DiagApp(drill=drill)
    async with app.run_test(size=(120, 36)) as pilot:
        await settle(pilot)
        dialog = await _open_naming(pilot)
        field = dialog.query_one("#name-input", Input)
        await pilot.press("enter")  # nothing typed: nothing named
        await pilot.pause()
        assert app.screen is dialog and not drill.round.namings
        field.value = "R22:open"
        await pilot.pause()
        text = _text(dialog, "#name-note")
        assert "Nothing matches" in text and "R2:open" in text
        await pilot.press("enter")
        await pilot.pause()
        assert app.screen is dialog and not drill.round.namings
        assert "Nothing matches" in _text(dialog, "#name-note")
        field.value = "Q1"
        await pilot.pause()
        assert "faults match" in _text(dialog, "#name-note")
        await pilot.press("enter")  # several match: none is picked for the trainee
        await pilot.pause()
        assert app.screen is dialog and not drill.round.namings
        field.value = "speaker open"  # words of the description: one fault left
        await pilot.pause()
        assert "Enter names LS1:open" in _text(dialog, "#name-note")
        await pilot.press("enter")
        await settle(pilot)
        assert [n.fault for n in drill.round.namings] == ["LS1:open"]
        # a fault named wrongly cannot be named again (and is not charged twice)
        dialog = await _open_naming(pilot)
        from textual.widgets import OptionList

        ol = dialog.query_one("#name-options", OptionList)
        assert ol.get_option("LS1:open").disabled
        dialog.query_one("#name-input", Input).value = "ls1:OPEN"
        await pilot.pause()
        await pilot.press("enter")
        await pilot.pause()
        assert app.screen is dialog
        assert "named LS1:open already" in _text(dialog, "#name-note")
        await pilot.press("escape")
        await pilot.pause()
        assert len(drill.round.namings) == 1 and drill.round.score is None


@sync
async def test_wrong_naming_costs_points_then_the_right_one_scores(engine, tmp_path):
    results, drill, app = _class_drill(engine, tmp_path)
    seen = []
    async with app.run_test(size=(120, 36), message_hook=seen.append) as pilot:
        await settle(pilot)
        screen = app.screen
        screen.take("TP3", "dc")
        await _name(pilot, "R1:open")
        (named,) = _once(seen, DrillNamed)
        n = named.naming
        assert not n.right and n.score is None and n.against
        feedback = _text(screen, "#drill-feedback")
        assert "Not R1:open." in feedback and "−20 points" in feedback
        # what R1 open would read against what was measured, as the meter shows both
        shown = drill.round.shown(drill.round.taken[0])
        assert f"R1:open would read 0.0 mV at TP3 dc; you measured {shown}" in feedback
        assert "2 namings left" in feedback
        tally = _text(screen, "#drill-tally")
        assert "wrong namings 1 (−20) · namings left 2" in tally
        assert screen.check_action("read", ()) and screen.check_action("name", ())
        screen.take("TP4", "dc")
        await _name(pilot, "R2:open")
        scored = _once(seen, DrillScored)
        assert len(scored) == 1
        s = scored[0].score
        assert s.correct and [w.fault for w in s.wrong] == ["R1:open"]
        text = _text(screen, "#drill-score")
        assert f"Score {s.points.total} / 100" in text
        assert "−20  wrong namings: 1 (R1:open)" in text
        assert "readings: 2 taken" in text
        assert f"Exercise over: score {s.points.total} / 100" in _text(screen, "#drill-tally")
    rows = list(csv.DictReader(results.open(encoding="utf-8")))
    assert [(r["status"], r["points"], r["wrong_namings"], r["named_wrong"],
             r["first_wrong_at"]) for r in rows] == \
        [("found", str(s.points.total), "1", "R1:open", "1")]


async def _one_reading_then(pilot, key: str) -> tuple[DrillScreen, str]:
    """Take TP3 on the drill screen, press `key`; the drill screen and the question of
    the confirmation dialog that opens."""
    await settle(pilot)
    screen = pilot.app.screen
    screen.take("TP3", "dc")
    await pilot.press(key)
    await pilot.pause()
    dialog = pilot.app.screen
    assert isinstance(dialog, ConfirmDialog)
    return screen, str(dialog.query_one("#confirm-text", Static).content)


@sync
async def test_leaving_mid_exercise_asks_and_records_it(engine, tmp_path):
    results, drill, app = _class_drill(engine, tmp_path)
    async with app.run_test(size=(120, 36)) as pilot:
        screen, question = await _one_reading_then(pilot, "escape")
        assert "recorded as abandoned" in question and "1 reading(s)" in question
        await pilot.press("n")  # stay
        await pilot.pause()
        assert app.screen is screen and drill.round.score is None
        assert not results.exists()
        await pilot.press("escape")
        await pilot.pause()
        await pilot.press("y")
        await settle(pilot)
        assert drill.round.score is not None
    rows = list(csv.DictReader(results.open(encoding="utf-8")))
    assert [(r["status"], r["readings_used"], r["points"], r["correct"]) for r in rows] == \
        [("abandoned", "1", "0", "0")]


@sync
async def test_ctrl_q_mid_exercise_asks_first(engine):
    """Ctrl+Q over an unended exercise asks as leaving does (n stays, Ctrl+Q again
    quits); once the only exercise has ended it quits at once."""
    drill = _drill(engine)
    app = DiagApp(drill=drill)
    async with app.run_test(size=(120, 36)) as pilot:
        screen, question = await _one_reading_then(pilot, "ctrl+q")
        assert app.return_code is None
        assert "recorded as abandoned" in question and "Ctrl+Q again quits" in question
        await pilot.press("n")
        await pilot.pause()
        assert app.screen is screen and app.return_code is None
        await pilot.press("ctrl+q")
        await pilot.pause()
        await pilot.press("ctrl+q")
        await pilot.pause()
        assert app.return_code == 0 and drill.round.score is None  # the command records it
    drill = _drill(engine)
    app = DiagApp(drill=drill)
    async with app.run_test(size=(120, 36)) as pilot:
        await settle(pilot)
        drill.round.abandon()                 # ended: nothing left to lose
        await pilot.press("ctrl+q")
        await pilot.pause()
        assert app.return_code == 0


def test_drill_bindings_have_ids_and_descriptions():
    owners = [DiagApp, DrillScreen, NameFaultDialog, ConfirmDialog]
    ids = []
    for owner in owners:
        for b in owner.BINDINGS:
            assert b.id and b.description, (owner.__name__, b)
            ids.append(b.id)
    assert len(ids) == len(set(ids))
