"""Bench sessions: the readings typed for one unit, their undo history, notes, autosave
and the Markdown report.

A session belongs to one case file (its path and content hash). Readings are kept one per
(point, kind); typing a new value at the same point replaces the old one and the undo
history remembers what was there. Files are JSON in `paths.sessions_dir()`, written
atomically (temporary file in the same folder, fsync, os.replace, fsync of the folder) so
a killed process leaves either the old or the new file, never half of one.

Values are SI floats: volts, or amperes at a supply point. Times are ISO 8601 UTC strings.
"""

from __future__ import annotations

import json
import os
import re
import tempfile
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from diag.core import paths
from diag.core.advise import format_bits
from diag.core.engine import Band, Diagnosis, Reading
from diag.core.errors import DiagError
from diag.core.values import format_value

FORMAT = 1


def now_iso() -> str:
    """The current UTC time, ISO 8601 to the second."""
    return datetime.now(UTC).replace(microsecond=0).isoformat()


# ----------------------------------------------------------------------------- cautions

@dataclass(frozen=True)
class Caution:
    """One safety caution from rules/cautions.yaml."""

    id: str
    title: str
    text: str


def load_cautions(rules) -> tuple[tuple[Caution, ...], str]:
    """Cautions and the closing `defer` sentence from `rules["cautions"]`.

    Raises DiagError naming rules/cautions.yaml when an entry lacks a title or text."""
    data = rules["cautions"] or {}
    file = rules.file("cautions") if hasattr(rules, "file") else "rules/cautions.yaml"
    out = []
    defer = str(data.get("defer", "")).strip()
    for cid, entry in data.items():
        if cid == "defer":
            continue
        line = data.line_of(cid) if hasattr(data, "line_of") else None
        if not isinstance(entry, dict) or not entry.get("title") or not entry.get("text"):
            raise DiagError("a caution needs a `title` and a `text`", file=file, line=line,
                            where=str(cid), hint="write both as plain text")
        out.append(Caution(str(cid), str(entry["title"]).strip(), str(entry["text"]).strip()))
    if not out:
        raise DiagError("no cautions found", file=file,
                        hint="the file must list at least one caution")
    return tuple(out), defer


# ----------------------------------------------------------------------------- session

def _reading_to_dict(r: Reading) -> dict[str, Any]:
    return {"point": r.point, "kind": r.kind, "value": r.value, "time": r.time}


def _reading_from_dict(d: dict[str, Any]) -> Reading:
    return Reading(point=str(d["point"]), kind=str(d.get("kind", "dc")),
                   value=float(d["value"]), time=d.get("time"))


