"""The test-point table of the session screen: the healthy band, the reading taken, how far
it sits from healthy and where to probe (last, so that a narrow panel cuts the description
rather than the figures). An arrow marks the advised next reading. Rows are keyed
"POINT/kind". Keys and pastes are first offered to the screen's `typed` and `pasted`
(a value typed in place), in the order they arrive."""

from __future__ import annotations

from collections.abc import Callable

from rich.text import Text
from textual import events
from textual.widgets import DataTable

from diag.core.case import Case, Observable
from diag.core.engine import Band, Reading
from diag.core.session import band_offset
from diag.tui import fmt


def row_key(point: str, kind: str) -> str:
    return f"{point}/{kind}"


class PointsTable(DataTable):
    """One row per offered reading (point, kind), in case order. Given immutable data
    through `show`; the screen decides what to do when a row is selected."""

    COLUMNS = (("", "next"), ("point", "point"), ("kind", "kind"), ("healthy", "healthy"),
               ("reading", "reading"), ("off healthy", "off"), ("where to probe", "where"))
    NEXT_MARK = "→"

    def __init__(self, case: Case, typed: Callable[[events.Key], bool] | None = None,
                 pasted: Callable[[str], None] | None = None, **kwargs) -> None:
        super().__init__(cursor_type="row", zebra_stripes=True, **kwargs)
        self.case = case
        self._typed, self._pasted = typed, pasted
        self.observables: tuple[Observable, ...] = case.observables
        self._shown: dict[str, tuple] = {}
        self._marked: str | None = None

    def on_mount(self) -> None:
        for label, key in self.COLUMNS:
            if key == "where":
                self.add_column(label, key=key, width=30 if self.app.size.width >= 110 else 14)
            elif key == "next":
                self.add_column(label, key=key, width=1)
            else:
                self.add_column(label, key=key)
        for o in self.observables:
            where = self.case.point(o.point).where
            self.add_row("", Text(o.point, style="bold"), o.kind, "…", "", "",
                         Text(where, overflow="ellipsis"), key=row_key(o.point, o.kind))

    async def _on_key(self, event: events.Key) -> None:
        # before the table's bindings, which run once the key has passed up to the app:
        # a burst of keys keeps its order (see diag.tui.entry_field)
        if self._typed is not None and self._typed(event):
            event.stop()
            event.prevent_default()

    def _on_paste(self, event: events.Paste) -> None:
        if self._pasted is not None:
            event.stop()
            self._pasted(event.text)

    def mark_next(self, point: str | None, kind: str | None = None) -> None:
        """Put the arrow on the advised next reading's row (None: on no row)."""
        key = row_key(point, kind) if point else None
        if key == self._marked:
            return
        if self._marked is not None:
            self.update_cell(self._marked, "next", "")
        if key is not None:
            self.update_cell(key, "next", Text(self.NEXT_MARK, style="bold"))
        self._marked = key

    def observable_at_cursor(self) -> Observable | None:
        if not self.row_count:
            return None
        return self.observables[min(self.cursor_row, len(self.observables) - 1)]

    def show(self, bands: dict[tuple[str, str], Band] | None,
             readings: dict[tuple[str, str], Reading]) -> None:
        """Refresh the band, reading and offset cells of the rows that changed."""
        for o in self.observables:
            key = row_key(o.point, o.kind)
            band = bands.get((o.point, o.kind)) if bands else None
            r = readings.get((o.point, o.kind))
            state = (band, r.value if r else None)
            if self._shown.get(key) == state:
                continue
            self._shown[key] = state
            unit = o.unit
            healthy = (f"{fmt.value(band.low, unit)} … {fmt.value(band.high, unit)}"
                       if band else "…")
            self.update_cell(key, "healthy", healthy, update_width=True)
            self.update_cell(key, "reading",
                             Text(fmt.reading(r.value, unit), style="bold") if r else "",
                             update_width=True)
            if r is None or band is None:
                off = Text("")
            else:
                d = band_offset(band, r.value)
                if d == 0:
                    off = Text("in band", style="green")
                else:
                    arrow = "▲" if d > 0 else "▼"
                    off = Text(f"{arrow} {fmt.value(abs(d), unit)}", style="bold yellow")
            self.update_cell(key, "off", off, update_width=True)
