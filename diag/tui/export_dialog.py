"""Asks where to write the Markdown report; returns the path typed, or None. A file that
already exists is replaced only when enter is pressed again on the same path (the report
of the previous unit is not lost to a reflex enter)."""

from __future__ import annotations

from pathlib import Path

from textual import on
from textual.app import ComposeResult
from textual.binding import Binding
from textual.containers import Vertical
from textual.screen import ModalScreen
from textual.widgets import Footer, Input, Static


class ExportDialog(ModalScreen[str | None]):
    BINDINGS = [Binding("escape", "cancel", "Cancel", id="export.cancel")]

    def __init__(self, default_path: str, error: str = "") -> None:
        super().__init__()
        self.default_path = default_path
        self.error = error
        self._replace: str | None = None  # the existing path enter was pressed on once

    def compose(self) -> ComposeResult:
        with Vertical(id="export-box", classes="dialog"):
            yield Static("[b]Write the bench report (Markdown) to[/b]", classes="dialog-title")
            yield Input(value=self.default_path, id="export-path", select_on_focus=False)
            yield Static(self.error, id="export-error", classes="error-line", markup=False)
            yield Static("[dim]enter: write   esc: cancel[/dim]", classes="dialog-keys")
        yield Footer()

    @on(Input.Submitted, "#export-path")
    def _submit(self, event: Input.Submitted) -> None:
        path = event.value.strip()
        if not path:
            self.query_one("#export-error", Static).update("type a file path")
            return
        if Path(path).expanduser().exists() and path != self._replace:
            self._replace = path
            self.query_one("#export-error", Static).update(
                f"{path} already exists: enter again to replace it, or change the name")
            return
        self.dismiss(path)

    def action_cancel(self) -> None:
        self.dismiss(None)
