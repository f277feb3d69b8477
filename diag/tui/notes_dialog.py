"""Edits the session's free-text notes; returns the new text (None when unchanged).

Closing keeps what was typed, whichever key closes it: notes written at the bench are not
lost to a reflex press of escape. ctrl+z in the text undoes edits."""

from __future__ import annotations

from textual.app import ComposeResult
from textual.binding import Binding
from textual.containers import Vertical
from textual.screen import ModalScreen
from textual.widgets import Footer, Static, TextArea


class NotesDialog(ModalScreen[str | None]):
    BINDINGS = [
        Binding("ctrl+s,escape", "keep", "Keep notes and close", id="notes.keep",
                priority=True),
    ]

    def __init__(self, text: str) -> None:
        super().__init__()
        self.text = text

    def compose(self) -> ComposeResult:
        with Vertical(id="notes-box", classes="dialog"):
            yield Static("[b]Session notes[/b]", classes="dialog-title")
            yield TextArea(self.text, id="notes-text", soft_wrap=True)
            yield Static("[dim]esc or ctrl+s: keep and close   ctrl+z: undo an edit[/dim]",
                         classes="dialog-keys")
        yield Footer()

    def action_keep(self) -> None:
        text = self.query_one("#notes-text", TextArea).text
        self.dismiss(text if text != self.text else None)
