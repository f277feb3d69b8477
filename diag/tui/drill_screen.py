"""The drill screen: a hidden unit, readings on request, naming the fault, the score.

`DrillScreen(drill)` takes a diag.core.drill.Drill (its engines built). The trainee picks a
test point and presses enter to see what the meter shows there; the ranking stays hidden
unless the drill allows hints. `n` names the fault (a dialog listing the case's
hypotheses); the score shows whether it was right, the readings used against diag's own
advice, and the readings that would have told the most. `x` goes on to the next exercise.
The score is computed in a thread worker (it replays diag's advice on the unit).
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

from diag.core.drill import Drill, Score
from diag.core.engine import Diagnosis, Reading
from diag.core.errors import DiagError
from diag.tui.fmt import esc, value
from diag.tui.suspects_table import SuspectsTable


@dataclass
class DrillReadingTaken(Message):
    """The trainee asked for a reading and the meter showed `reading`."""

    reading: Reading


@dataclass
class DrillHintsUpdated(Message):
    """diag's ranking on the readings taken by update number `serial` (posted only when
    hints are allowed)."""

    serial: int
    diagnosis: Diagnosis


@dataclass
class DrillScored(Message):
    """The trainee named a fault and the exercise was scored."""

    score: Score


@dataclass
class DrillFailed(Message):
    """Naming or scoring failed; `why` says what to do."""

    why: str


class NameFaultDialog(ModalScreen[str | None]):
    """Pick the fault to name: type to filter the case's hypotheses, enter to choose."""

    BINDINGS = [Binding("escape", "cancel", "Cancel", id="drill.name.cancel")]
    DEFAULT_CSS = """
    NameFaultDialog { align: center middle; }
    NameFaultDialog > Vertical { width: 80%; max-width: 100; height: 80%;
                                 border: round $accent; padding: 0 1; }
    NameFaultDialog OptionList { height: 1fr; }
    """

    def __init__(self, choices: list[tuple[str, str]]) -> None:
        super().__init__()
        self.choices = choices

    def compose(self) -> ComposeResult:
        with Vertical():
            yield Static("Name the fault: type part of its id or description")
            yield Input(placeholder="e.g. R2:open", id="name-input")
            yield OptionList(*self._options(""), id="name-options", markup=False)

    def _options(self, text: str) -> list[Option]:
        t = text.strip().lower()
        return [Option(f"{fid}  {what}", id=fid) for fid, what in self.choices
                if not t or t in fid.lower() or t in what.lower()]

    @on(Input.Changed, "#name-input")
    def _filter(self, event: Input.Changed) -> None:
        ol = self.query_one("#name-options", OptionList)
        ol.set_options(self._options(event.value))
        if ol.option_count:
            ol.highlighted = 0

    @on(Input.Submitted, "#name-input")
    def _submit(self, event: Input.Submitted) -> None:
        typed = event.value.strip()
        if typed in {fid for fid, _ in self.choices}:
            self.dismiss(typed)
            return
        ol = self.query_one("#name-options", OptionList)
        if ol.highlighted is not None and ol.option_count:
            self.dismiss(ol.get_option_at_index(ol.highlighted).id)

    @on(OptionList.OptionSelected, "#name-options")
    def _picked(self, event: OptionList.OptionSelected) -> None:
        self.dismiss(event.option.id)

    def action_cancel(self) -> None:
        self.dismiss(None)


def score_text(score: Score) -> str:
    """The score in words (Textual markup; case text escaped)."""
    if score.named == score.truth:
        verdict = "[b green]Right.[/] "
    elif score.same_group:
        verdict = ("[b green]Right[/] (the offered readings cannot tell it from the hidden "
                   "fault). ")
    else:
        verdict = "[b red]Not this one.[/] "
    lines = [verdict + f"The hidden fault was [b]{esc(score.truth)}[/]: "
             f"{esc(score.truth_text)}.",
             f"You named {esc(score.named)}: {esc(score.named_text)}.",
             f"Readings: you used {score.readings_used}; following diag's advice took "
             f"{score.advice_readings} (it ended on {esc(score.advice_fault)}, "
             f"p {score.advice_p:.2f}). Time {score.seconds:.0f} s."]
    if score.telling:
        lines.append("Readings that would have told the most:")
        for t in score.telling:
            lines.append(f"  {esc(t.point)} {t.kind}: {esc(t.why)}")
    return "\n".join(lines)


