"""The drill screen: a hidden unit, readings on request, naming the fault, the score.

`DrillScreen(drill)` takes a diag.core.drill.Drill (its engines built). The trainee picks a
test point and presses enter: the meter's reading is quoted as the display shows it and
goes on the trainee's sheet beside the table. The ranking stays hidden unless the drill
allows hints. `n` names the fault (a dialog listing the case's hypotheses; a name that
matches none is answered with the close ones). A wrong naming costs points and the
exercise goes on, with what that fault would have read against what was measured, until
the namings allowed are used up; `r` gives up and shows the fault. The points so far are
always on screen, and the score at the end shows how they were worked out (the same
figures the results file gets). Leaving before the end asks first and records the
exercise as abandoned. `x` goes on to the next exercise. Naming, giving up and leaving
are scored in a thread worker (the score replays diag's advice on the unit).
"""

from __future__ import annotations

from dataclasses import dataclass

from textual import on, work
from textual.app import ComposeResult
from textual.binding import Binding
from textual.containers import Horizontal, Vertical
from textual.message import Message
from textual.screen import ModalScreen, Screen
from textual.widgets import DataTable, Footer, Input, OptionList, Static
from textual.widgets.option_list import Option

from diag.core import drill as core
from diag.core.drill import Drill, Naming, Score
from diag.core.engine import Diagnosis, Reading
from diag.core.errors import DiagError
from diag.tui.fmt import esc
from diag.tui.suspects_table import SuspectsTable


@dataclass
class DrillReadingTaken(Message):
    """The trainee asked for a reading and the meter showed `reading` (`shown`: as the
    display shows it)."""

    reading: Reading
    shown: str = ""


@dataclass
class DrillHintsUpdated(Message):
    """diag's ranking on the readings taken by update number `serial` (posted only when
    hints are allowed)."""

    serial: int
    diagnosis: Diagnosis


@dataclass
class DrillNamed(Message):
    """The trainee named a fault (right or wrong; `naming.score` is set when it ended the
    exercise)."""

    naming: Naming


@dataclass
class DrillScored(Message):
    """The exercise ended (found, given up, namings used up, or left) and was scored."""

    score: Score


@dataclass
class DrillFailed(Message):
    """Naming or scoring failed; `why` says what to do."""

    why: str


def naming_note(text: str, matches: list[str], ids: list[str]) -> str:
    """What the naming dialog says under the field for the typed `text`, given the ids
    its filter `matches` (Textual markup)."""
    t = text.strip()
    if not t:
        return "Type part of a fault id or its description, or press ↓ to browse the list."
    if not matches:
        close = core.close_names(t, ids)
        hint = (" Close: " + ", ".join(f"[b]{esc(c)}[/]" for c in close) + "."
                if close else " Try a part reference such as R2, or a word such as open.")
        return f"[b red]Nothing matches “{esc(t)}”.[/]{hint}"
    if len(matches) == 1:
        return f"Enter names [b]{esc(matches[0])}[/]."
    return f"{len(matches)} faults match: type more, or press ↓ and pick one."


