"""Suspect detail: for one hypothesis, its predicted band against the reading (and the
healthy band) at every offered point, and how to confirm it at the bench."""

from __future__ import annotations

from rich.text import Text
from textual.app import ComposeResult
from textual.binding import Binding
from textual.containers import Vertical
from textual.screen import Screen
from textual.widgets import DataTable, Footer, Static

from diag.core.engine import Diagnosis, Engine, Reading
from diag.core.session import band_offset
from diag.tui import fmt
from diag.tui.fmt import esc


class SuspectDetailScreen(Screen[None]):
    BINDINGS = [Binding("escape,q,backspace", "close", "Back to the session", id="detail.close")]

    def __init__(self, engine: Engine, fault: str, readings: tuple[Reading, ...],
                 diagnosis: Diagnosis | None) -> None:
        super().__init__()
        self.engine = engine
        self.fault = fault
        self.readings = {(r.point, r.kind): r for r in readings}
        self.diagnosis = diagnosis

    def compose(self) -> ComposeResult:
        hyp = self.engine.hypothesis(self.fault)
        sus = None
        if self.diagnosis:
            sus = next((s for s in self.diagnosis.suspects if s.fault == self.fault), None)
        mates = []
        if sus and self.diagnosis:
            mates = [s.fault for s in self.diagnosis.suspects
                     if s.group == sus.group and s.fault != self.fault]
        head = f"[b]{esc(self.fault)}[/b]  {esc(hyp.text)}"
        stats = f"prior {hyp.prior:.3%}"
        if sus:
            stats += f"   now p = {sus.p:.1%}   group {sus.group}"
        with Vertical(id="detail-body"):
            yield Static(head, id="detail-head")
            yield Static(stats, id="detail-stats")
            if mates:
                yield Static("the offered readings cannot tell it from: "
                             + esc(", ".join(mates[:8])), id="detail-mates")
            yield DataTable(id="detail-bands", cursor_type="row", zebra_stripes=True)
            yield Static(f"[b]confirm at the bench[/b]\n{esc(hyp.confirm)}", id="detail-confirm")
        yield Footer()

    def on_mount(self) -> None:
        table = self.query_one("#detail-bands", DataTable)
        for label, key in (("point", "point"), ("kind", "kind"),
                           ("predicted if " + self.fault, "pred"), ("healthy", "healthy"),
                           ("reading", "reading"), ("agrees", "agrees")):
            table.add_column(label, key=key)
        pred = self.engine.bands(self.fault)
        healthy = {(b.observable.point, b.observable.kind): b
                   for b in self.engine.bands("healthy")}
        for b in pred:
            o = b.observable
            h = healthy.get((o.point, o.kind))
            r = self.readings.get((o.point, o.kind))
            if r is None:
                agrees = Text("not taken", style="dim")
            elif band_offset(b, r.value) == 0:
                agrees = Text("yes", style="green")
            else:
                agrees = Text("no", style="bold red")
            table.add_row(Text(o.point, style="bold"), o.kind,
                          f"{fmt.value(b.low, o.unit)} … {fmt.value(b.high, o.unit)}",
                          f"{fmt.value(h.low, o.unit)} … {fmt.value(h.high, o.unit)}" if h else "",
                          fmt.value(r.value, o.unit) if r else "", agrees,
                          key=f"{o.point}/{o.kind}")
        table.focus()

    def action_close(self) -> None:
        self.dismiss(None)
