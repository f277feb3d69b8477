"""`diag diagnose`, `diag faults`, `diag simulate`: output per SPEC sections 4-5, exit codes."""

from __future__ import annotations

import csv
import io
import json

import pytest

from diag.cli import main
from diag.core.paths import cases_dir

RELAY = str(cases_dir() / "relay-switch.yaml")
SPEC_TOP = {"case", "readings_used", "fits", "suspects", "next"}
SPEC_SUSPECT = {"fault", "p", "group", "text"}
SPEC_NEXT = {"point", "kind", "bits", "why"}


def run(argv, capsys):
    rc = main(argv)
    out = capsys.readouterr()
    return rc, out.out, out.err


@pytest.fixture
def simulated(tmp_path, capsys):
    rc, out, _ = run(["simulate", RELAY, "--fault", "R1:open", "--seed", "4"], capsys)
    assert rc == 0
    p = tmp_path / "unit.csv"
    p.write_text(out)
    return p


def test_simulate_prints_meter_csv(simulated):
    rows = list(csv.reader(io.StringIO(simulated.read_text())))
    assert rows[0] == ["point", "kind", "value"]
    assert {r[0] for r in rows[1:]} == {"TP1", "TP2", "TP3", "TP4", "TP5", "TP6"}
    for r in rows[1:]:
        float(r[2])  # every value a plain number as a meter shows it


def test_diagnose_json_matches_spec(simulated, capsys):
    rc, out, err = run(["diagnose", RELAY, str(simulated), "--json", "--draws", "32"], capsys)
    assert rc == 0, err
    j = json.loads(out)
    assert SPEC_TOP <= set(j)
    assert j["case"] == RELAY and j["readings_used"] == 6 and isinstance(j["fits"], bool)
    assert all(SPEC_SUSPECT <= set(s) for s in j["suspects"])
    assert all(SPEC_NEXT <= set(n) for n in j["next"])
    assert sum(s["p"] for s in j["suspects"]) == pytest.approx(1.0, abs=1e-4)
    assert j["suspects"][0]["fault"] == "R1:open"
    ps = [s["p"] for s in j["suspects"]]
    assert ps == sorted(ps, reverse=True)


def test_diagnose_top_and_text(simulated, capsys):
    rc, out, _ = run(["diagnose", RELAY, str(simulated), "--json", "--top", "2",
                      "--draws", "32"], capsys)
    assert rc == 0 and len(json.loads(out)["suspects"]) == 2
    rc, out, _ = run(["diagnose", RELAY, str(simulated), "--draws", "32"], capsys)
    assert rc == 0 and "R1:open" in out and "Next readings" in out
    assert "To confirm R1:open: " in out or "check each at the bench:\n  R1:open: " in out


def test_text_says_whether_a_reading_can_still_split_close_suspects():
    """Two suspects close: while an offered reading can still tell them apart the text
    points to it before the bench checks; with none left it says only the bench can.
    (Wording on hand-made diagnoses: no outside fact is involved.)"""
    from diag.commands.diagnose import format_text
    from diag.core.case import load_case
    from diag.core.engine import Diagnosis, NextReading, Suspect

    case = load_case(RELAY)
    sus = (Suspect("R1:open", 0.5, 0, "R1 open"), Suspect("R2:short", 0.45, 1, "R2 short"))
    confirm = {"R1:open": "measure R1", "R2:short": "measure R2"}
    nxt = (NextReading("TP3", "dc", 0.9, "R1:open: 12 V; R2:short: 0 V"),)
    left = format_text(case, Diagnosis(2, True, sus, nxt, extra={"confirm": confirm}), 10)
    assert "the next reading below may tell them apart" in left
    assert "  R1:open: measure R1\n  R2:short: measure R2" in left
    none = format_text(case, Diagnosis(6, True, sus, (), extra={"confirm": confirm}), 10)
    assert "No reading left to take tells these apart; check each at the bench:" in none
    assert "nothing left to learn" in none
    # a legend for the group column only when a number repeats (our own rule)
    assert "grp: suspects with one number" not in none
    same = (Suspect("R1:open", 0.5, 0, "R1 open"), Suspect("R2:short", 0.45, 0, "R2 short"))
    grouped = format_text(case, Diagnosis(6, True, same, (), extra={"confirm": confirm}), 10)
    assert "grp: suspects with one number are ones the offered readings cannot tell " \
        "apart, judged around these readings" in grouped


