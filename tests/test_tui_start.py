"""Pilot tests of the start: the first-start cautions and their marker, the case picker
(bundled and user cases with a preview, any path typed, a broken case refused), and the
app hosting the drill and batch screens."""

from __future__ import annotations

import shutil

from textual.widgets import DataTable, Input
from tui_support import (  # noqa: F401
    CASES,
    fixture_diag_home,
    fixture_shared_cache,
    settle,
    sync,
)

from diag.core import paths
from diag.core.case import load_case
from diag.core.rules import load_rules
from diag.core.session import load_cautions
from diag.tui.app import MARKER, DiagApp, first_start
from diag.tui.cautions_screen import CautionsScreen
from diag.tui.picker_screen import PickerScreen
from diag.tui.session_screen import SessionScreen


@sync
async def test_first_start_shows_cautions_once(diag_home):
    (paths.state_dir() / MARKER).unlink()
    assert first_start()
    app = DiagApp()
    async with app.run_test(size=(120, 40)) as pilot:
        await settle(pilot)
        screen = app.screen
        assert isinstance(screen, CautionsScreen) and screen.first_start
        shown = " ".join(str(s.content) for s in screen.query(".caution"))
        cautions, defer = load_cautions(load_rules())
        for c in cautions:
            assert c.title in shown
        assert str(screen.query_one(".caution-defer").content).startswith(defer[:30])
        await pilot.press("enter")
        await settle(pilot)
        assert isinstance(app.screen, PickerScreen)
    assert not first_start()
    app2 = DiagApp()
    async with app2.run_test(size=(120, 40)) as pilot:
        await settle(pilot)
        assert isinstance(app2.screen, PickerScreen)


@sync
async def test_picker_lists_bundled_and_user_cases_with_preview(diag_home):
    mine = paths.user_cases_dir() / "my-own-stage.yaml"
    shutil.copy(CASES[-1], mine)
    broken = paths.user_cases_dir() / "zz-broken.yaml"
    broken.write_text("case: 1\ntitle: broken\nparts: {R1: {kind: resistor}}\n",
                      encoding="utf-8")
    app = DiagApp()
    async with app.run_test(size=(120, 40)) as pilot:
        await settle(pilot)
        picker = app.screen
        assert isinstance(picker, PickerScreen)
        table = picker.query_one("#case-list", DataTable)
        listed = [str(k.value) for k in table.rows]
        assert listed == [str(p) for p in CASES] + [str(mine), str(broken)]
        first = load_case(str(CASES[0]))
        preview = str(picker.query_one("#preview").content)
        assert first.title in preview
        assert f"{len(first.parts)} parts · {len(first.points)} test points" in preview
        assert first.about.split()[0] in preview
        # the last row: a broken user case shows its problems and does not open
        table.move_cursor(row=len(listed) - 1)
        await settle(pilot)
        assert "problems" in str(picker.query_one("#preview").content)
        await pilot.press("enter")
        await settle(pilot)
        assert app.screen is picker
        # the user's own case opens
        table.move_cursor(row=len(listed) - 2)
        await pilot.press("enter")
        await settle(pilot)
        assert isinstance(app.screen, SessionScreen)
        assert app.screen.case.path == str(mine)


@sync
async def test_picker_opens_any_typed_path(diag_home, tmp_path):
    elsewhere = tmp_path / "bench" / "amp.yaml"
    elsewhere.parent.mkdir()
    shutil.copy(CASES[0], elsewhere)
    app = DiagApp()
    async with app.run_test(size=(120, 40)) as pilot:
        await settle(pilot)
        await pilot.press("slash")
        field = app.screen.focused
        assert isinstance(field, Input)
        await pilot.press("full_stop", "backspace")      # typing reaches the field
        field.value = str(elsewhere)
        await pilot.press("enter")
        await settle(pilot)
        assert isinstance(app.screen, SessionScreen)
        assert app.screen.case.path == str(elsewhere)
        # ctrl+o goes back to the cases
        await pilot.press("ctrl+o")
        await settle(pilot)
        assert isinstance(app.screen, PickerScreen)


@sync
async def test_case_path_given_opens_its_session(diag_home):
    app = DiagApp(case_path=str(CASES[1]))
    async with app.run_test(size=(80, 24)) as pilot:
        await settle(pilot)
        assert isinstance(app.screen, SessionScreen)
        assert app.screen.ready
        assert "-narrow" in app.screen.classes


@sync
async def test_app_hosts_drill_and_batch_screens(diag_home):
    import numpy as np

    from diag.core.drill import Drill, Exercise
    from diag.core.engine import Engine
    from diag.core.triage import triage
    from diag.tui.batch_screen import BatchScreen
    from diag.tui.drill_screen import DrillScreen

    case = load_case(str(CASES[0]))
    engine = Engine(case)
    engine.build()
    fault = next(h.id for h in engine.ensemble.hypotheses if h.id != "healthy")
    drill = Drill([Exercise(str(CASES[0]), fault, 1)], lambda path: engine)
    app = DiagApp(drill=drill)
    async with app.run_test(size=(120, 40)) as pilot:
        await settle(pilot)
        assert isinstance(app.screen, DrillScreen)

    units = {"U1": engine.simulate(fault, np.random.default_rng(2)),
             "U2": engine.simulate("healthy", np.random.default_rng(4))}
    result = triage(engine, units)
    app = DiagApp(batch=result)
    async with app.run_test(size=(120, 40)) as pilot:
        await settle(pilot)
        assert isinstance(app.screen, BatchScreen)


def test_every_binding_has_an_id_and_a_description():
    from diag.tui import (
        cautions_screen,
        detail_screen,
        export_dialog,
        help_screen,
        node_screen,
        notes_dialog,
        picker_screen,
        resume_dialog,
        session_screen,
    )

    owners = [DiagApp, cautions_screen.CautionsScreen, detail_screen.SuspectDetailScreen,
              export_dialog.ExportDialog, help_screen.HelpScreen, node_screen.NodeScreen,
              notes_dialog.NotesDialog, picker_screen.PickerScreen,
              resume_dialog.ResumeDialog, session_screen.SessionScreen]
    ids = []
    for owner in owners:
        assert owner.BINDINGS, owner
        for b in owner.BINDINGS:
            assert b.id and b.description, (owner.__name__, b)
            ids.append(b.id)
    assert len(ids) == len(set(ids))                     # ids are unique


@sync
async def test_palette_offers_every_action_that_applies(diag_home):
    app = DiagApp(case_path=str(CASES[0]))
    async with app.run_test(size=(120, 40)) as pilot:
        await settle(pilot)
        screen = app.screen
        assert isinstance(screen, SessionScreen)
        titles = {c.title for c in app.get_system_commands(screen)}
        for active in screen.active_bindings.values():
            if active.enabled and active.binding.description:
                assert active.binding.description in titles, active.binding


def test_diag_open_refuses_bad_files_before_the_interface(tmp_path, capsys, diag_home):
    from diag.cli import main

    assert main(["open", str(tmp_path / "missing.yaml")]) == 1
    assert "missing.yaml" in capsys.readouterr().err
    bad = tmp_path / "bad.json"
    bad.write_text("{}", encoding="utf-8")
    assert main(["open", str(CASES[0]), "--session", str(bad)]) == 1
    err = capsys.readouterr().err
    assert "bad.json" in err and "not a diag session" in err
