"""Offers to resume the autosaved session of a case; returns True to resume."""

from __future__ import annotations

from textual import on
from textual.app import ComposeResult
from textual.binding import Binding
from textual.containers import Horizontal, Vertical
from textual.screen import ModalScreen
from textual.widgets import Button, Footer, Static

from diag.core.session import Session
from diag.tui.fmt import esc, when


class ResumeDialog(ModalScreen[bool]):
    BINDINGS = [
        Binding("y,r", "resume", "Resume", id="resume.yes"),
        Binding("n,escape", "fresh", "Start afresh", id="resume.no"),
    ]

    def __init__(self, session: Session, title: str = "") -> None:
        super().__init__()
        self.session = session
        self.title_text = title  # the case's title: the picker may show behind

    def compose(self) -> ComposeResult:
        s = self.session
        n = len(s.readings)
        with Vertical(id="resume-box", classes="dialog"):
            yield Static("[b]Pick up where you left off?[/b]", classes="dialog-title")
            on = f"“{esc(self.title_text)}”" if self.title_text else "this case"
            yield Static(f"A session on {on} was saved {esc(when(s.saved or s.started))} "
                         f"with {n} reading{'s' if n != 1 else ''}"
                         f"{' and notes' if s.notes.strip() else ''}.")
            with Horizontal(classes="dialog-buttons"):
                yield Button("Resume (y)", id="resume-yes", variant="primary")
                yield Button("Start afresh (n)", id="resume-no")
        yield Footer()

    @on(Button.Pressed, "#resume-yes")
    def action_resume(self) -> None:
        self.dismiss(True)

    @on(Button.Pressed, "#resume-no")
    def action_fresh(self) -> None:
        self.dismiss(False)