class NameFaultDialog(ModalScreen[str | None]):
    """Pick the fault to name: type to filter the case's hypotheses, enter to choose.
    Faults already named wrongly in this exercise (`ruled_out`) are listed but cannot be
    picked again. A typed name that matches nothing is answered with close ones."""

    BINDINGS = [
        Binding("escape", "cancel", "Cancel", id="drill.name.cancel"),
        Binding("down", "to_list", "To the list", id="drill.name.list", show=False),
    ]
    DEFAULT_CSS = """
    NameFaultDialog { align: center middle; }
    NameFaultDialog > Vertical { width: 80%; max-width: 100; height: 80%;
                                 border: round $accent; padding: 0 1; }
    NameFaultDialog #name-note { height: auto; min-height: 1; color: $text-muted; }
    NameFaultDialog OptionList { height: 1fr; }
    """

    def __init__(self, choices: list[tuple[str, str]], ruled_out: frozenset[str] = frozenset(),
                 namings_left: int | None = None) -> None:
        super().__init__()
        self.choices = choices
        self.ruled_out = ruled_out
        self.namings_left = namings_left

    def compose(self) -> ComposeResult:
        left = ("" if self.namings_left is None else
                f" ({self.namings_left} naming{'s' if self.namings_left != 1 else ''} left;"
                f" a wrong one costs {core.WRONG_NAMING_POINTS} points)")
        with Vertical():
            yield Static("Name the fault: type part of its id or description" + left)
            yield Input(placeholder="e.g. R2:open", id="name-input")
            yield Static(naming_note("", [], []), id="name-note")
            yield OptionList(*self._options(""), id="name-options", markup=False)

    def _matches(self, text: str) -> list[str]:
        """Fault ids whose id and description hold every typed word (case ignored)."""
        words = text.lower().split()
        return [fid for fid, what in self.choices
                if all(w in f"{fid} {what}".lower() for w in words)]

    def _options(self, text: str) -> list[Option]:
        what = dict(self.choices)
        return [Option(f"{fid}  {what[fid]}"
                       + ("  (named already: not this one)" if fid in self.ruled_out else ""),
                       id=fid, disabled=fid in self.ruled_out)
                for fid in self._matches(text)]

    def _open(self, text: str) -> list[str]:
        return [f for f in self._matches(text) if f not in self.ruled_out]

    @on(Input.Changed, "#name-input")
    def _filter(self, event: Input.Changed) -> None:
        ol = self.query_one("#name-options", OptionList)
        ol.set_options(self._options(event.value))
        first = next((i for i in range(ol.option_count)
                      if not ol.get_option_at_index(i).disabled), None)
        ol.highlighted = first
        self._note(event.value, self._matches(event.value))

    def _note(self, text: str, matches: list[str]) -> None:
        self.query_one("#name-note", Static).update(
            naming_note(text, matches, [fid for fid, _ in self.choices]))

    @on(Input.Submitted, "#name-input")
    def _submit(self, event: Input.Submitted) -> None:
        """Enter in the field names the fault typed in full (case ignored), or the only
        one left by the filter; otherwise the note says why nothing was named."""
        typed = event.value.strip()
        exact = next((fid for fid, _ in self.choices if fid.lower() == typed.lower()), None)
        if exact in self.ruled_out:
            self.query_one("#name-note", Static).update(
                f"[b red]You named {esc(exact)} already: it is not the fault.[/] "
                "Name another one.")
            return
        open_ = self._open(typed)
        if exact is None and len(open_) == 1 and typed:
            exact = open_[0]
        if exact is not None:
            self.dismiss(exact)
            return
        self._note(typed, self._matches(typed))

    @on(OptionList.OptionSelected, "#name-options")
    def _picked(self, event: OptionList.OptionSelected) -> None:
        if event.option.id not in self.ruled_out:
            self.dismiss(event.option.id)

    def action_to_list(self) -> None:
        ol = self.query_one("#name-options", OptionList)
        if ol.option_count:
            ol.focus()

    def action_cancel(self) -> None:
        self.dismiss(None)


class ConfirmDialog(ModalScreen[bool]):
    """A yes-or-no question before an action that ends the exercise: y confirms, n or
    escape goes back."""

    BINDINGS = [
        Binding("y", "yes", "Yes", id="drill.confirm.yes"),
        Binding("n,escape", "no", "No, go back", id="drill.confirm.no"),
    ]

    def __init__(self, title: str, text: str) -> None:
        super().__init__()
        self.title_text = title
        self.text = text
        self.quit_question = False   # True: the app's Ctrl+Q over it quits

    def compose(self) -> ComposeResult:
        with Vertical(classes="dialog", id="confirm-box"):
            yield Static(f"[b]{esc(self.title_text)}[/b]", classes="dialog-title")
            yield Static(esc(self.text), id="confirm-text")
            yield Static("y: yes    n or esc: no, go back", classes="dialog-keys")

    def action_yes(self) -> None:
        self.dismiss(True)

    def action_no(self) -> None:
        self.dismiss(False)


