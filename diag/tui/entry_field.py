"""The reading entry field of the session screen: an Input that acts on enter, backspace,
up, down and escape as each key arrives, and takes a pasted column of values row by row.

Textual runs an Input's enter and backspace as key bindings, once the key has passed up
to the app; keys of a burst behind them (fast typing, a terminal's paste without
bracketing) can reach the field first, so "4.9", enter, "1.7" could submit "4.91.7".
Acting on them in the field's own key handler keeps every key in the order typed."""

from __future__ import annotations

from collections.abc import Callable

from textual import events
from textual.widgets import Input


class EntryField(Input):
    """`submit(text)` is called on enter with the field's text, `move(step)` on up (-1)
    and down (+1), `leave()` on escape, `paste(text)` with a paste that holds a line break
    (each line a value for the next row)."""

    def __init__(self, submit: Callable[[str], None], move: Callable[[int], None],
                 leave: Callable[[], None], paste: Callable[[str], None],
                 **kwargs) -> None:
        super().__init__(**kwargs)
        self._on_enter, self._on_step, self._on_leave, self._on_paste_text = (
            submit, move, leave, paste)

    async def _on_key(self, event: events.Key) -> None:
        if event.key == "enter":
            self._on_enter(self.value)
        elif event.key == "backspace":
            self.action_delete_left()
        elif event.key in ("up", "down"):
            self._on_step(-1 if event.key == "up" else 1)
        elif event.key == "escape":
            self._on_leave()
        else:
            return  # Input's own handler (printable keys) runs next
        event.stop()
        event.prevent_default()

    def _on_paste(self, event: events.Paste) -> None:
        if "\n" in event.text or "\r" in event.text:
            event.stop()
            event.prevent_default()
            self._on_paste_text(event.text)
        # else Input's own handler puts the text in at the cursor
