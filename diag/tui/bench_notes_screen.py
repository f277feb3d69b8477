"""The bench notes in full, scrollable: the session screen's panel shows only a few lines."""

from __future__ import annotations

from textual.app import ComposeResult
from textual.binding import Binding
from textual.containers import VerticalScroll
from textual.screen import ModalScreen
from textual.widgets import Footer, Static


class BenchNotesScreen(ModalScreen[None]):
    BINDINGS = [Binding("escape,q,b", "close", "Close", id="bench_notes.close")]

    def __init__(self, lines: list[str]) -> None:
        super().__init__()
        self.lines = lines

    def compose(self) -> ComposeResult:
        with VerticalScroll(id="bench-notes-box", classes="dialog"):
            yield Static("[b]Bench notes[/b]", classes="dialog-title")
            yield Static("\n\n".join(self.lines) or "[dim]none yet[/dim]",
                         id="bench-notes-full")
            yield Static("[dim]esc: close[/dim]", classes="dialog-keys")
        yield Footer()

    def action_close(self) -> None:
        self.dismiss(None)