@dataclass
class Session:
    """The state of one bench session (mutable; the interface owns one at a time).

    `readings` in the order first taken; `history` is the undo stack, each entry
    `(point, kind, previous Reading or None)`; `path` is where autosave writes (None:
    never saved)."""

    case_path: str
    case_hash: str
    readings: list[Reading] = field(default_factory=list)
    history: list[tuple[str, str, Reading | None]] = field(default_factory=list)
    notes: str = ""
    started: str = field(default_factory=now_iso)
    saved: str | None = None
    path: Path | None = None

    def reading(self, point: str, kind: str) -> Reading | None:
        """The reading taken at (point, kind), or None."""
        for r in self.readings:
            if r.point == point and r.kind == kind:
                return r
        return None

    def set_reading(self, r: Reading) -> None:
        """Record a reading (stamped with the time if it has none), replacing any at the
        same (point, kind); the previous one goes on the undo stack."""
        if r.time is None:
            r = Reading(r.point, r.kind, r.value, r.row, now_iso())
        before = self.reading(r.point, r.kind)
        self.history.append((r.point, r.kind, before))
        if before is None:
            self.readings.append(r)
        else:
            self.readings[self.readings.index(before)] = r

    def clear_reading(self, point: str, kind: str) -> bool:
        """Remove the reading at (point, kind); undoable. False if there was none."""
        before = self.reading(point, kind)
        if before is None:
            return False
        self.history.append((point, kind, before))
        self.readings.remove(before)
        return True

    def undo(self) -> tuple[str, str] | None:
        """Revert the last change; returns its (point, kind), or None when nothing is left."""
        if not self.history:
            return None
        point, kind, before = self.history.pop()
        now = self.reading(point, kind)
        if before is None:
            if now is not None:
                self.readings.remove(now)
        elif now is None:
            self.readings.append(before)
        else:
            self.readings[self.readings.index(now)] = before
        return point, kind

    @property
    def can_undo(self) -> bool:
        return bool(self.history)

    # ---- files

    def to_dict(self) -> dict[str, Any]:
        return {
            "diag_session": FORMAT,
            "case": self.case_path,
            "case_hash": self.case_hash,
            "started": self.started,
            "saved": self.saved,
            "notes": self.notes,
            "readings": [_reading_to_dict(r) for r in self.readings],
            "history": [{"point": p, "kind": k,
                         "before": _reading_to_dict(b) if b else None}
                        for p, k, b in self.history],
        }

    @classmethod
    def from_dict(cls, d: dict[str, Any], path: Path | None = None) -> Session:
        where = str(path) if path else None
        if not isinstance(d, dict) or d.get("diag_session") != FORMAT:
            raise DiagError("not a diag session file (or a newer format)", file=where,
                            hint="open the case without --session to start afresh")
        try:
            return cls(
                case_path=str(d["case"]), case_hash=str(d["case_hash"]),
                readings=[_reading_from_dict(r) for r in d.get("readings", [])],
                history=[(str(h["point"]), str(h["kind"]),
                          _reading_from_dict(h["before"]) if h.get("before") else None)
                         for h in d.get("history", [])],
                notes=str(d.get("notes", "")), started=str(d.get("started") or now_iso()),
                saved=d.get("saved"), path=path)
        except (KeyError, TypeError, ValueError) as exc:
            raise DiagError(f"damaged session file ({exc})", file=where,
                            hint="delete it or open the case without --session") from None

    def save(self, path: Path | str | None = None) -> Path:
        """Write the session atomically to `path` (default: `self.path`)."""
        target = Path(path) if path else self.path
        if target is None:
            raise ValueError("session has no file to save to")
        self.path = target
        self.saved = now_iso()
        atomic_write_text(target, json.dumps(self.to_dict(), indent=1, ensure_ascii=False))
        return target


def atomic_write_text(path: Path | str, text: str) -> None:
    """Write `text` (UTF-8) to `path` so that a crash leaves the old file or the new one:
    temporary file in the same folder, flush + fsync, os.replace, fsync of the folder."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "w", encoding="utf-8", newline="\n") as fh:
            fh.write(text)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        try:
            os.unlink(tmp)
        except FileNotFoundError:
            pass
        raise
    try:
        dfd = os.open(path.parent, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(dfd)
    except OSError:
        pass
    finally:
        os.close(dfd)


def session_file(case, label: str | None = None) -> Path:
    """The autosave file of `case` in paths.sessions_dir(): `<stem>-<hash>[-label].json`.
    A label (for example a batch unit id) keeps that unit's session apart."""
    stem = Path(case.path).stem
    tail = ""
    if label:
        tail = "-" + re.sub(r"[^A-Za-z0-9_.-]+", "_", label)
    return paths.sessions_dir() / f"{stem}-{case.hash}{tail}.json"


def new_session(case, readings: Iterable[Reading] = (), label: str | None = None) -> Session:
    """A fresh session for `case` holding `readings`, autosaving to session_file()."""
    s = Session(case_path=str(case.path), case_hash=case.hash, path=session_file(case, label))
    for r in readings:
        s.readings.append(r if r.time else Reading(r.point, r.kind, r.value, r.row, now_iso()))
    return s


def load_session(path: Path | str) -> Session:
    """Read a session file. Raises DiagError naming the file when it is not one."""
    path = Path(path)
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise DiagError("session file not found", file=str(path),
                        hint="check the path, or open the case without --session") from None
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise DiagError(f"cannot read session file ({exc})", file=str(path),
                        hint="delete it or open the case without --session") from None
    return Session.from_dict(data, path)


def find_resumable(case) -> Session | None:
    """The autosaved session of `case` if one exists for this very file content and holds
    a reading or a note; None otherwise (a damaged file is ignored, not deleted)."""
    path = session_file(case)
    if not path.is_file():
        return None
    try:
        s = load_session(path)
    except DiagError:
        return None
    if s.case_hash != case.hash or not (s.readings or s.notes.strip()):
        return None
    return s


# ----------------------------------------------------------------------------- helpers

def band_offset(band: Band, value: float) -> float:
    """How far `value` sits outside the healthy band: 0 inside, else the signed distance
    to the nearer edge (volts or amperes; positive above the band)."""
    if value > band.high:
        return value - band.high
    if value < band.low:
        return value - band.low
    return 0.0