def test_header_only_gives_prior_and_first_reading(tmp_path, capsys):
    p = tmp_path / "empty.csv"
    p.write_text("point,value\n")
    rc, out, _ = run(["diagnose", RELAY, str(p), "--json", "--draws", "32"], capsys)
    j = json.loads(out)
    assert rc == 0 and j["readings_used"] == 0 and j["fits"] and j["next"]


def test_bad_rows_exit_1_but_the_rest_is_used(tmp_path, capsys):
    p = tmp_path / "bad.csv"
    p.write_text("point,value\nTP2,11.9\nTP9,1\nTP4,zz\n")
    rc, out, err = run(["diagnose", RELAY, str(p), "--json", "--draws", "32"], capsys)
    assert rc == 1
    assert "bad.csv:3" in err and "bad.csv:4" in err  # row numbers, header = row 1
    j = json.loads(out)
    assert j["readings_used"] == 1 and len(j["rejected"]) == 2


def test_healthy_prior_option(tmp_path, capsys):
    p = tmp_path / "empty.csv"
    p.write_text("point,value\n")
    rc, out, _ = run(["diagnose", RELAY, str(p), "--json", "--healthy-prior", "0.3",
                      "--draws", "32"], capsys)
    h = [s for s in json.loads(out)["suspects"] if s["fault"] == "healthy"][0]
    assert rc == 0 and h["p"] == pytest.approx(0.3, abs=1e-6)


def test_exit_codes(tmp_path, capsys):
    p = tmp_path / "r.csv"
    p.write_text("point,value\n")
    assert run(["diagnose", RELAY, str(p), "--top", "0"], capsys)[0] == 2  # usage
    assert run(["diagnose", RELAY, str(p), "--healthy-prior", "2"], capsys)[0] == 2
    with pytest.raises(SystemExit) as exc:
        main(["diagnose", RELAY])  # READINGS missing: argparse usage error
    assert exc.value.code == 2
    rc, _, err = run(["diagnose", str(tmp_path / "none.yaml"), str(p)], capsys)
    assert rc == 1 and "none.yaml" in err
    rc, _, err = run(["diagnose", RELAY, str(tmp_path / "none.csv")], capsys)
    assert rc == 1 and "none.csv" in err
    rc, _, err = run(["simulate", RELAY, "--fault", "R1:melted"], capsys)
    assert rc == 1 and "R1" in err
    batch = tmp_path / "batch.csv"
    batch.write_text("unit,point,value\nA,TP2,12\nB,TP2,11.9\n")
    rc, _, err = run(["diagnose", RELAY, str(batch)], capsys)
    assert rc == 1 and "triage" in err


def test_faults_lists_every_hypothesis_and_groups(capsys):
    rc, out, _ = run(["faults", RELAY, "--json", "--draws", "32"], capsys)
    assert rc == 0
    j = json.loads(out)
    ids = [h["fault"] for h in j["hypotheses"]]
    assert "healthy" in ids and "R1:open" in ids and "Q1:ce-short" in ids
    assert all({"fault", "prior", "group", "text"} <= set(h) for h in j["hypotheses"])
    for g in j["groups"]:
        assert len(g["members"]) > 1 and g["split_by"]
    rc, out, _ = run(["faults", RELAY, "--draws", "32"], capsys)
    assert rc == 0 and "R1:open" in out


@pytest.mark.parametrize("command", [
    ["simulate", RELAY, "--fault", "healthy"], ["diagnose", RELAY, "x.csv"],
    ["faults", RELAY], ["triage", RELAY, "x.csv"], ["drill", RELAY], ["check", RELAY]])
def test_a_negative_seed_is_a_usage_error(command, capsys):
    # our own rule: a seed is a whole number, 0 or more; anything else is refused with
    # argparse's usage message (exit status 2), not a traceback from the random generator
    with pytest.raises(SystemExit) as stop:
        main([*command, "--seed", "-1"])
    assert stop.value.code == 2
    assert "--seed: must be 0 or more" in capsys.readouterr().err
