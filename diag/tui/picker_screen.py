"""The start screen: the bundled cases and the user's own, a preview of the highlighted
one (its `about` text, part and point counts), and a field for any case path."""

from __future__ import annotations

from pathlib import Path

from rich.text import Text
from textual import on
from textual.app import ComposeResult
from textual.binding import Binding
from textual.containers import Horizontal, Vertical
from textual.screen import Screen
from textual.widgets import DataTable, Footer, Input, Static

from diag.core import paths
from diag.core.case import Case, load_case
from diag.core.errors import DiagError
from diag.tui.fmt import esc
from diag.tui.messages import CasePicked


def case_files() -> list[tuple[str, Path]]:
    """(origin, path) of every case file: bundled first, then the user's, by name."""
    out: list[tuple[str, Path]] = []
    for origin, folder in (("bundled", paths.cases_dir()), ("yours", paths.user_cases_dir())):
        if folder.is_dir():
            out += [(origin, p) for p in sorted(folder.glob("*.yaml"))]
    return out


class PickerScreen(Screen[None]):
    BINDINGS = [
        Binding("enter", "open_highlighted", "Open case", id="picker.open", show=True),
        Binding("slash,p", "type_path", "Type a path", id="picker.path"),
        Binding("escape", "back_to_list", "Back to list", id="picker.back", show=False),
    ]

    def __init__(self) -> None:
        super().__init__()
        self.files = case_files()
        self._loaded: dict[Path, Case | str] = {}

    def compose(self) -> ComposeResult:
        yield Static("[b]diag bench[/b] · pick a circuit", id="title-bar")
        with Horizontal(id="picker-body"):
            yield DataTable(id="case-list", cursor_type="row", zebra_stripes=True)
            with Vertical(id="preview-box"):
                yield Static("", id="preview")
        with Horizontal(id="path-row"):
            yield Static("case file ▸", id="path-label")
            yield Input(placeholder="any case path, e.g. ~/cases/amp.yaml", id="case-path")
        yield Footer()

    def on_mount(self) -> None:
        table = self.query_one("#case-list", DataTable)
        table.add_column("case", key="case")
        table.add_column("from", key="from")
        for origin, path in self.files:
            table.add_row(Text(path.stem, style="bold"), origin, key=str(path))
        if not self.files:
            self.query_one("#preview", Static).update(
                f"No case files found in {esc(paths.cases_dir())} or "
                f"{esc(paths.user_cases_dir())}. Type a path below.")
            self.query_one("#case-path", Input).focus()
        else:
            table.focus()
            self._preview(self.files[0][1])

    def check_action(self, action: str, parameters: tuple[object, ...]) -> bool | None:
        if action == "open_highlighted":
            return bool(self.files) and isinstance(self.focused, DataTable)
        if action == "back_to_list":
            return isinstance(self.focused, Input) and bool(self.files)
        return True

    def _case(self, path: Path) -> Case | str:
        if path not in self._loaded:
            try:
                self._loaded[path] = load_case(str(path))
            except DiagError as exc:
                self._loaded[path] = str(exc)
        return self._loaded[path]

    def _preview(self, path: Path) -> None:
        c = self._case(path)
        origin = dict((p, o) for o, p in self.files).get(path, "typed")
        where = {"bundled": "bundled case", "yours": "your cases folder"}.get(origin, "")
        box = self.query_one("#preview", Static)
        if isinstance(c, str):
            box.update(f"[b]{esc(path.name)}[/b]\n\n[red]this file has problems:[/red]\n"
                       f"{esc(c)}")
            return
        ac = sum(1 for o in c.observables if o.kind == "ac")
        about = "\n\n".join(" ".join(par.split()) for par in c.about.strip().split("\n\n"))
        box.update(f"[b]{esc(c.title)}[/b]\n[dim]{esc(path.name)} · {where}[/dim]\n"
                   f"{len(c.parts)} parts · {len(c.points)} test points · "
                   f"{len(c.observables)} readings offered ({ac} AC)\n\n{esc(about)}")

    @on(DataTable.RowHighlighted, "#case-list")
    def _highlighted(self, event: DataTable.RowHighlighted) -> None:
        self._preview(Path(str(event.row_key.value)))

    @on(DataTable.RowSelected, "#case-list")
    def _selected(self, event: DataTable.RowSelected) -> None:
        self._open(Path(str(event.row_key.value)))

    def action_open_highlighted(self) -> None:
        table = self.query_one("#case-list", DataTable)
        if self.files:
            self._open(self.files[table.cursor_row][1])

    def action_type_path(self) -> None:
        self.query_one("#case-path", Input).focus()

    def action_back_to_list(self) -> None:
        self.query_one("#case-list", DataTable).focus()

    @on(Input.Submitted, "#case-path")
    def _typed(self, event: Input.Submitted) -> None:
        text = event.value.strip()
        if text:
            self._open(Path(text).expanduser())

    def _open(self, path: Path) -> None:
        c = self._case(path)
        if isinstance(c, str):
            self.notify(c, title="cannot open this case", severity="error", timeout=10)
            return
        self.post_message(CasePicked(str(path)))