# ----------------------------------------------------------------------------- report

def _md(text: str) -> str:
    """Escape the characters that would change Markdown table cells."""
    return str(text).replace("|", "\\|").replace("\n", " ")


def report_markdown(case, session: Session, diagnosis: Diagnosis | None,
                    cautions: Sequence[Caution], defer: str = "", top: int = 10,
                    fmt=None) -> str:
    """The Markdown report of a session: case, readings with time, ranking, next reading,
    bench notes, the session's own notes and the safety cautions.

    `fmt(value, unit) -> str` formats values (default: 4 significant figures, with the
    prefix the interface shows them with)."""
    if fmt is None:
        def fmt(x: float, unit: str) -> str:
            return format_value(x, unit, digits=4)
    units = {o.point: o.unit for o in case.observables}
    lines = [f"# Bench report: {_md(case.title)}", "",
             f"- case file: `{case.path}` (content {case.hash})",
             f"- session started {session.started}, report written {now_iso()}", ""]
    if case.about:
        lines += [case.about.strip(), ""]
    lines += ["## Readings", ""]
    if session.readings:
        lines += ["| point | kind | value | taken at |", "|---|---|---|---|"]
        for r in session.readings:
            lines.append(f"| {_md(r.point)} | {r.kind} | {fmt(r.value, units.get(r.point, 'V'))}"
                         f" | {r.time or ''} |")
    else:
        lines.append("No readings taken.")
    lines.append("")
    lines += ["## Ranking", ""]
    if diagnosis is None:
        lines += ["No ranking (the predictions were not ready).", ""]
    else:
        if not diagnosis.fits:
            lines += ["**No hypothesis explains these readings: the fault is probably "
                      "outside the model.**", ""]
        if diagnosis.fit_text:
            lines += [_md(diagnosis.fit_text), ""]
        if diagnosis.healthy_alike():
            lines += [_md(diagnosis.healthy_alike()), ""]
        lines += ["| # | fault | p | group | what |", "|---|---|---|---|---|"]
        for i, s in enumerate(diagnosis.suspects[:top], 1):
            lines.append(f"| {i} | `{s.fault}` | {s.p:.3f} | {s.group} | {_md(s.text)} |")
        lines.append("")
        if diagnosis.next:
            n = diagnosis.next[0]
            lines += [f"Next reading: **{n.point} {n.kind}** ({format_bits(n.bits)}): "
                      f"{_md(n.why)}", ""]
        checks = diagnosis.bench_checks()
        if checks:
            lines += ["## To confirm at the bench", ""]
            lines += [f"- `{f}`: {_md(c)}" for f, c in checks] + [""]
        if diagnosis.notes:
            lines += ["## Bench notes", ""] + [f"- {_md(t)}" for t in diagnosis.notes] + [""]
        if diagnosis.rejected:
            lines += ["## Readings not used", ""]
            lines += [f"- {_md(t)}" for t in diagnosis.rejected] + [""]
    lines += ["## Notes", ""]
    lines += [session.notes.strip() if session.notes.strip() else "None.", ""]
    lines += ["## Safety", ""]
    lines += [f"- **{_md(c.title)}**: {_md(c.text)}" for c in cautions]
    if defer:
        lines += ["", defer]
    return "\n".join(lines) + "\n"


def report_name(case_path: str, label: str | None = None, when: datetime | None = None
                ) -> str:
    """The default report file name: `<case stem>[-label]-report-<YYYYMMDD-HHMM>.md`,
    local time, so that reports of successive units do not overwrite each other."""
    when = when or datetime.now()
    tail = "-" + re.sub(r"[^A-Za-z0-9_.-]+", "_", label) if label else ""
    return f"{Path(case_path).stem}{tail}-report-{when:%Y%m%d-%H%M}.md"


def export_report(path: Path | str, text: str) -> Path:
    """Write the report atomically; `~` is expanded. Raises DiagError when the folder
    cannot be written."""
    target = Path(path).expanduser()
    try:
        atomic_write_text(target, text)
    except OSError as exc:
        raise DiagError(f"cannot write the report ({exc.strerror or exc})", file=str(target),
                        hint="pick a folder you can write to") from None
    return target


__all__ = ["Caution", "Session", "atomic_write_text", "band_offset", "export_report",
           "find_resumable", "load_cautions", "load_session", "new_session", "now_iso",
           "report_markdown", "report_name", "session_file"]
