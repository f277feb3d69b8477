"""The bench session screen: test points and readings, the live ranking of suspects, the
next reading to take, bench notes and the `fits` warning.

CONSTRUCTOR (stable; diag.tui.batch_screen and the app use it):

    SessionScreen(engine, readings=(), *, session=None, label=None)

    engine    a diag.core.engine.Engine for the case (`engine.case` is the loaded Case).
              Its predictions are built here in a thread worker if not built yet; the
              screen stays responsive and shows the progress. The ranking starts once
              the ensemble is built; the further units of every hypothesis follow in the
              background ("refining predictions").
    readings  Reading objects to start from (for example one unit of a triage batch);
              ignored when `session` is given.
    session   a diag.core.session.Session to resume (readings, undo history, notes).
    label     kept in the autosave file name (a batch unit id), so that a unit opened
              from a batch does not overwrite the bench session of the case.

Every accepted reading is autosaved at once (atomic write) and the ranking is redone in a
thread worker; stale results (an older reading set) are dropped.

Values are typed in place on the points table (a digit starts the entry) or in the entry
field (e); either way enter records the value and moves to the next row, the field's text
is handled key by key in the order typed (a burst of values and enters lands row by row),
and a pasted column of values is entered row by row.
"""

from __future__ import annotations

import re
from pathlib import Path

from textual import on, work
from textual.app import ComposeResult
from textual.binding import Binding
from textual.containers import Horizontal, Vertical
from textual.events import Key
from textual.screen import Screen
from textual.widgets import DataTable, Footer, Input, Label, ProgressBar, Static
from textual.worker import get_current_worker

from diag.core.engine import Band, Diagnosis, Engine, Reading
from diag.core.errors import DiagError
from diag.core.session import Session, new_session, report_name
from diag.tui.advice_panel import BenchNotesPanel, NextReadingPanel
from diag.tui.entry_field import EntryField
from diag.tui.fit_banner import FitBanner
from diag.tui.fmt import esc
from diag.tui.messages import (
    EnsembleBuilt,
    EnsembleFailed,
    EnsembleProgressed,
    PredictionsRefined,
    RankingUpdated,
    ReadingEntered,
    ReadingRejected,
)
from diag.tui.points_table import PointsTable, row_key
from diag.tui.suspects_table import SuspectsTable

_TYPING = set("0123456789.-+O")  # "O": a meter's over-range "OL", typed as shown
# Hypotheses whose further units one background step solves (Engine.build_further): a
# reading typed meanwhile waits for one step at most (measured in bench/tui_bench.py)
REFINE_STEP = 4


