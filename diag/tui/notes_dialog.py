"""Edits the session's free-text notes; returns the new text, or None to keep the old."""

from __future__ import annotations

from textual.app import ComposeResult
from textual.binding import Binding
from textual.containers import Vertical
from textual.screen import ModalScreen
from textual.widgets import Footer, Static, TextArea


class NotesDialog(ModalScreen[str | None]):
    BINDINGS = [
        Binding("ctrl+s", "keep", "Keep notes", id="notes.keep", priority=True),
        Binding("escape", "cancel", "Cancel", id="notes.cancel"),
    ]

    def __init__(self, text: str) -> None:
        super().__init__()
        self.text = text

    def compose(self) -> ComposeResult:
        with Vertical(id="notes-box", classes="dialog"):
            yield Static("[b]Session notes[/b]", classes="dialog-title")
            yield TextArea(self.text, id="notes-text", soft_wrap=True)
            yield Static("[dim]ctrl+s: keep   esc: cancel[/dim]", classes="dialog-keys")
        yield Footer()

    def action_keep(self) -> None:
        self.dismiss(self.query_one("#notes-text", TextArea).text)

    def action_cancel(self) -> None:
        self.dismiss(None)
