"""Around a node: for one test point, every part that touches its node, by which
terminal, and where that part's other terminals go."""

from __future__ import annotations

from rich.text import Text
from textual.app import ComposeResult
from textual.binding import Binding
from textual.containers import Vertical
from textual.screen import ModalScreen
from textual.widgets import DataTable, Footer, Static

from diag.core.case import TERMINALS, Case, Point
from diag.tui.fmt import esc


def node_of(case: Case, point: Point) -> str | None:
    """The node a point probes; for a supply point, the supply's plus terminal."""
    if point.node:
        return point.node
    if point.supply:
        return case.part(point.supply).terminal("plus")
    return None


class NodeScreen(ModalScreen[None]):
    BINDINGS = [Binding("escape,n,q", "close", "Close", id="node.close")]

    def __init__(self, case: Case, point_id: str) -> None:
        super().__init__()
        self.case = case
        self.point = case.point(point_id)
        self.node = node_of(case, self.point)

    def compose(self) -> ComposeResult:
        with Vertical(id="node-box", classes="dialog"):
            p = self.point
            how = (f"current drawn from {esc(p.supply)}" if p.supply
                   else f"node [b]{esc(p.node)}[/b]" +
                   (f" against {esc(p.minus)}" if p.minus else ""))
            yield Static(f"[b]Around {esc(p.id)}[/b]: {how}; probe: {esc(p.where)}",
                         classes="dialog-title")
            yield DataTable(id="node-parts", cursor_type="row", zebra_stripes=True)
            yield Static("[dim]esc: close[/dim]", classes="dialog-keys")
        yield Footer()

    def on_mount(self) -> None:
        table = self.query_one("#node-parts", DataTable)
        table.add_column("part", key="part")
        table.add_column("kind", key="kind")
        table.add_column("touches by", key="term")
        table.add_column("other ends go to", key="other")
        if self.node is None:
            return
        for part, term in self.case.parts_at(self.node):
            others = [f"{t} → {n}" for t, n in zip(TERMINALS[part.kind], part.nodes, strict=True)
                      if t != term]
            table.add_row(Text(part.ref, style="bold"), part.kind, term,
                          Text(", ".join(others)), key=f"{part.ref}.{term}")
        table.focus()

    def action_close(self) -> None:
        self.dismiss(None)