class SessionScreen(Screen[None]):
    HORIZONTAL_BREAKPOINTS = [(0, "-narrow"), (110, "-wide")]
    # what the columns and marks mean, shown under the keys by help (?)
    HELP_WORDS = (
        ("healthy", "the band (about 1st to 99th percentile) a good unit reads, parts "
                    "anywhere in tolerance, as this meter reads it (`diag check` prints "
                    "the same)"),
        ("off healthy", "how far the reading sits above (▲) or below (▼) that band"),
        ("→", "the advised next reading; g moves the cursor to it"),
        ("p, posterior", "how likely each suspect is, given the readings taken and how "
                         "often each part fails; the rows, healthy included, add up to "
                         "100 %"),
        ("grp, ≡", "suspects with the same group number read alike at every point this "
                   "case offers; ≡ marks a group of two or more, which only a bench check "
                   "(d) or another kind of reading can split"),
        ("bits", "what the next reading is expected to tell: 1 bit halves the doubt "
                 "between suspects, under 0.01 bits tells almost nothing"),
        ("typing a reading", "a digit on a row starts its value (e opens the field with "
                             "the value taken); enter records it and moves to the next "
                             "row, so values typed one after another land row by row; a "
                             "column pasted from a sheet goes in the same way; in the "
                             "field, up and down move, esc goes back to the table"),
        ("refining predictions", "the first time a case is opened, more drawn units of "
                                 "every suspect are solved after the ranking shows and "
                                 "kept for next time; a reading typed meanwhile goes "
                                 "first, and the ranking is the same either way"),
    )

    BINDINGS = [
        Binding("e", "enter_reading", "Type reading", id="session.enter"),
        Binding("x,delete", "clear_reading", "Clear reading", id="session.clear"),
        Binding("u,ctrl+z", "undo", "Undo", id="session.undo"),
        Binding("g", "goto_next", "Go to next", id="session.goto_next"),
        Binding("d", "detail", "Suspect detail", id="session.detail"),
        Binding("n", "node", "Around node", id="session.node"),
        Binding("o", "notes", "Notes", id="session.notes"),
        Binding("w", "export", "Write report", id="session.export"),
        # hinted in the bench-notes panel itself; listed in help (?)
        Binding("b", "bench_notes", "Bench notes in full", id="session.bench_notes",
                show=False),
        Binding("s", "focus_suspects", "Suspects", id="session.suspects"),
        Binding("p", "focus_points", "Points", id="session.points"),
        Binding("escape", "leave_entry", "Back to table", id="session.leave_entry", show=False),
    ]

    def __init__(self, engine: Engine, readings=(), *, session: Session | None = None,
                 label: str | None = None) -> None:
        super().__init__()
        self.engine = engine
        self.case = engine.case
        self.label = label
        self.session = session if session is not None else new_session(
            self.case, readings, label=label)
        self.bands: dict[tuple[str, str], Band] | None = None
        self.diagnosis: Diagnosis | None = None
        self.ready = False
        self.serial = 0
        self.shown_serial = -1
        self._awaiting_advice = False  # the ranking on screen still waits for its advice
        self.last_error = ""
        self._typing = False  # a value is being typed in place on the points table
        self._typing_row = -1
        self._refused_text = False  # the field shows a value just refused
        self._refusal = ""  # what the message line said of it
        self._binding_state: tuple = ()

    # ------------------------------------------------------------------ layout

    def compose(self) -> ComposeResult:
        n_parts, n_points = len(self.case.parts), len(self.case.points)
        yield Static(f"[b]diag bench[/b] · {esc(self.case.title)} "
                     f"[dim]({n_parts} parts, {n_points} points)[/dim]", id="title-bar")
        yield FitBanner(id="fit-banner")
        with Horizontal(id="body"):
            with Vertical(id="left"):
                yield PointsTable(self.case, typed=self._typed, pasted=self._pasted,
                                  id="points")
                with Horizontal(id="entry-row"):
                    yield Label("", id="entry-label")
                    yield EntryField(self._submit, self._step, self.action_leave_entry,
                                     self._pasted,
                                     placeholder="type a value, e.g. 1.48, 312m, 0.71 V",
                                     id="entry", select_on_focus=False)
                yield Static("", id="entry-msg", markup=False)
            with Vertical(id="right"):
                with Horizontal(id="build-row"):
                    yield Label("building predictions", id="build-label")
                    yield ProgressBar(total=1.0, show_eta=False, id="build-progress")
                yield SuspectsTable(id="suspects")
                yield NextReadingPanel(id="next")
                yield BenchNotesPanel(id="bench-notes")
        yield Footer()

    def on_mount(self) -> None:
        self.query_one(FitBanner).display = False
        table = self.query_one("#points", PointsTable)
        table.focus()
        table.move_cursor(row=self._unread_from(0), animate=False)  # a resumed session
        self._show_readings()
        self._sync_entry_label()
        self.query_one(NextReadingPanel).show(None)
        self.build_ensemble()

    # ------------------------------------------------------------------ workers

    @work(thread=True, exclusive=True, group="ensemble", exit_on_error=False)
    def build_ensemble(self) -> None:
        """Build (or load from the cache) the predictions; posts progress and the end.
        Then, the ranking already shown, the further units of every hypothesis
        (Engine._refine) in the background, a few hypotheses at a time, so that no
        reading typed later waits for a solve (a reading typed meanwhile waits for one
        step at most, then solves its own leading suspects first)."""
        worker = get_current_worker()
        try:
            self.engine.build(progress=lambda f: self.post_message(EnsembleProgressed(f)),
                              cancelled=lambda: worker.is_cancelled)
            healthy = tuple(self.engine.bands("healthy"))
            refining = self.engine.further_pending() > 0
        except Exception as exc:  # shown on screen; the interface stays usable
            self.post_message(EnsembleFailed(str(exc) or type(exc).__name__))
            return
        if worker.is_cancelled:
            return
        self.post_message(EnsembleBuilt(healthy, refining))
        if not refining:
            return
        try:
            self.engine.build_further(
                progress=lambda f: self.post_message(EnsembleProgressed(f, refining=True)),
                cancelled=lambda: worker.is_cancelled, chunk=REFINE_STEP)
        except Exception as exc:  # diagnose solves each leading suspect's units itself
            if not worker.is_cancelled:
                self.post_message(EnsembleFailed(str(exc) or type(exc).__name__,
                                                 refining=True))
            return
        if not worker.is_cancelled:
            self.post_message(PredictionsRefined())

    @work(thread=True, exclusive=True, group="ranking", exit_on_error=False)
    def rank(self, serial: int, readings: tuple[Reading, ...]) -> None:
        """Diagnose one reading set; the result carries its serial so stale ones drop.
        The ranking goes up first, the next-reading advice (the slower part) after it."""
        worker = get_current_worker()
        try:
            d = self.engine.diagnose(readings, advise=False)
            if worker.is_cancelled:
                return
            self.post_message(RankingUpdated(serial, d, advised=False))
            d = self.engine.diagnose(readings)
        except Exception as exc:  # shown on screen; the readings are kept
            self.post_message(EnsembleFailed(str(exc) or type(exc).__name__))
            return
        if not worker.is_cancelled:
            self.post_message(RankingUpdated(serial, d))

    def request_ranking(self) -> None:
        self.serial += 1
        if self.ready:
            self.rank(self.serial, tuple(self.session.readings))

    # ------------------------------------------------------------------ events

    def on_ensemble_progressed(self, msg: EnsembleProgressed) -> None:
        self.query_one("#build-progress", ProgressBar).update(progress=msg.fraction)

    def on_ensemble_built(self, msg: EnsembleBuilt) -> None:
        self.bands = {(b.observable.point, b.observable.kind): b for b in msg.healthy}
        self.ready = True
        if msg.refining:  # the bar goes on, for the background step
            self.query_one("#build-label", Label).update("refining predictions")
            self.query_one("#build-progress", ProgressBar).update(progress=0.0)
        else:
            self.query_one("#build-row").display = False
        self._show_readings()
        self.request_ranking()
        self._sync_bindings()

    def on_predictions_refined(self, msg: PredictionsRefined) -> None:
        self.query_one("#build-row").display = False

    def on_ensemble_failed(self, msg: EnsembleFailed) -> None:
        if msg.refining:  # the ranking works on: each suspect is refined as it leads
            self.query_one("#build-row").display = False
            self._message(f"refining predictions stopped: {msg.why}; each suspect is "
                          "refined as it leads instead")
            return
        self.query_one("#build-label", Label).update("predictions failed")
        self._message(f"predictions failed: {msg.why}")
        self.notify(msg.why, title="predictions failed", severity="error", timeout=10)

    def on_ranking_updated(self, msg: RankingUpdated) -> None:
        if msg.serial < self.shown_serial or msg.serial != self.serial:
            return
        if msg.advised and msg.serial == self.shown_serial and self._awaiting_advice:
            # the same ranking as on screen, now with its next readings
            self._awaiting_advice = False
            self.diagnosis = msg.diagnosis
            self._show_next(msg.diagnosis)
            self._sync_bindings()
            return
        self.shown_serial = msg.serial
        self.diagnosis = msg.diagnosis
        self._awaiting_advice = not msg.advised
        self.query_one(SuspectsTable).show(msg.diagnosis)
        if msg.advised:
            self._show_next(msg.diagnosis)
        else:
            self.query_one(NextReadingPanel).update("[dim]next reading: working it out…[/dim]")
            self.query_one("#points", PointsTable).mark_next(None)
        self.query_one(BenchNotesPanel).show(msg.diagnosis)
        self.query_one(FitBanner).show(msg.diagnosis)
        self._sync_bindings()

    @on(DataTable.RowHighlighted, "#points")
    def _row_moved(self) -> None:
        # a value typed in place belongs to its row: moved away from it, it is dropped
        if self._typing and self.query_one("#points", PointsTable).cursor_row != \
                self._typing_row:
            self._set_typing(False)
            self.query_one("#entry", Input).value = ""
        self._sync_entry_label()

    @on(DataTable.RowSelected, "#points")
    def _row_chosen(self) -> None:
        self.action_enter_reading()

    @on(DataTable.RowSelected, "#suspects")
    def _suspect_chosen(self) -> None:
        self.action_detail()

    def _typed(self, event: Key) -> bool:
        """A key on the points table, in the order typed: a digit (or the O of OL) starts
        a value in place for the highlighted row; while one is typed, characters and
        backspace edit it, enter records it, escape, up and down drop it (the last two
        then move the cursor), and left, right, home and end hand it to the entry field.
        True when the key was used here."""
        entry = self.query_one("#entry", Input)
        if not self._typing:
            if not (event.is_printable and event.character in _TYPING):
                return False
            self._set_typing(True)
            entry.value = ""
        if event.key in ("up", "down", "pageup", "pagedown"):
            self._set_typing(False)
            entry.value = ""
            return False
        if event.key == "enter":
            self._submit(entry.value)
        elif event.key == "backspace":
            entry.value = entry.value[:-1]
            self._refused_text = False
        elif event.key == "escape":
            self.action_leave_entry()
        elif event.is_printable and event.character:
            # a refused value stays shown until a key is typed, which starts afresh
            entry.value = ("" if self._refused_text else entry.value) + event.character
            self._refused_text = False
        elif event.key in ("left", "right", "home", "end"):  # edit the value in the field
            self._set_typing(False)
            entry.focus()
        else:
            return False
        entry.cursor_position = len(entry.value)
        return True

    def _set_typing(self, on: bool) -> None:
        self._typing = on
        self._typing_row = self.query_one("#points", PointsTable).cursor_row if on else -1
        self.query_one("#entry", Input).set_class(on, "-typing")

    def _pasted(self, text: str) -> None:
        """A paste on the table or in the field: each whole line is a value for the next
        row, from the highlighted one on (the field's text before the first); a last
        line without a line break stays in the field. Stops at the first value refused,
        which stays in the field with the reason shown."""
        entry = self.query_one("#entry", Input)
        parts = re.split(r"\r\n|\r|\n", text)
        lines, rest = parts[:-1], parts[-1]
        if lines:
            lines[0] = entry.value + lines[0]
        else:
            rest = entry.value + rest
        taken = 0
        for k, line in enumerate(lines):
            if not line.strip():
                continue
            if not self._submit(line):
                if not isinstance(self.focused, Input):
                    self._set_typing(True)
                entry.value = line.strip()
                entry.cursor_position = len(entry.value)
                left = len([x for x in lines[k + 1:] if x.strip()]) + bool(rest.strip())
                if left:
                    self._message(f"{self._refusal}  ({taken} pasted value"
                                  f"{'' if taken == 1 else 's'} taken, {left} after it "
                                  f"not entered)", error=True)
                return
            taken += 1
        if rest:
            if not isinstance(self.focused, Input):
                self._set_typing(True)
            entry.value = rest
            entry.cursor_position = len(rest)

    def _step(self, step: int) -> None:
        """Up or down in the entry field: the highlighted row moves, the field empties."""
        table = self.query_one("#points", PointsTable)
        table.move_cursor(row=max(0, min(table.row_count - 1, table.cursor_row + step)),
                          animate=False)
        self.query_one("#entry", Input).value = ""

    def on_descendant_focus(self, event) -> None:
        if isinstance(self.focused, PointsTable) and self._typing:
            # back on the table from elsewhere (tab, the suspects): a value left typed
            # in place is dropped, as moving off its row drops it
            self._set_typing(False)
            self.query_one("#entry", Input).value = ""

    def _submit(self, text: str) -> bool:
        """Record `text` as the reading at the highlighted row, at once (not by message:
        keys typed behind the enter must find the next row): True when it was taken. A
        refused value stays in the field with the reason under it."""
        o = self.query_one("#points", PointsTable).observable_at_cursor()
        if o is None:
            return False
        text = text.strip()
        if not text:
            self.action_leave_entry()
            return False
        try:
            value = self.engine.check_value(o.point, o.kind, text)
        except DiagError as exc:
            self._refused(o.point, o.kind, str(exc))
            self.post_message(ReadingRejected(o.point, o.kind, text, str(exc)))
            return False
        reading = Reading(o.point, o.kind, value)
        self._record(reading)
        self.post_message(ReadingEntered(reading))
        return True

    def _refused(self, point: str, kind: str, why: str) -> None:
        self.last_error = why
        self._refused_text = True
        entry = self.query_one("#entry", Input)
        if entry.has_focus:  # in the field too, the next key typed replaces it
            entry.select_all()
        for head in (f"{point} {kind}: ", f"{point}: "):  # said once is enough
            why = why[len(head):] if why.startswith(head) else why
        self._refusal = f"✗ {point} {kind}: {why}"
        self._message(f"{self._refusal}  (other readings kept)", error=True)

    def _record(self, reading: Reading) -> None:
        self.session.set_reading(reading)
        self.last_error = ""
        self._after_change(f"{reading.point} {reading.kind} recorded")
        self.query_one("#entry", Input).value = ""
        self._set_typing(False)
        table = self.query_one("#points", PointsTable)
        if table.cursor_row < table.row_count - 1:
            table.move_cursor(row=self._unread_from(table.cursor_row + 1), animate=False)

    def _unread_from(self, row: int) -> int:
        """The first row from `row` down whose point has no reading yet (`row` itself when
        every one below has): typing on goes on where readings are missing and does not
        write over one taken earlier, as in a resumed session."""
        obs = self.query_one("#points", PointsTable).observables
        for r in range(row, len(obs)):
            if self.session.reading(obs[r].point, obs[r].kind) is None:
                return r
        return min(row, max(len(obs) - 1, 0))

    # ------------------------------------------------------------------ actions

    def check_action(self, action: str, parameters: tuple[object, ...]) -> bool | None:
        if action == "undo":
            return self.session.can_undo
        if action == "clear_reading":
            # shown while any reading is taken (it acts on the highlighted row), so that
            # moving the cursor does not rebuild the footer
            return bool(self.session.readings)
        if action in ("detail", "goto_next"):
            if self.diagnosis is None:
                return False
            return bool(self.diagnosis.next) if action == "goto_next" else True
        if action == "export":
            return True
        if action == "leave_entry":
            return isinstance(self.focused, Input)
        if action == "focus_suspects":
            return not isinstance(self.focused, SuspectsTable)
        if action == "focus_points":
            return not isinstance(self.focused, PointsTable)
        return True

    def action_enter_reading(self) -> None:
        self._sync_entry_label()
        entry = self.query_one("#entry", Input)
        o = self._current()
        r = self.session.reading(o.point, o.kind) if o else None
        entry.value = f"{r.value:.6g}" if r else ""
        entry.focus()

    def action_focus_suspects(self) -> None:
        self.query_one(SuspectsTable).focus()

    def action_focus_points(self) -> None:
        self.query_one("#points", PointsTable).focus()

    def action_leave_entry(self) -> None:
        self.query_one("#entry", Input).value = ""
        self._set_typing(False)
        self.query_one("#points", PointsTable).focus()

    def action_clear_reading(self) -> None:
        o = self._current()
        if o is None:
            return
        if self.session.clear_reading(o.point, o.kind):
            self._after_change(f"{o.point} {o.kind} cleared")
        else:
            self._message(f"no reading at {o.point} {o.kind} to clear")

    def action_undo(self) -> None:
        what = self.session.undo()
        if what:
            self._after_change(f"undone: {what[0]} {what[1]}")
            self._goto(*what)

    def action_goto_next(self) -> None:
        if self.diagnosis and self.diagnosis.next:
            n = self.diagnosis.next[0]
            self._goto(n.point, n.kind)

    def action_detail(self) -> None:
        fault = self.query_one(SuspectsTable).selected_fault()
        if fault is None:
            return
        from diag.tui.detail_screen import SuspectDetailScreen

        self.app.push_screen(SuspectDetailScreen(self.engine, fault,
                                                 tuple(self.session.readings), self.diagnosis))

    def action_node(self) -> None:
        o = self._current()
        if o is None:
            return
        from diag.tui.node_screen import NodeScreen

        self.app.push_screen(NodeScreen(self.case, o.point))

    def action_bench_notes(self) -> None:
        from diag.tui.advice_panel import bench_note_lines
        from diag.tui.bench_notes_screen import BenchNotesScreen

        if self.diagnosis is not None:
            self.app.push_screen(BenchNotesScreen(bench_note_lines(self.diagnosis)))

    def action_notes(self) -> None:
        from diag.tui.notes_dialog import NotesDialog

        def keep(text: str | None) -> None:
            if text is not None and text != self.session.notes:
                self.session.notes = text
                self._autosave()
                self._message("notes kept")

        self.app.push_screen(NotesDialog(self.session.notes), keep)

    def action_export(self, error: str = "") -> None:
        from diag.tui.export_dialog import ExportDialog

        default = str(Path.cwd() / report_name(self.case.path, self.label))
        self.app.push_screen(ExportDialog(default, error), self._write_report)

    def _write_report(self, path: str | None) -> None:
        if path is None:
            return
        from diag.core.session import export_report, report_markdown

        cautions, defer = self.app.cautions()
        text = report_markdown(self.case, self.session, self.diagnosis, cautions, defer)
        try:
            out = export_report(path, text)
        except DiagError as exc:
            self.action_export(error=str(exc))
            return
        self.app.last_report = out
        self._message(f"report written to {out}")
        self.notify(f"report written to {out}", title="report")

    # ------------------------------------------------------------------ helpers

    def _current(self):
        return self.query_one("#points", PointsTable).observable_at_cursor()

    def _goto(self, point: str, kind: str) -> None:
        table = self.query_one("#points", PointsTable)
        table.move_cursor(row=table.get_row_index(row_key(point, kind)), animate=False)
        table.focus()

    def _after_change(self, what: str) -> None:
        self.request_ranking()  # first: the diagnosis runs while the table is redrawn
        self._show_readings()
        self._autosave()
        self._message(what)
        self._sync_bindings()

    def _show_next(self, d: Diagnosis) -> None:
        """The advice panel, and the arrow on the advised row of the points table."""
        self.query_one(NextReadingPanel).show(d)
        first = d.next[0] if d.next else None
        self.query_one("#points", PointsTable).mark_next(
            first.point if first else None, first.kind if first else None)

    def _sync_bindings(self) -> None:
        """Refresh the footer only when what applies has changed (a footer refresh
        rebuilds its keys, the dearest part of a screen update)."""
        state = tuple(self.check_action(a, ()) for a in
                      ("undo", "clear_reading", "detail", "goto_next"))
        if state != self._binding_state:
            self._binding_state = state
            self.refresh_bindings()

    def _autosave(self) -> None:
        if self.session.path is None:
            return
        try:
            self.session.save()
        except OSError as exc:
            self.notify(f"autosave failed: {exc}", severity="error")

    def _show_readings(self) -> None:
        readings = {(r.point, r.kind): r for r in self.session.readings}
        self.query_one("#points", PointsTable).show(self.bands, readings)

    def _sync_entry_label(self) -> None:
        o = self._current()
        label = f"{o.point} {o.kind} ▸" if o else "▸"
        self.query_one("#entry-label", Label).update(label)

    def _message(self, text: str, error: bool = False) -> None:
        msg = self.query_one("#entry-msg", Static)
        msg.update(text)
        msg.set_class(error, "-error")
