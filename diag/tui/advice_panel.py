"""The proposed next reading with its reason, and the bench notes drawn from the
readings so far."""

from __future__ import annotations

from textual.widgets import Static

from diag.core.advise import format_bits
from diag.core.engine import Diagnosis
from diag.tui.fmt import esc


class NextReadingPanel(Static):
    """The best next reading (expected information per unit of effort) and its reason."""

    def show(self, diagnosis: Diagnosis | None) -> None:
        if diagnosis is None:
            self.update("[dim]next reading: waiting for the predictions…[/dim]")
            return
        if not diagnosis.next:
            ids = [f for f, _ in diagnosis.bench_checks()]
            who = (f"check {', '.join(esc(f) for f in ids)} at the bench (d for each one's "
                   f"check)" if len(ids) > 1 else
                   "confirm the leader at the bench (d for its detail)")
            self.update("[b]next reading:[/b] nothing left that would tell the suspects "
                        f"apart; {who}")
            return
        n = diagnosis.next[0]
        more = ", ".join(f"{esc(x.point)} {x.kind}" for x in diagnosis.next[1:3])
        tail = f"\n[dim]then: {more}[/dim]" if more else ""
        self.update(f"[b]next reading → {esc(n.point)} {n.kind}[/b]  "
                    f"[dim]({format_bits(n.bits)})[/dim]\n{esc(n.why)}{tail}")


def bench_note_lines(diagnosis: Diagnosis) -> list[str]:
    """The fit warning, the good-unit sentence, the bench notes and the readings not
    used, as marked-up lines (the panel and the full-notes screen show the same)."""
    lines = [] if diagnosis.fits else [f"[b $error]⚠ {esc(diagnosis.fit_text)}[/]"]
    if diagnosis.healthy_alike():
        lines.append(f"[b]{esc(diagnosis.healthy_alike(short=True))}[/b]")
    lines += [f"• {esc(t)}" for t in diagnosis.notes]
    lines += [f"[yellow]✗ {esc(t)}[/yellow]" for t in diagnosis.rejected]
    return lines


class BenchNotesPanel(Static):
    """Plain-language findings from the readings alone, and readings not used; `b`
    shows them in full where the panel is too short."""

    def show(self, diagnosis: Diagnosis | None) -> None:
        if diagnosis is None:
            self.update("")
            return
        lines = bench_note_lines(diagnosis)
        title = "[b]bench notes[/b]" + ("  [dim](b: in full)[/dim]" if lines else "")
        self.update(title + "\n" + ("\n".join(lines) if lines else "[dim]none yet[/dim]"))
