"""Value formatting for the screens: the core's engineering notation, and escaping of
user or case text for Textual markup (a part reference such as `I[R1]` is not markup)."""

from __future__ import annotations

from datetime import datetime, timedelta

from diag.core.values import format_value


def value(x: float | None, unit: str) -> str:
    """A reading or band edge in engineering notation ("1.48 V", "12.3 mA"); "—" for None."""
    if x is None or x != x:
        return "—"
    return format_value(float(x), unit)


def esc(text: object) -> str:
    """Text made safe for Textual markup: every "[" escaped. (textual.markup.escape leaves
    "I[R1]" alone, yet Textual 8 parses "[R1]" as a tag and drops it.)"""
    return str(text).replace("[", "\\[")


def reading(x: float | None, unit: str) -> str:
    """A meter reading with up to 4 significant figures, as a 3½-digit display shows it
    ("11.99 V", "1.483 V", "-0.65 V", "12.31 mA")."""
    if x is None or x != x:
        return "—"
    x = float(x)
    sym = format_value(1.0, unit).split(" ", 1)[1]
    ax = abs(x)
    scale, prefix = 1.0, ""
    if ax >= 1e3:
        scale, prefix = (1e6, "M") if ax >= 1e6 else (1e3, "k")
    elif 0 < ax < 0.1:
        for scale, prefix in ((1e-3, "m"), (1e-6, "µ"), (1e-9, "n")):  # noqa: B007
            if ax >= scale:
                break
    return f"{x / scale:.4g} {prefix}{sym}"


def when(iso: str | None, now: datetime | None = None) -> str:
    """An ISO 8601 time as a person says it, in local time: "today at 14:05",
    "yesterday at 09:30", "3 Dec 2026 at 14:05"; the text itself when unreadable."""
    try:
        t = datetime.fromisoformat(str(iso))
    except ValueError:
        return str(iso)
    now = now or datetime.now().astimezone()
    if t.tzinfo is None:
        t = t.astimezone()  # a naive time is taken as local
    t = t.astimezone(now.tzinfo)
    day = t.date()
    if day == now.date():
        head = "today"
    elif day == now.date() - timedelta(days=1):
        head = "yesterday"
    else:
        head = f"{t.day} {t:%b %Y}"
    return f"{head} at {t:%H:%M}"
