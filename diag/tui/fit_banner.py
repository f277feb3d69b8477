"""The warning that nothing explains the readings: full width, high contrast, shown
only while the latest diagnosis says `fits` is false."""

from __future__ import annotations

from textual.widgets import Static

from diag.core.engine import Diagnosis
from diag.tui.fmt import esc


def first_sentence(text: str) -> str:
    """The first sentence of `text` (up to the first ". " or the end)."""
    text = " ".join(text.split())
    cut = text.find(". ")
    return text if cut < 0 else text[: cut + 1]


class FitBanner(Static):
    """Hidden while the readings fit some hypothesis."""

    def show(self, diagnosis: Diagnosis | None) -> None:
        if diagnosis is None or diagnosis.fits:
            self.display = False
            self.update("")
            return
        why = first_sentence(diagnosis.fit_text) or "every hypothesis is improbable"
        self.update("[b]⚠ NOTHING IN THE MODEL EXPLAINS THESE READINGS[/b]  "
                    f"{esc(why)}  [i](what to check: bench notes)[/i]")
        self.display = True
