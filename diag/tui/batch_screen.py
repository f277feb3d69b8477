"""The batch screen: browse a triaged batch and open one unit in a session screen.

`BatchScreen(result)` takes a diag.core.triage.TriageResult. The top shows the summary
across the batch (which faults and parts dominate, how many units fit no hypothesis, look
healthy, are undecided or lack readings, and which rows of the file were refused, with
their units); the table lists every unit with its leading suspects, `fits` and the most
useful reading still missing, and marks a unit that lost rows. `f` cycles a filter by
status; enter opens the selected unit in `SessionScreen(engine, readings=..., label=unit)`.
"""

from __future__ import annotations

from dataclasses import dataclass

from rich.text import Text
from textual import on
from textual.app import ComposeResult
from textual.binding import Binding
from textual.message import Message
from textual.screen import Screen
from textual.widgets import DataTable, Footer, Static

from diag.core.triage import TriageResult, UnitResult
from diag.tui.fmt import esc

FILTERS = ("all", "fault", "undecided", "no-fit", "healthy", "incomplete")


@dataclass
class UnitOpened(Message):
    """A unit of the batch was opened in a session screen."""

    unit: str


def summary_text(result: TriageResult, top: int = 5) -> str:
    """The batch summary in a few lines (Textual markup, ids escaped)."""
    s = result.summary
    lines = [f"{s['units']} units: {s['faulty']} with a fault found, "
             + (f"{len(s['undecided'])} undecided, " if s["undecided"] else "")
             + f"{len(s['healthy'])} healthy, [b]{len(s['no_fit'])} fit no hypothesis[/], "
             f"{len(s['incomplete'])} incomplete, {s['rows_rejected']} "
             f"row{'' if s['rows_rejected'] == 1 else 's'} refused."]
    if result.rejected:
        rows = [f"row {r.row}" + (f" ({esc(r.unit)})" if r.unit else "")
                if r.row is not None else esc(r.text) for r in result.rejected]
        more = f" and {len(rows) - top} more" if len(rows) > top else ""
        lines.append("Rows refused (left out): " + ", ".join(rows[:top]) + more)
    if s["by_fault"]:
        lines.append("Faults: " + ", ".join(f"{esc(r['fault'])} ×{r['units']}"
                                             for r in s["by_fault"][:top]))
    if s["by_part"]:
        lines.append("Parts: " + ", ".join(f"{esc(r['part'])} ×{r['units']}"
                                            for r in s["by_part"][:top]))
    if s["healthy"] and s.get("healthy_lookalikes"):
        lines.append("Found healthy, but the readings cannot rule out: " + ", ".join(
            f"{esc(r['fault'])} {r['expected']:.1f}" for r in s["healthy_lookalikes"][:top]))
    return "\n".join(lines)


class BatchScreen(Screen):
    """Every unit of a triaged batch; enter opens one in a session screen."""

    BINDINGS = [
        Binding("enter", "open_unit", "Open unit", id="batch.open"),
        Binding("f", "cycle_filter", "Filter", id="batch.filter"),
        Binding("escape", "leave", "Leave", id="batch.leave"),
    ]
    DEFAULT_CSS = """
    BatchScreen #batch-title { height: auto; padding: 0 1; text-style: bold; }
    BatchScreen #batch-summary { height: auto; padding: 0 1; border: round $primary; }
    BatchScreen #batch-units { height: 1fr; }
    """

    def __init__(self, result: TriageResult) -> None:
        super().__init__()
        self.result = result
        self.filter = "all"
        self.shown: list[UnitResult] = []

    def compose(self) -> ComposeResult:
        yield Static(id="batch-title")
        yield Static(summary_text(self.result), id="batch-summary")
        yield DataTable(id="batch-units", cursor_type="row", zebra_stripes=True)
        yield Footer()

    def on_mount(self) -> None:
        t = self.query_one("#batch-units", DataTable)
        for key, label in (("unit", "unit"), ("status", "status"), ("s1", "1st suspect"),
                           ("s2", "2nd"), ("s3", "3rd"), ("fits", "fits"),
                           ("next", "next reading")):
            t.add_column(label, key=key)
        self._fill()
        t.focus()

    def _keep(self, u: UnitResult) -> bool:
        if self.filter == "all":
            return True
        if self.filter == "incomplete":
            return u.incomplete
        return u.status == self.filter

    def _fill(self) -> None:
        t = self.query_one("#batch-units", DataTable)
        t.clear()
        self.shown = [u for u in self.result.units if self._keep(u)]
        styles = {"no-fit": "bold red", "healthy": "green", "fault": "",
                  "undecided": "yellow"}
        for u in self.shown:
            d = u.diagnosis
            cells = [f"{s.fault} {s.p:.2f}" for s in d.suspects[:3]]
            cells += [""] * (3 - len(cells))
            nxt = f"{d.next[0].point} {d.next[0].kind}" if d.next else "—"
            status = u.status + (" · incomplete" if u.incomplete else "")
            if u.refused:
                status += f" · {len(u.refused)} row{'s' if len(u.refused) > 1 else ''} refused"
            t.add_row(u.unit, Text(status, style=styles.get(u.status, "")), *cells,
                      "yes" if d.fits else Text("no", style="bold red"), nxt, key=u.unit)
        self.query_one("#batch-title", Static).update(
            f"Batch · {esc(self.result.case.title)} · showing {len(self.shown)} of "
            f"{len(self.result.units)} units (filter: {self.filter})")

    def action_cycle_filter(self) -> None:
        self.filter = FILTERS[(FILTERS.index(self.filter) + 1) % len(FILTERS)]
        self._fill()

    def check_action(self, action: str, parameters: tuple) -> bool | None:
        if action == "open_unit":
            return bool(self.shown)
        return True

    def selected(self) -> UnitResult | None:
        t = self.query_one("#batch-units", DataTable)
        if not self.shown or not t.row_count:
            return None
        return self.shown[min(t.cursor_row, len(self.shown) - 1)]

    def action_open_unit(self) -> None:
        u = self.selected()
        if u is None:
            return
        from diag.tui.session_screen import SessionScreen

        self.app.push_screen(SessionScreen(self.result.engine, readings=u.readings,
                                           label=u.unit))
        self.post_message(UnitOpened(u.unit))

    @on(DataTable.RowSelected, "#batch-units")
    def _row_selected(self, event: DataTable.RowSelected) -> None:
        event.stop()
        self.action_open_unit()

    def action_leave(self) -> None:
        if len(self.app.screen_stack) > 2:
            self.app.pop_screen()
        else:
            self.app.exit()
