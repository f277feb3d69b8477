"""The bench interface: one App that hosts the picker, the session, the drill and the
batch screens.

    DiagApp(case_path=None, session_path=None, drill=None, batch=None, rules=None)

With `drill` (a diag.core.drill.Drill) it opens diag.tui.drill_screen.DrillScreen(drill);
with `batch` (a diag.core.triage.TriageResult) diag.tui.batch_screen.BatchScreen(batch);
with `case_path` the session screen of that case (offering to resume its autosaved
session, or resuming `session_path`); otherwise the case picker. The first start shows the
safety cautions and leaves a marker in paths.state_dir().
"""

from __future__ import annotations

from collections.abc import Iterable
from functools import partial
from pathlib import Path

from textual.app import App, SystemCommand
from textual.binding import Binding
from textual.screen import Screen
from textual.theme import Theme

from diag.core import paths
from diag.core.engine import Engine
from diag.core.errors import DiagError
from diag.core.rules import load_rules
from diag.core.session import Caution, find_resumable, load_cautions, load_session
from diag.tui.cautions_screen import CautionsScreen
from diag.tui.help_screen import HelpScreen
from diag.tui.messages import CasePicked

MARKER = "cautions-seen"

# Our own palette: warm amber on dark slate, teal for bars, violet for shared groups.
BENCH_THEME = Theme(
    name="diag-bench", primary="#f0b429", secondary="#4fb3bf", accent="#c792ea",
    warning="#ffb454", error="#ff5f56", success="#7bc96f", foreground="#e6e1d6",
    background="#14171c", surface="#1c2129", panel="#262c36", dark=True,
)


def first_start() -> bool:
    """True until the safety cautions have been dismissed once (marker in state_dir)."""
    return not (paths.state_dir() / MARKER).exists()


def mark_started() -> None:
    (paths.state_dir() / MARKER).write_text("the safety cautions were shown\n", encoding="utf-8")


class DiagApp(App[None]):
    CSS_PATH = "app.tcss"
    TITLE = "diag bench"
    ENABLE_COMMAND_PALETTE = True

    BINDINGS = [
        Binding("question_mark,f1", "help", "Help", id="app.help"),
        Binding("ctrl+o", "pick", "Cases", id="app.pick"),
        Binding("ctrl+q", "quit", "Quit", id="app.quit", priority=True),
    ]

    def __init__(self, case_path: str | None = None, session_path: str | None = None,
                 drill=None, batch=None, rules=None) -> None:
        super().__init__()
        self.case_path = case_path
        self.session_path = session_path
        self.drill = drill
        self.batch = batch
        self.rules = rules if rules is not None else load_rules()
        self.last_report: Path | None = None
        self._cautions: tuple[tuple[Caution, ...], str] | None = None

    # ------------------------------------------------------------------ start

    def on_mount(self) -> None:
        self.register_theme(BENCH_THEME)
        self.theme = "diag-bench"
        if self.drill is not None:
            from diag.tui.drill_screen import DrillScreen

            self.push_screen(DrillScreen(self.drill))
        elif self.batch is not None:
            from diag.tui.batch_screen import BatchScreen

            self.push_screen(BatchScreen(self.batch))
        elif self.case_path:
            self.push_screen(self._picker())
            self.open_case(self.case_path, self.session_path)
        else:
            self.push_screen(self._picker())
        if first_start():
            cautions, defer = self.cautions()
            self.push_screen(CautionsScreen(cautions, defer, first_start=True),
                             lambda _: mark_started())

    def _picker(self) -> Screen:
        from diag.tui.picker_screen import PickerScreen

        return PickerScreen()

    def cautions(self) -> tuple[tuple[Caution, ...], str]:
        """The safety cautions and the closing sentence, from rules/cautions.yaml."""
        if self._cautions is None:
            self._cautions = load_cautions(self.rules)
        return self._cautions

    def on_case_picked(self, msg: CasePicked) -> None:
        self.open_case(msg.path)

    def open_case(self, path: str, session_path: str | None = None) -> None:
        """Load a case and open its session screen, resuming a session when asked."""
        from diag.core.case import load_case
        from diag.tui.resume_dialog import ResumeDialog
        from diag.tui.session_screen import SessionScreen

        try:
            case = load_case(path)
            session = load_session(session_path) if session_path else None
        except DiagError as exc:
            self.notify(str(exc), title="cannot open", severity="error", timeout=15)
            return
        engine = Engine(case, self.rules)
        if session is not None:
            if session.case_hash != case.hash:
                self.notify("the case file changed since this session was saved; its "
                            "readings are checked against the file as it is now",
                            severity="warning", timeout=10)
            self.push_screen(SessionScreen(engine, session=session))
            return
        old = find_resumable(case)
        if old is None:
            self.push_screen(SessionScreen(engine))
            return

        def chosen(resume: bool | None) -> None:
            self.push_screen(SessionScreen(engine, session=old if resume else None))

        self.push_screen(ResumeDialog(old, case.title), chosen)

    # ------------------------------------------------------------------ actions

    async def action_quit(self) -> None:
        """Ctrl+Q: quit, after asking where a screen below would lose work by it (a
        drill's unended exercise: DrillScreen.ask_before_quit); Ctrl+Q again over that
        question quits."""
        if getattr(self.screen, "quit_question", False):
            self.exit()
            return
        for screen in reversed(self.screen_stack):
            ask = getattr(screen, "ask_before_quit", None)
            if ask is not None:
                if ask():
                    return
                break
        self.exit()

    def action_help(self) -> None:
        screen = self.screen
        if isinstance(screen, HelpScreen):
            return
        keys = []
        seen = set()
        # diag's own keys (they carry ids) first, then Textual's and the focused widget's
        ordered = sorted(screen.active_bindings.items(),
                         key=lambda kv: (kv[1].binding.id is None,
                                         not isinstance(kv[1].node, (Screen, App))))
        for _key, active in ordered:
            b = active.binding
            if not b.description or (b.action, b.description) in seen:
                continue
            seen.add((b.action, b.description))
            keys.append((self.get_key_display(b), b.description
                         + ("" if active.enabled else " (not now)")))

        def after(choice: str | None) -> None:
            if choice == "cautions":
                cautions, defer = self.cautions()
                self.push_screen(CautionsScreen(cautions, defer))

        self.push_screen(HelpScreen(type(screen).__name__.replace("Screen", "").lower()
                                    or "screen", keys, getattr(screen, "HELP_WORDS", ())),
                         after)

    def action_pick(self) -> None:
        from diag.tui.picker_screen import PickerScreen

        if isinstance(self.screen, PickerScreen):
            return
        self.push_screen(PickerScreen())

    def action_cautions(self) -> None:
        cautions, defer = self.cautions()
        self.push_screen(CautionsScreen(cautions, defer))

    def get_system_commands(self, screen: Screen) -> Iterable[SystemCommand]:
        """The palette offers every action that applies now: the screen's and the app's
        bindings by their descriptions, the cautions, and Textual's own."""
        yield from super().get_system_commands(screen)
        yield SystemCommand("Safety cautions", "Show the bench safety cautions",
                            self.action_cautions)
        seen = {"Quit", "Help"}
        for active in screen.active_bindings.values():
            b = active.binding
            if not active.enabled or not b.description or b.description in seen:
                continue
            seen.add(b.description)
            yield SystemCommand(b.description, f"key: {self.get_key_display(b)}",
                                partial(self.run_action, b.action, active.node))
        yield SystemCommand("Help", "List every key of this screen", self.action_help)
