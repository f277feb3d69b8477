"""Bench sessions (diag.core.session): readings with undo, atomic autosave, resume, the
Markdown report, the cautions file."""

from __future__ import annotations

import json
import os

import pytest
from tui_support import CASES, fixture_diag_home, fixture_shared_cache  # noqa: F401

from diag.core import paths
from diag.core.case import load_case
from diag.core.engine import Band, Diagnosis, NextReading, Reading, Suspect
from diag.core.errors import DiagError
from diag.core.rules import load_rules
from diag.core.session import (
    Session,
    atomic_write_text,
    band_offset,
    export_report,
    find_resumable,
    load_cautions,
    load_session,
    new_session,
    report_markdown,
    session_file,
)


@pytest.fixture
def case():
    return load_case(str(CASES[0]))


def test_set_replace_clear_and_undo_in_order(case):
    s = Session(case.path, case.hash)
    a = Reading("TP1", "dc", 1.5)
    s.set_reading(a)
    s.set_reading(Reading("TP2", "dc", 0.7))
    s.set_reading(Reading("TP1", "dc", 1.6))          # replaces, keeps its place
    assert [(r.point, r.value) for r in s.readings] == [("TP1", 1.6), ("TP2", 0.7)]
    assert all(r.time for r in s.readings)             # stamped when typed
    assert s.clear_reading("TP2", "dc")
    assert not s.clear_reading("TP2", "dc")
    assert s.undo() == ("TP2", "dc")                   # the clear is undone
    assert s.reading("TP2", "dc").value == 0.7
    assert s.undo() == ("TP1", "dc")                   # back to the first TP1 value
    assert s.reading("TP1", "dc").value == 1.5
    assert s.undo() == ("TP2", "dc")
    assert s.reading("TP2", "dc") is None
    assert s.undo() == ("TP1", "dc")
    assert s.readings == [] and not s.can_undo
    assert s.undo() is None


def test_save_and_load_round_trip_with_history(case, diag_home):
    s = new_session(case)
    assert s.path == session_file(case)
    assert s.path.parent == paths.sessions_dir()
    s.set_reading(Reading("TP1", "dc", 1.25))
    s.set_reading(Reading("TP1", "dc", 1.5))
    s.notes = "R3 looked scorched [under the clip]"
    s.save()
    back = load_session(s.path)
    assert back.readings == s.readings
    assert back.notes == s.notes
    assert back.undo() == ("TP1", "dc")                # the history survives the file
    assert back.reading("TP1", "dc").value == 1.25
    assert find_resumable(case).readings == s.readings


def test_labelled_session_keeps_apart(case, diag_home):
    a = new_session(case)
    b = new_session(case, [Reading("TP1", "dc", 2.0)], label="A0317/x")
    assert a.path != b.path and "A0317_x" in b.path.name
    b.save()
    assert find_resumable(case) is None                # the bench session is untouched


def test_resume_ignores_empty_changed_or_damaged(case, diag_home):
    s = new_session(case)
    s.save()
    assert find_resumable(case) is None                # nothing in it
    s.set_reading(Reading("TP1", "dc", 1.0))
    s.case_hash = "0" * 16                             # saved for other file content
    s.save()
    assert find_resumable(case) is None
    session_file(case).write_text("{not json", encoding="utf-8")
    assert find_resumable(case) is None
    with pytest.raises(DiagError, match="cannot read session file"):
        load_session(session_file(case))
    with pytest.raises(DiagError, match="not found"):
        load_session(session_file(case).with_name("missing.json"))
    session_file(case).write_text(json.dumps({"diag_session": 99}), encoding="utf-8")
    with pytest.raises(DiagError, match="not a diag session"):
        load_session(session_file(case))


def test_atomic_write_leaves_old_file_when_replace_fails(tmp_path, monkeypatch):
    target = tmp_path / "s.json"
    atomic_write_text(target, "old")
    synced = []
    real_fsync = os.fsync
    monkeypatch.setattr(os, "fsync", lambda fd: (synced.append(fd), real_fsync(fd)))

    def broken_replace(src, dst):
        raise OSError("disk gone")

    monkeypatch.setattr(os, "replace", broken_replace)
    with pytest.raises(OSError):
        atomic_write_text(target, "new")
    assert target.read_text() == "old"
    assert [p.name for p in tmp_path.iterdir()] == ["s.json"]   # no temporary left
    assert synced                                                # data was fsynced first
    monkeypatch.undo()
    atomic_write_text(target, "new")
    assert target.read_text() == "new"


def test_band_offset_signs():
    # worked by hand: band 1.0..2.0 V
    b = Band(None, 1.0, 1.5, 2.0)
    assert band_offset(b, 1.5) == 0.0
    assert band_offset(b, 2.5) == pytest.approx(0.5)
    assert band_offset(b, 0.25) == pytest.approx(-0.75)


def test_cautions_file_has_every_required_topic():
    cautions, defer = load_cautions(load_rules())
    text = " ".join(c.title + " " + c.text for c in cautions).lower()
    for word in ("mains", "discharge", "resistor", "hot", "cat ii", "cat iii", "probe",
                 "current limit"):
        assert word in text, word
    assert "local" in defer.lower() and "licensed" in defer.lower()


def test_report_holds_case_readings_ranking_notes_cautions(case, diag_home, tmp_path):
    s = new_session(case)
    s.set_reading(Reading(case.points[0].id, "dc", 1.5))
    s.set_reading(Reading(case.points[1].id, "dc", 0.00421))
    s.notes = "unit came back twice | odd"
    d = Diagnosis(readings_used=1, fits=False,
                  suspects=(Suspect("R2:open", 0.8, 0, "R2 open"),
                            Suspect("healthy", 0.2, 1, "no fault")),
                  next=(NextReading("TP3", "dc", 0.9, "R2 open: 0.1 V"),),
                  notes=("a bench note",), fit_text="nothing fits well",
                  extra={"confirm": {"R2:open": "lift one leg: OL", "healthy": ""}})
    cautions, defer = load_cautions(load_rules())
    text = report_markdown(case, s, d, cautions, defer)
    out = export_report(tmp_path / "sub" / "r.md", text)
    back = out.read_text(encoding="utf-8")
    assert case.title in back and case.hash in back
    assert f"| {case.points[0].id} | dc |" in back and s.readings[0].time in back
    # readings with the prefix the interface shows, to four figures (our own rule)
    assert f"| {case.points[1].id} | dc | 4.21 m" in back
    assert "`R2:open` | 0.800" in back
    assert "outside the model" in back
    assert "Next reading: **TP3 dc**" in back
    assert "a bench note" in back
    assert "## To confirm at the bench\n\n- `R2:open`: lift one leg: OL\n" in back
    assert "unit came back twice | odd" in back
    for c in cautions:
        assert c.title in back
    with pytest.raises(DiagError, match="cannot write the report"):
        export_report(out / "inside-a-file.md", text)