class DrillScreen(Screen):
    """One trainee's drill: readings on request, the fault named, a score per exercise."""

    BINDINGS = [
        Binding("enter", "read", "Read here", id="drill.read", show=True),
        Binding("n", "name", "Name the fault", id="drill.name"),
        Binding("x", "next", "Next exercise", id="drill.next"),
        Binding("escape", "leave", "Leave", id="drill.leave"),
    ]
    DEFAULT_CSS = """
    DrillScreen #drill-title { height: auto; padding: 0 1; text-style: bold; }
    DrillScreen #drill-body { height: 1fr; }
    DrillScreen #drill-points { width: 3fr; }
    DrillScreen #drill-side { width: 2fr; padding: 0 1; }
    DrillScreen #drill-score { height: auto; padding: 0 1; border: round $primary; }
    DrillScreen #drill-score.-empty { display: none; }
    """

    def __init__(self, drill: Drill) -> None:
        super().__init__()
        self.drill = drill
        self.scoring = False
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
        yield Static(id="drill-score", classes="-empty")
        yield Footer()

    def on_mount(self) -> None:
        table = self.query_one("#drill-points", DataTable)
        table.add_column("point", key="point")
        table.add_column("kind", key="kind")
        table.add_column("meter shows", key="shows", width=12)
        table.add_column("where to probe", key="where")
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
        score = self.query_one("#drill-score", Static)
        score.update("")
        score.add_class("-empty")
        if d.hints:
            self._refresh_hints()
        table.focus()
        self.refresh_bindings()

    # ---- actions ----------------------------------------------------------------------

    def check_action(self, action: str, parameters: tuple) -> bool | None:
        scored = self.drill.round.score is not None
        if action in ("read", "name"):
            return not scored and not self.scoring
        if action == "next":
            return scored and self.drill.index + 1 < len(self.drill.exercises)
        return True

    def take(self, point: str, kind: str) -> Reading:
        """Take the reading at (point, kind) and show it in the table."""
        rnd = self.drill.round
        r = rnd.read(point, kind)
        unit = {(o.point, o.kind): o.unit for o in rnd.case.observables}[(point, kind)]
        shown = value(r.value, unit) + (" rms" if kind == "ac" else "")
        self.query_one("#drill-points", DataTable).update_cell(f"{point}|{kind}", "shows",
                                                               shown)
        self.post_message(DrillReadingTaken(r))
        if self.drill.hints:
            self._refresh_hints()
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
        eng = self.drill.round.engine
        choices = [(h.id, h.text) for h in eng.ensemble.hypotheses]
        self.app.push_screen(NameFaultDialog(choices), self._named)

    def _named(self, fault_id: str | None) -> None:
        if fault_id:
            self.name_fault(fault_id)

    def name_fault(self, fault_id: str) -> None:
        """Score the exercise with `fault_id` (in a worker)."""
        self.scoring = True
        self.refresh_bindings()
        self.query_one("#drill-score", Static).update("Scoring: replaying diag's advice…")
        self.query_one("#drill-score", Static).remove_class("-empty")
        self._score(fault_id)

    @work(thread=True, exclusive=True, group="drill-score", exit_on_error=False)
    def _score(self, fault_id: str) -> None:
        try:
            score = self.drill.name(fault_id)
        except DiagError as exc:
            self.post_message(DrillFailed(str(exc)))
            return
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

    def on_drill_scored(self, message: DrillScored) -> None:
        self.scoring = False
        text = score_text(message.score)
        if self.drill.results:
            text += f"\nResult written to {esc(self.drill.results)}."
        if self.drill.index + 1 < len(self.drill.exercises):
            text += "\nPress x for the next exercise."
        else:
            text += "\nThat was the last exercise."
        box = self.query_one("#drill-score", Static)
        box.update(text)
        box.remove_class("-empty")
        self.refresh_bindings()

    def on_drill_failed(self, message: DrillFailed) -> None:
        self.scoring = False
        self.query_one("#drill-score", Static).add_class("-empty")
        self.notify(message.why, severity="error")
        self.refresh_bindings()

    def action_next(self) -> None:
        if self.drill.next_round() is not None:
            self._load_round()

    def action_leave(self) -> None:
        if len(self.app.screen_stack) > 2:
            self.app.pop_screen()
        else:
            self.app.exit()