def _signed(points: int) -> str:
    return f"−{-points}" if points < 0 else f"{points}"


def score_text(score: Score) -> str:
    """The score in words and figures (Textual markup; case text escaped): the points and
    how they were worked out (Score.breakdown), then the verdict and what to learn."""
    total = score.points.total
    lines = [f"[b]Score {total} / {core.FOUND_POINTS}[/b]"]
    for what, pts in score.breakdown()[:-1]:
        figure = "  —" if pts is None else f"{_signed(pts):>4}"
        lines.append(f"  {figure}  {esc(what)}")
    if score.status == core.FOUND and score.named == score.truth:
        verdict = "[b green]Right.[/] "
    elif score.status == core.FOUND:
        verdict = ("[b green]Right[/] (the offered readings cannot tell it from the hidden "
                   "fault). ")
    elif score.status == core.REVEALED:
        verdict = "[b yellow]Given up.[/] "
    elif score.status == core.ABANDONED:
        verdict = "[b yellow]Left before naming; recorded as abandoned.[/] "
    else:
        verdict = f"[b red]Not found in {core.MAX_NAMINGS} namings.[/] "
    lines.append(verdict + f"The hidden fault was [b]{esc(score.truth)}[/]: "
                 f"{esc(score.truth_text)}.")
    if score.named:
        lines.append(f"You named {esc(score.named)}: {esc(score.named_text)}.")
    lines.append(f"diag's advice ended on {esc(score.advice_fault)} (p {score.advice_p:.2f}). "
                 f"Time {score.seconds:.0f} s.")
    if score.telling:
        lines.append("Readings that would have told the most:")
        for t in score.telling:
            lines.append(f"  {esc(t.point)} {t.kind}: {esc(t.why)}")
    return "\n".join(lines)


def tally_text(drill: Drill) -> str:
    """The points so far of the running exercise and the rules they follow (markup)."""
    rnd = drill.round
    n = len(rnd.taken)
    cost = rnd.reading_cost
    wrong = len(rnd.wrong)
    cost_text = f" (cost {cost:g})" if cost != n else ""
    if rnd.score is not None:
        return (f"[b]Exercise over[/b]: score {rnd.score.points.total} / "
                f"{core.FOUND_POINTS}; how it was worked out is below.")
    charge = f" ({_signed(-core.WRONG_NAMING_POINTS * wrong)})" if wrong else ""
    return (f"[b]Score so far[/b]: readings {n}{cost_text} · wrong namings {wrong}{charge}"
            f" · namings left {rnd.namings_left}\n"
            f"Found {core.FOUND_POINTS}; −{core.POINTS_PER_EXTRA_COST} per unit of reading "
            f"cost over an efficient search (at most −{core.READING_PENALTY_MAX}); "
            f"−{core.WRONG_NAMING_POINTS} per wrong naming; not found 0.")


def naming_text(naming: Naming, namings_left: int) -> str:
    """What a wrong naming costs and what that fault would have read (markup)."""
    lines = [f"[b red]Not {esc(naming.fault)}.[/] −{core.WRONG_NAMING_POINTS} points "
             "(a part replaced needlessly)."]
    if naming.against:
        lines += [f"  {esc(c.why)}." for c in naming.against]
    else:
        lines.append(f"  None of your readings so far rules {esc(naming.fault)} out; other "
                     "readings will.")
    lines.append(f"{namings_left} naming{'s' if namings_left != 1 else ''} left: keep "
                 "measuring, name again (n), or give up and see the fault (r).")
    return "\n".join(lines)


