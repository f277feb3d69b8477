"""The ranked suspects: probability as a bar, the group number (faults the offered
readings cannot tell apart share one) and the plain-words description."""

from __future__ import annotations

from rich.text import Text
from textual.coordinate import Coordinate
from textual.widgets import DataTable

from diag.core.engine import Diagnosis, Suspect

_EIGHTHS = " ▏▎▍▌▋▊▉"


def bar(p: float, cells: int = 12) -> str:
    """A horizontal bar of `cells` character cells for a probability 0..1."""
    p = min(max(float(p), 0.0), 1.0)
    eighths = round(p * cells * 8)
    full, part = divmod(eighths, 8)
    s = "█" * full + (_EIGHTHS[part] if part else "")
    return s.ljust(cells, "·")


class SuspectsTable(DataTable):
    """The top `limit` suspects of the latest diagnosis; rows keyed by fault id."""

    def __init__(self, limit: int = 12, **kwargs) -> None:
        super().__init__(cursor_type="row", zebra_stripes=False, **kwargs)
        self.limit = limit
        self.suspects: tuple[Suspect, ...] = ()

    def on_mount(self) -> None:
        self.add_column("#", key="rank")
        self.add_column("suspect", key="fault")
        self.add_column("posterior", key="bar")
        self.add_column("p", key="p")
        self.add_column("grp", key="group")
        self.add_column("what", key="text")

    def show(self, diagnosis: Diagnosis | None) -> None:
        """Show the leading suspects; rows are keyed by rank so a new ranking of the same
        length updates cells in place (no rebuild)."""
        # keep the cursor on the same fault only while the user is working in this table
        cursor = self.selected_fault() if self.has_focus else None
        self.suspects = diagnosis.suspects[: self.limit] if diagnosis else ()
        sizes: dict[int, int] = {}
        for s in (diagnosis.suspects if diagnosis else ()):
            sizes[s.group] = sizes.get(s.group, 0) + 1
        rows = [self._cells(i, s, sizes.get(s.group, 1) > 1)
                for i, s in enumerate(self.suspects, 1)]
        if self.row_count == len(rows):
            for r, cells in enumerate(rows):
                for c, cell in enumerate(cells):
                    # the fault id column grows to fit (pairs have long ids)
                    self.update_cell_at(Coordinate(r, c), cell, update_width=c == 1)
        else:
            self.clear()
            for r, cells in enumerate(rows):
                self.add_row(*cells, key=f"rank{r}")
        if cursor:
            faults = [s.fault for s in self.suspects]
            if cursor in faults:
                self.move_cursor(row=faults.index(cursor), animate=False)

    @staticmethod
    def _cells(i: int, s: Suspect, shared: bool) -> tuple:
        style = "bold #f0b429" if i == 1 else ("#d9d9d9" if s.p >= 0.05 else "#8a8f98")
        return (str(i), Text(s.fault, style=style),
                Text(bar(s.p), style="#4fb3bf" if i > 1 else "#f0b429"),
                f"{s.p:6.1%}",
                Text(f"{s.group}" + ("≡" if shared else ""), style="#c792ea" if shared else ""),
                Text(s.text, overflow="ellipsis"))

    def selected_fault(self) -> str | None:
        if not self.suspects or not self.row_count:
            return None
        return self.suspects[min(self.cursor_row, len(self.suspects) - 1)].fault
