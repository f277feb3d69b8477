"""The help screen: every key of the screen beneath with what it does, what the words and
marks on that screen mean (its HELP_WORDS), and the way to the safety cautions."""

from __future__ import annotations

from rich.text import Text
from textual.app import ComposeResult
from textual.binding import Binding
from textual.containers import VerticalScroll
from textual.screen import ModalScreen
from textual.widgets import DataTable, Footer, Static

from diag.tui.fmt import esc


class HelpScreen(ModalScreen[str | None]):
    """Dismisses with "cautions" when the user asks for the cautions, else None."""

    BINDINGS = [
        Binding("escape,q,question_mark,f1", "close", "Close help", id="help.close"),
        Binding("c", "cautions", "Safety cautions", id="help.cautions"),
    ]

    def __init__(self, title: str, keys: list[tuple[str, str]],
                 words: tuple[tuple[str, str], ...] = ()) -> None:
        super().__init__()
        self.title_text = title
        self.keys = keys
        self.words = words

    def compose(self) -> ComposeResult:
        with VerticalScroll(id="help-box", classes="dialog"):
            yield Static(f"[b]Help: {self.title_text}[/b]", classes="dialog-title")
            if self.words:
                yield Static("\n".join(f"[b]{esc(w)}[/b]  {esc(m)}" for w, m in self.words),
                             id="help-words")
                yield Static("[b]Keys[/b]", classes="dialog-title")
            yield DataTable(id="help-keys", cursor_type="none", show_header=True)
            yield Static("ctrl+p opens the command palette with every action by name. "
                         "The mouse works on tables and buttons.\n"
                         "[b]c[/b] shows the safety cautions; esc closes this help.",
                         classes="dialog-keys")
        yield Footer()

    def on_mount(self) -> None:
        table = self.query_one("#help-keys", DataTable)
        table.add_column("key", key="key")
        table.add_column("does", key="does")
        for key, desc in self.keys:
            table.add_row(Text(key, style="bold"), Text(desc))

    def action_close(self) -> None:
        self.dismiss(None)

    def action_cautions(self) -> None:
        self.dismiss("cautions")