class DrillScreen(Screen):
    """One trainee's drill: readings on request, the fault named, a score per exercise."""

    BINDINGS = [
        Binding("enter", "read", "Read here", id="drill.read", show=True),
        Binding("n", "name", "Name the fault", id="drill.name"),
        Binding("r", "reveal", "Give up, show the fault", id="drill.reveal"),
        Binding("x", "next", "Next exercise", id="drill.next"),
        Binding("escape", "leave", "Leave", id="drill.leave"),
    ]
    DEFAULT_CSS = """
    DrillScreen #drill-title { height: auto; padding: 0 1; text-style: bold; }
    DrillScreen #drill-body { height: 1fr; }
    DrillScreen #drill-points { width: 3fr; }
    DrillScreen #drill-side { width: 2fr; padding: 0 1; }
    DrillScreen #drill-tally { height: auto; margin: 1 0; }
    DrillScreen #drill-sheet { height: 1fr; }
    DrillScreen #drill-feedback { height: auto; padding: 0 1; }
    DrillScreen #drill-score { height: auto; padding: 0 1; border: round $primary; }
    DrillScreen .-empty { display: none; }
    """

    def __init__(self, drill: Drill) -> None:
        super().__init__()
        self.drill = drill
        self.scoring = False
        self.leaving = False
        self.hint_serial = 0
        self.hint_shown = -1

    # ---- layout -----------------------------------------------------------------------

    def compose(self) -> ComposeResult:
        yield Static(id="drill-title")
        with Horizontal(id="drill-body"):
            yield DataTable(id="drill-points", cursor_type="row", zebra_stripes=True)
            with Vertical(id="drill-side"):
                if self.drill.hints:
                    yield Static("diag's ranking (hints are on)")
                    yield SuspectsTable(limit=8, id="drill-hints")
                else:
                    yield Static("The ranking is hidden during the drill. Take the readings "
                                 "you need, then press n to name the fault.",
                                 id="drill-hidden")
                yield Static(id="drill-tally")
                yield DataTable(id="drill-sheet", cursor_type="none", zebra_stripes=True)
        yield Static(id="drill-feedback", classes="-empty")
        yield Static(id="drill-score", classes="-empty")
        yield Footer()

    def on_mount(self) -> None:
        table = self.query_one("#drill-points", DataTable)
        table.add_column("point", key="point")
        table.add_column("kind", key="kind")
        table.add_column("meter shows", key="shows", width=14)
        table.add_column("where to probe", key="where")
        sheet = self.query_one("#drill-sheet", DataTable)
        sheet.add_column("#", key="n")
        sheet.add_column("your readings", key="point")
        sheet.add_column("kind", key="kind")
        sheet.add_column("meter shows", key="shows")
        self._load_round()

    def _load_round(self) -> None:
        rnd = self.drill.round
        d = self.drill
        self.query_one("#drill-title", Static).update(
            f"Drill · {esc(rnd.case.title)} · exercise {d.index + 1} of {len(d.exercises)}: "
            f"{esc(rnd.exercise.name)} · trainee {esc(d.trainee)}")
        table = self.query_one("#drill-points", DataTable)
        table.clear()
        for o in rnd.case.observables:
            pt = rnd.case.point(o.point)
            table.add_row(o.point, o.kind, "", pt.where, key=f"{o.point}|{o.kind}")
        self.query_one("#drill-sheet", DataTable).clear()
        for box in ("#drill-score", "#drill-feedback"):
            w = self.query_one(box, Static)
            w.update("")
            w.add_class("-empty")
        self._tally()
        if d.hints:
            self._refresh_hints()
        table.focus()
        self.refresh_bindings()

    def _tally(self) -> None:
        self.query_one("#drill-tally", Static).update(tally_text(self.drill))

    def _feedback(self, text: str) -> None:
        box = self.query_one("#drill-feedback", Static)
        box.update(text)
        box.set_class(not text, "-empty")

    # ---- actions ----------------------------------------------------------------------

    def check_action(self, action: str, parameters: tuple) -> bool | None:
        scored = self.drill.round.score is not None
        if action in ("read", "name", "reveal"):
            return not scored and not self.scoring
        if action == "next":
            return (scored and not self.scoring
                    and self.drill.index + 1 < len(self.drill.exercises))
        return True

    def take(self, point: str, kind: str) -> Reading:
        """Take the reading at (point, kind): quote it as the meter shows it, put it in
        the table and on the trainee's sheet."""
        rnd = self.drill.round
        before = len(rnd.taken)
        r = rnd.read(point, kind)
        shown = rnd.shown(r)
        where = rnd.case.point(point).where
        if len(rnd.taken) > before:
            n = len(rnd.taken)
            self.query_one("#drill-points", DataTable).update_cell(f"{point}|{kind}", "shows",
                                                                   shown)
            sheet = self.query_one("#drill-sheet", DataTable)
            sheet.add_row(str(n), point, kind, shown, key=f"{point}|{kind}")
            sheet.move_cursor(row=sheet.row_count - 1, animate=False)
            self._feedback(f"Reading {n}: [b]{esc(point)} {kind}[/] ({esc(where)}): the meter "
                           f"shows [b]{esc(shown)}[/].")
            self._tally()
            if self.drill.hints:
                self._refresh_hints()
        else:
            self._feedback(f"{esc(point)} {kind} was taken already: the meter shows "
                           f"[b]{esc(shown)}[/] (not counted again).")
        self.post_message(DrillReadingTaken(r, shown))
        return r

    def action_read(self) -> None:
        table = self.query_one("#drill-points", DataTable)
        if not table.row_count:
            return
        obs = self.drill.round.case.observables[table.cursor_row]
        try:
            self.take(obs.point, obs.kind)
        except DiagError as exc:
            self.notify(str(exc), severity="error")

    @on(DataTable.RowSelected, "#drill-points")
    def _row_selected(self, event: DataTable.RowSelected) -> None:
        event.stop()
        if self.check_action("read", ()):
            self.action_read()

    def action_name(self) -> None:
        rnd = self.drill.round
        choices = [(h.id, h.text) for h in rnd.engine.ensemble.hypotheses]
        self.app.push_screen(NameFaultDialog(choices, frozenset(n.fault for n in rnd.wrong),
                                             rnd.namings_left), self._named)

    def _named(self, fault_id: str | None) -> None:
        if fault_id:
            self.name_fault(fault_id)

    def _busy(self, text: str) -> None:
        self.scoring = True
        self.refresh_bindings()
        self._feedback(text)

    def name_fault(self, fault_id: str) -> None:
        """Name `fault_id` in the current exercise (in a worker)."""
        self._busy(f"Naming {esc(fault_id)}…")
        self._name_worker(fault_id)

    @work(thread=True, exclusive=True, group="drill-score", exit_on_error=False)
    def _name_worker(self, fault_id: str) -> None:
        try:
            naming = self.drill.name(fault_id)
        except DiagError as exc:
            self.post_message(DrillFailed(str(exc)))
            return
        self.post_message(DrillNamed(naming))
        if naming.score is not None:
            self.post_message(DrillScored(naming.score))

    def action_reveal(self) -> None:
        def chosen(yes: bool | None) -> None:
            if yes:
                self._busy("Showing the fault: scoring…")
                self._end_worker("reveal")

        self.app.push_screen(ConfirmDialog(
            "Give up and see the fault?",
            f"The exercise ends and scores 0 points; it is recorded with your "
            f"{len(self.drill.round.taken)} reading(s)."), chosen)

    @work(thread=True, exclusive=True, group="drill-score", exit_on_error=False)
    def _end_worker(self, how: str) -> None:
        try:
            score = self.drill.reveal() if how == "reveal" else self.drill.abandon()
        except DiagError as exc:
            self.post_message(DrillFailed(str(exc)))
            return
        if score is not None:
            self.post_message(DrillScored(score))

    def _refresh_hints(self) -> None:
        self.hint_serial += 1
        self._rank(self.hint_serial, tuple(self.drill.round.taken))

    @work(thread=True, group="drill-hints", exit_on_error=False)
    def _rank(self, serial: int, taken: tuple[Reading, ...]) -> None:
        self.post_message(DrillHintsUpdated(serial, self.drill.round.engine.diagnose(taken)))

    def on_drill_hints_updated(self, message: DrillHintsUpdated) -> None:
        if message.serial > self.hint_shown:  # an older ranking arriving late is dropped
            self.hint_shown = message.serial
            self.query_one("#drill-hints", SuspectsTable).show(message.diagnosis)

    def on_drill_named(self, message: DrillNamed) -> None:
        n = message.naming
        if n.score is None:
            self.scoring = False
            self._feedback(naming_text(n, self.drill.round.namings_left))
            self._tally()
            self.refresh_bindings()

    def on_drill_scored(self, message: DrillScored) -> None:
        self.scoring = False
        if self.leaving:
            self._go()
            return
        text = score_text(message.score)
        if self.drill.results:
            text += f"\nResult written to {esc(self.drill.results)}."
        if self.drill.index + 1 < len(self.drill.exercises):
            text += "\nPress x for the next exercise."
        else:
            text += "\nThat was the last exercise."
        self._feedback("")
        box = self.query_one("#drill-score", Static)
        box.update(text)
        box.remove_class("-empty")
        self._tally()
        self.refresh_bindings()

    def on_drill_failed(self, message: DrillFailed) -> None:
        self.scoring = False
        self.leaving = False
        self._feedback("")
        self.notify(message.why, severity="error")
        self.refresh_bindings()

    def action_next(self) -> None:
        if self.drill.next_round() is not None:
            self._load_round()

    def _unended_text(self) -> str | None:
        """What leaving now would cost, or None when nothing is lost: the exercise not
        ended (recorded as abandoned) and the exercises not yet started."""
        d = self.drill
        rest = len(d.exercises) - d.index - 1
        if d.round.score is None:
            where = f" in {d.results}" if d.results else ""
            text = (f"This exercise has not ended: it is recorded as abandoned{where}, "
                    f"with your {len(d.round.taken)} reading(s) and 0 points.")
            if rest:
                text += f" The {rest} exercise(s) after it are not started."
            return text
        if rest:
            return f"The {rest} exercise(s) after this one are not started or recorded."
        return None

    def action_leave(self) -> None:
        """Leave the drill. Before the exercise has ended this asks first and records it
        as abandoned (readings so far, 0 points); with exercises not yet started it asks
        too; otherwise it leaves at once."""
        if self.scoring:
            return
        text = self._unended_text()
        if text is None:
            self._go()
            return

        def chosen(yes: bool | None) -> None:
            if not yes:
                return
            if self.drill.round.score is None:
                self.leaving = True
                self._busy("Recording the exercise as abandoned…")
                self._end_worker("abandon")
            else:
                self._go()

        self.app.push_screen(ConfirmDialog("Leave the drill?", text), chosen)

    def ask_before_quit(self) -> bool:
        """Ctrl+Q over a drill (DiagApp.action_quit): when leaving would lose anything,
        ask first and quit on yes (the command records an unended exercise as abandoned
        as it exits) and return True; False when there is nothing to ask."""
        text = None if self.scoring else self._unended_text()
        if text is None:
            return False
        dialog = ConfirmDialog("Quit diag?", text + " Ctrl+Q again quits too.")
        dialog.quit_question = True
        self.app.push_screen(dialog, lambda yes: self.app.exit() if yes else None)
        return True

    def _go(self) -> None:
        if len(self.app.screen_stack) > 2:
            self.app.pop_screen()
        else:
            self.app.exit()
