"""The safety cautions (rules/cautions.yaml): shown on first start, reachable from help."""

from __future__ import annotations

from textual.app import ComposeResult
from textual.binding import Binding
from textual.containers import VerticalScroll
from textual.screen import ModalScreen
from textual.widgets import Footer, Static

from diag.core.session import Caution
from diag.tui.fmt import esc


class CautionsScreen(ModalScreen[None]):
    """Lists every caution; any of the bound keys dismisses it."""

    BINDINGS = [
        Binding("enter,escape,space", "dismiss_cautions", "Understood", id="cautions.close"),
    ]

    def __init__(self, cautions: tuple[Caution, ...], defer: str, first_start: bool = False):
        super().__init__()
        self.cautions = cautions
        self.defer = defer
        self.first_start = first_start

    def compose(self) -> ComposeResult:
        with VerticalScroll(id="cautions-box", classes="dialog"):
            head = "Before you power anything up" if self.first_start else "Bench safety"
            yield Static(f"[b]{head}[/b]", classes="dialog-title")
            for c in self.cautions:
                yield Static(f"[b]{esc(c.title)}[/b]\n{esc(c.text)}", classes="caution")
            if self.defer:
                yield Static(esc(self.defer), classes="caution-defer")
            yield Static("[dim]enter, space or esc: understood[/dim]", classes="dialog-keys")
        yield Footer()

    def action_dismiss_cautions(self) -> None:
        self.dismiss(None)
