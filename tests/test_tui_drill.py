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


def _once(seen, kind) -> list:
    """Messages of a type, each once (a message bubbling from the screen to the app
    reaches the hook at both)."""
    out = {}
    for m in seen:
        if isinstance(m, kind):
            out[id(m)] = m
    return list(out.values())


def _shows(screen, point, kind) -> str:
    table = screen.query_one("#drill-points", DataTable)
    return str(table.get_cell(f"{point}|{kind}", "shows"))


async def _name(pilot, text: str) -> None:
    await pilot.press("n")
    await pilot.pause()
    dialog = pilot.app.screen
    assert isinstance(dialog, NameFaultDialog)
    dialog.query_one("#name-input", Input).value = text
    await pilot.pause()
    await pilot.press("enter")
    await settle(pilot)


@sync
async def test_scripted_drill_reading_naming_scoring(engine, tmp_path):
    results = tmp_path / "class.csv"
    drill = _drill(engine, results=str(results))
    seen = []
    app = DiagApp(drill=drill)
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
        assert "Right." in text and "you used 1" in text
        # scored: the read and name actions no longer apply
        assert not screen.check_action("read", ())
        assert not screen.check_action("name", ())
    rows = list(csv.DictReader(results.open(encoding="utf-8")))
    assert [(r["trainee"], r["fault"], r["named"], r["correct"], r["readings_used"])
            for r in rows] == [("ana", "R2:open", "R2:open", "1", "1")]


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
        assert drill.round.score is not None and not drill.round.score.correct
        text = str(screen.query_one("#drill-score", Static).content)
        assert "Not this one." in text and "R2:open" in text
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
        await pilot.press("n")
        await pilot.pause()
        dialog = app.screen
        assert isinstance(dialog, NameFaultDialog)
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
