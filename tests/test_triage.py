"""Batch triage (diag/core/triage.py, `diag triage`): the batched ranking against
`Engine.diagnose` one unit at a time, the summary, the reports and the command."""

from __future__ import annotations

import csv
import io
import json
import re
from pathlib import Path

import numpy as np
import pytest
from numpy.testing import assert_allclose
from tui_support import fixture_diag_home, fixture_shared_cache, settle, sync  # noqa: F401

from diag.cli import main
from diag.core.case import load_case
from diag.core.engine import Engine, Reading
from diag.core.readings import parse_file
from diag.core.rules import load_rules
from diag.core.triage import (
    CSV_CAUTION,
    CSV_FIELDS,
    CSV_REFUSED,
    BatchScorer,
    caution_lines,
    groups_batch,
    kernel_loglik,
    refused_rows,
    table_loglik,
    table_loglik_units,
    to_csv,
    to_json,
    to_markdown,
    triage,
)

ROOT = Path(__file__).resolve().parents[1]
CASE = ROOT / "cases" / "sounder-driver.yaml"
SPEC5_KEYS = {"case", "readings_used", "fits", "suspects", "next"}


@pytest.fixture(scope="module")
def engine() -> Engine:
    eng = Engine(load_case(str(CASE)), load_rules())
    eng.build()
    return eng


def _units(eng: Engine) -> dict[str, list[Reading]]:
    """A small batch drawn by the engine: several faults, healthy units, one unit with
    two readings left out (incomplete), one with one reading left out, one with a
    blunder."""
    rng = np.random.default_rng(20261201)
    faults = ["R2:open", "R2:open", "R3:open", "Q1:be-open", "C3:short", "healthy",
              "healthy", "LS1:open"]
    units = {}
    for i, f in enumerate(faults):
        units[f"A{i:02d}"] = list(eng.simulate(f, rng))
    units["A02"] = units["A02"][:3] + units["A02"][5:]
    units["A05"] = units["A05"][1:]
    # a blunder: the 12 V rail written down a decade low (a slipped decimal point)
    units["A08"] = [Reading(r.point, r.kind, r.value / 10 if r.point == "TP2" else r.value)
                    for r in units["A00"]]
    return units


def _same(d1, d2) -> None:
    """Two diagnoses are the same to rounding (the batch multiplies kernel factors where
    diagnose adds their logarithms)."""
    assert d1.fits == d2.fits
    assert d1.readings_used == d2.readings_used
    live1 = [s.fault for s in d1.suspects if s.p > 1e-9]
    live2 = [s.fault for s in d2.suspects if s.p > 1e-9]
    assert live1 == live2
    p1 = {s.fault: s.p for s in d1.suspects}
    p2 = {s.fault: s.p for s in d2.suspects}
    assert p1.keys() == p2.keys()
    assert_allclose([p2[f] for f in p1], list(p1.values()), rtol=1e-9, atol=1e-12)
    assert [s.group for s in d1.suspects[:len(live1)]] == \
        [s.group for s in d2.suspects[:len(live2)]]
    assert [(n.point, n.kind) for n in d1.next] == [(n.point, n.kind) for n in d2.next]
    assert_allclose([n.bits for n in d1.next], [n.bits for n in d2.next], rtol=1e-9)
    assert d1.notes == d2.notes
    assert d1.fit_text == d2.fit_text
    assert d1.extra.get("odd_readings") == d2.extra.get("odd_readings")
    assert d1.extra["p_value"] == pytest.approx(d2.extra["p_value"], abs=1e-12)
    assert d1.extra.get("healthy_fits") == d2.extra.get("healthy_fits")


def test_kernel_product_equals_the_sum_of_logarithms():
    # Independent path (STYLE.md): log of a product of mixture factors against the sum of
    # their logarithms, written out directly from the mixture formula in infer.py.
    rng = np.random.default_rng(5)
    n, H, K, d = 3, 4, 6, 20
    ut, Ut = rng.normal(size=(n, H, d)) * 3, rng.normal(size=(d, H, K)) * 3
    logpeak, c = np.log(rng.uniform(0.1, 0.4, size=(H, d))), rng.uniform(1e-6, 1e-4, d)
    direct = np.zeros((n, H, K))
    for j in range(d):
        direct += np.log(np.exp(logpeak[None, :, j, None]
                                - (ut[:, :, j, None] - Ut[j][None]) ** 2) + c[j])
    assert_allclose(kernel_loglik(ut, Ut, logpeak, c), direct, rtol=1e-12)


@pytest.mark.parametrize("d, c_scale", [(5, 1e-4), (20, 1e-4), (6, 1e-60)])
def test_table_kernel_equals_the_direct_kernel(d, c_scale):
    # Independent path: the shared-table log-likelihood against the direct kernel
    # product followed by infer's log-mean over the valid units, with readings that
    # repeat (a meter's display resolution), units that did not solve (NaN), a group
    # longer than one logarithm interval (d = 20) and blunder densities so small that
    # the table kernel must take logarithms (c = 1e-60).
    from diag.core import infer

    rng = np.random.default_rng(7)
    n, H, K = 700, 5, 16
    u = np.round(rng.normal(size=(n, d)) * 3, 1)  # about 60 distinct values each
    scale = rng.uniform(1.0, 2.0, size=(H, d))
    Ut = rng.normal(size=(d, H, K)) * 3
    valid = rng.random((H, K)) > 0.2
    valid[3] = False  # a hypothesis none of whose units solved
    Ut[:, ~valid] = np.nan
    logpeak = np.log(rng.uniform(0.1, 0.4, size=(H, d)))
    c = rng.uniform(0.5, 2.0, d) * c_scale
    n_valid = valid.sum(axis=1)
    llk = kernel_loglik(u[:, None, :] / scale[None], Ut, logpeak, c)
    direct = infer._logmeanexp(np.where(valid[None], llk, -np.inf), n_valid)
    got = table_loglik(u, scale, Ut, logpeak, c, valid, n_valid, list(range(H)))
    assert np.array_equal(np.isfinite(got), np.isfinite(direct))
    assert np.all(np.isneginf(got[:, 3]))
    fin = np.isfinite(direct)
    assert_allclose(got[fin], direct[fin], rtol=1e-12)
    sub = table_loglik(u, scale, Ut, logpeak, c, valid, n_valid, [4, 1])
    assert_allclose(sub, got[:, [4, 1]], rtol=1e-15)


def test_table_units_loglik_equals_the_engine_s(engine):
    # Independent path (our own rule): a leading suspect's mixture over its further
    # units through the shared tables (triage.table_loglik_units, the batch's
    # refinement) against infer.loglik_units (diagnose's), on the case's own further
    # units with readings that repeat and a drawn unit that did not solve
    from diag.core import infer

    more = engine._further_u(list(engine.specs[:3]))
    more[1, 5] = np.nan
    taken = np.array([0, 2, 3])
    rng = np.random.default_rng(3)
    u = np.round(more[0, rng.integers(0, more.shape[1], 400)][:, taken]
                 + rng.normal(size=(400, 3)), 1)
    s = rng.uniform(1.0, 2.0, size=3)
    W = engine._blunder[1]
    for h in range(3):
        want, n_want = infer.loglik_units(more[h], taken, u, s, 0.02, W)
        got, n_got = table_loglik_units(more[h], taken, u, s, 0.02, W)
        assert n_got == n_want == more.shape[1] - (h == 1)
        assert_allclose(got, want, rtol=1e-12)


def test_groups_batch_equals_the_greedy_grouping(engine):
    # Independent path: the grouping of many orders at once against infer.groups_from
    # one order at a time, on the case's own `apart` matrix and on random ones.
    from diag.core import infer

    rng = np.random.default_rng(11)
    cases = [engine._apart] + [rng.random((30, 30)) < q for q in (0.2, 0.6, 0.9)]
    for ap in cases:
        ap = ap | ap.T
        np.fill_diagonal(ap, False)
        H = ap.shape[0]
        orders = np.stack([rng.permutation(H) for _ in range(25)])
        got = groups_batch(ap, orders)
        for o, g in zip(orders, got, strict=True):
            np.testing.assert_array_equal(g, infer.groups_from(ap, o))


def test_batch_ranking_equals_diagnose_one_unit_at_a_time(engine):
    # Same answer by an independent path (STYLE.md): the vectorised batch against the
    # engine's own one-unit diagnosis, for complete and incomplete units.
    units = _units(engine)
    res = triage(engine, units)
    assert [u.unit for u in res.units] == list(units)
    for name, rs in units.items():
        _same(engine.diagnose(rs), res.unit(name).diagnosis)


def test_batch_tells_whether_a_good_unit_fits_as_diagnose_does(engine):
    # Healthy units and a reversed C2 at the far end of its range (the unit of
    # test_engine.py's test_no_good_unit_sentence_...): the batch's "healthy_fits" and
    # status against diagnose's, through both scoring paths.
    rng = np.random.default_rng(7)
    units = {f"H{i}": list(engine.simulate("healthy", rng)) for i in range(3)}
    units["R1"] = list(engine.simulate("C2:reversed", np.random.default_rng(1)))
    rs = list(units.values())
    for table_min in (1, 256):
        got = BatchScorer(engine).run(rs, table_min=table_min)
        for r, d in zip(rs, got, strict=True):
            _same(engine.diagnose(r), d)
        assert [d.extra["healthy_fits"] for d in got] == [True, True, True, False]
    res = triage(engine, units)
    assert [u.status for u in res.units] == ["healthy"] * 3 + ["fault"]


def test_batch_with_threads_and_small_blocks_gives_the_same(engine):
    units = list(_units(engine).values())
    one = BatchScorer(engine).run(units, chunk=64, threads=1)
    many = BatchScorer(engine).run(units, chunk=2, threads=3)
    for a, b in zip(one, many, strict=True):
        _same(a, b)


def test_batch_through_shared_tables_equals_diagnose(engine):
    # The table path (forced for this small batch with table_min=1) against the
    # engine's one-unit diagnosis, with a unit outside the model (pairs of faults) and
    # a unit that fits only with a slip, over threads and small blocks.
    units = _units(engine)
    odd = {("TP2", "dc"): 3.0, ("TP3", "dc"): 2.9, ("TP4", "dc"): 2.8, ("TP5", "dc"): 2.7,
           ("TP6", "dc"): 2.6}  # see test_summary_partitions_the_batch_...
    units["Z99"] = [Reading(r.point, r.kind, odd.get((r.point, r.kind), r.value))
                    for r in units["A06"]]
    rs = list(units.values())
    for threads, chunk in ((1, 64), (3, 1)):
        got = BatchScorer(engine).run(rs, chunk=chunk, threads=threads, table_min=1)
        for r, d in zip(rs, got, strict=True):
            _same(engine.diagnose(r), d)
    assert not got[rs.index(units["A08"])].fits  # fits no single fault, pairs not needed


@pytest.mark.parametrize("threads", [1, 2])
def test_batch_progress_rises_to_one_and_cancel_stops_it(engine, threads):
    rs = list(_units(engine).values())
    seen: list[float] = []
    BatchScorer(engine).run(rs, progress=seen.append, threads=threads, table_min=1)
    assert seen == sorted(seen) and seen[-1] == pytest.approx(1.0)
    with pytest.raises(InterruptedError):
        BatchScorer(engine).run(rs, cancelled=lambda: True, threads=threads, table_min=1)


def test_healthy_prior_reaches_the_batch(engine):
    units = _units(engine)
    res = triage(engine, units, healthy_prior=0.5)
    for name in ("A05", "A06"):
        _same(engine.diagnose(units[name], healthy_prior=0.5), res.unit(name).diagnosis)


def test_summary_partitions_the_batch_and_names_the_incomplete(engine):
    units = _units(engine)
    # A unit outside the model: every node near 3 V on a 12 V rail while the supply
    # draws its healthy current; no single modelled fault (a low supply is 60-90 % of
    # nominal in rules/faults.yaml) and at most one blunder cannot make that.
    odd = {("TP2", "dc"): 3.0, ("TP3", "dc"): 2.9, ("TP4", "dc"): 2.8, ("TP5", "dc"): 2.7,
           ("TP6", "dc"): 2.6}
    units["Z99"] = [Reading(r.point, r.kind, odd.get((r.point, r.kind), r.value))
                    for r in units["A06"]]
    res = triage(engine, units)
    s = res.summary
    assert s["units"] == len(units)
    assert s["faulty"] + len(s["healthy"]) + len(s["no_fit"]) == len(units)
    assert sum(r["units"] for r in s["by_fault"]) == s["faulty"]
    assert [r["units"] for r in s["by_fault"]] == sorted(
        (r["units"] for r in s["by_fault"]), reverse=True)
    assert "Z99" in s["no_fit"]
    missing = {r["unit"]: r["missing"] for r in s["incomplete"]}
    assert set(missing) == {"A02", "A05"}
    assert missing["A05"] == ["TP1 dc"]
    assert len(missing["A02"]) == 2
    # a unit drawn healthy is listed healthy exactly when its leading suspect is one the
    # offered readings cannot tell from the healthy circuit (same group)
    for name in ("A05", "A06"):
        u = res.unit(name)
        top_group = u.top.group
        healthy_group = next(x.group for x in u.diagnosis.suspects if x.fault == "healthy")
        assert (u.status == "healthy") == (top_group == healthy_group)
    # the dominant failure of the batch (R2 open twice) leads the part table
    assert s["by_part"][0]["part"] == "R2"
    assert s["by_part"][0]["units"] >= 2


def test_no_fault_found_names_the_faults_its_readings_cannot_rule_out(engine):
    # Two units drawn healthy; on sounder-driver the leaky and reversed capacitors share
    # the healthy circuit's group (`diag faults`), so "no fault found" must say they may
    # still be there, with each one's p summed over those units, and what would split them.
    # Bookkeeping, checked against the per-unit diagnoses: no outside fact is involved.
    units = _units(engine)
    res = triage(engine, units)
    s = res.summary
    nff = [res.unit(n) for n in s["healthy"]]
    assert nff, "the drawn healthy units should read healthy"
    want: dict[str, float] = {}
    for u in nff:
        g = next(x.group for x in u.diagnosis.suspects if x.fault == "healthy")
        for x in u.diagnosis.suspects:
            if x.group == g and x.fault != "healthy" and x.p > 0:
                want[x.fault] = want.get(x.fault, 0.0) + x.p
    got = {r["fault"]: r["expected"] for r in s["healthy_lookalikes"]}
    assert got, "look-alike faults of a good unit should be listed"
    assert set(got) <= set(want)
    for f, e in got.items():
        assert e == pytest.approx(want[f], abs=1e-3)
    assert [r["expected"] for r in s["healthy_lookalikes"]] == sorted(got.values(),
                                                                     reverse=True)
    ens = engine.ensemble
    ids = [h.id for h in ens.hypotheses]
    assert s["healthy_split_by"] == engine.splitters()[int(ens.group[ids.index("healthy")])]
    md = to_markdown(res, "cases/sounder-driver.yaml")
    top = s["healthy_lookalikes"][0]
    assert f"{top['fault']} {top['expected']:.1f}" in md.split("## No fault found")[1]
    assert "readings cannot tell a good unit from these faults" in md
    json.dumps(to_json(res, "cases/sounder-driver.yaml"))

    from diag.tui.batch_screen import summary_text
    assert f"{top['fault']} {top['expected']:.1f}" in summary_text(res)

    # a batch with no unit found healthy lists none and says nothing about them
    faulty = {n: units[n] for n in ("A00", "A03", "A07")}
    res2 = triage(engine, faulty)
    assert res2.summary["healthy"] == []
    assert res2.summary["healthy_lookalikes"] == []
    assert "cannot tell a good unit" not in to_markdown(res2, "cases/sounder-driver.yaml")


def test_reports_carry_the_cautions_and_spec_json(engine):
    units = _units(engine)
    res = triage(engine, units, rejected=["batch.csv:4: row 4: unknown point 'TP99'"])
    cautions = caution_lines(load_rules())
    assert len(cautions) >= 5  # rules/cautions.yaml: mains, capacitors, hot parts, ...
    md = to_markdown(res, "cases/sounder-driver.yaml", cautions)
    for c in cautions:
        assert c in md
    assert "row 4" in md
    text = to_csv(res, cautions)
    rows = [r for r in csv.DictReader(io.StringIO(text)) if not r["unit"].startswith("#")]
    assert [r["unit"] for r in rows] == list(units)
    obj = to_json(res, "cases/sounder-driver.yaml", cautions)
    assert obj["cautions"] == cautions
    assert set(obj) >= {"case", "units", "summary"}
    assert [u["unit"] for u in obj["units"]] == list(units)
    for u in obj["units"]:
        assert SPEC5_KEYS <= set(u)
        assert sum(s["p"] for s in u["suspects"]) == pytest.approx(1.0, abs=1e-4)
    json.dumps(obj)


def _write_batch(path: Path, units: dict[str, list[Reading]], extra: list[str]) -> None:
    lines = ["unit,point,kind,value"]
    names = list(units)
    # interleave units so that "order of first appearance" is tested
    rows = [(n, r) for i in range(20) for n in names for j, r in enumerate(units[n])
            if j == i]
    for n, r in rows:
        lines.append(f"{n},{r.point},{r.kind},{r.value!r}")
    lines[3:3] = extra
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")


def test_cli_json_reports_bad_rows_and_triages_the_rest(engine, tmp_path, capsys):
    units = _units(engine)
    batch = tmp_path / "batch.csv"
    _write_batch(batch, units, ["A00,TP99,dc,1.0", "A01,TP3,dc,4kk"])
    # refused rows: exit 1 and the rest triaged (SPEC section 4)
    assert main(["triage", str(CASE), str(batch), "--json"]) == 1
    out = capsys.readouterr()
    obj = json.loads(out.out)
    assert [u["unit"] for u in obj["units"]] == list(units)
    assert "row 4 (unit A00): unknown point 'TP99'" in out.err  # header is row 1
    assert "row 5 (unit A01): TP3: '4kk' is not a value" in out.err
    rf = parse_file(batch, engine.case)
    assert obj["summary"]["rows_rejected"] == len(rf.errors) >= 2
    # every refused row names a unit of the batch, so each is listed with its unit
    assert obj["summary"]["rejected"] == []
    listed = [m for u in obj["units"] for m in u["rejected"]]
    assert len(listed) == len(rf.errors)
    for u in obj["units"]:
        d = engine.diagnose(rf.units[u["unit"]])
        assert [s["fault"] for s in u["suspects"][:3]] == [s.fault for s in d.suspects[:3]]


def test_cli_out_formats(engine, tmp_path, capsys):
    units = _units(engine)
    batch = tmp_path / "batch.csv"
    _write_batch(batch, units, [])
    for fmt in ("md", "csv", "json"):
        out = tmp_path / f"report.{fmt}"
        assert main(["triage", str(CASE), str(batch), "--out", str(out)]) == 0
        text = out.read_text(encoding="utf-8")
        assert "Charged capacitors" in text  # a caution title of rules/cautions.yaml
    assert json.loads((tmp_path / "report.json").read_text())["summary"]["units"] == len(units)
    assert main(["triage", str(CASE), str(batch), "--out", str(tmp_path / "r.txt"),
                 "--format", "csv"]) == 0
    assert (tmp_path / "r.txt").read_text().startswith("unit,status,")
    assert (tmp_path / "r.txt").read_text().splitlines()[-1].startswith("# caution,")
    capsys.readouterr()


def test_cli_errors(tmp_path, capsys):
    assert main(["triage", str(CASE), str(tmp_path / "nothing.csv")]) == 1
    assert "file not found" in capsys.readouterr().err
    with pytest.raises(SystemExit) as exc:
        main(["triage", str(CASE), str(tmp_path / "x.csv"), "--format", "xml"])
    assert exc.value.code == 2


def _batch_with_refused_rows(path: Path, units: dict[str, list[Reading]]
                             ) -> dict[int, str | None]:
    """Write `units` unit by unit with rows the readings parser refuses, at row numbers
    counted here as the file is written (header = row 1); return {row: the unit the row
    names, None for a row that names none}. Z77 is a unit none of whose rows is usable."""
    lines = ["unit,point,kind,value"]
    bad: dict[int, str | None] = {}
    first: dict[str, int] = {}
    for n, rs in units.items():
        for r in rs:
            lines.append(f"{n},{r.point},{r.kind},{r.value!r}")
            first.setdefault(n, len(lines))
        if n == "A01":
            lines.append("A01,TP99,dc,1.0")  # unknown point
            bad[len(lines)] = "A01"
        if n == "A03":
            lines.append("A03,TP4,dc,1,25")  # a decimal comma: five fields
            bad[len(lines)] = "A03"
        if n == "A02":
            r = rs[0]  # given again: the first row of A02 is the one left out
            lines.append(f"A02,{r.point},{r.kind},{r.value!r}")
            bad[first["A02"]] = "A02"
    lines.append(",TP2,dc,12.0")  # no unit name
    bad[len(lines)] = None
    lines.append("Z77,TP2,dc,abc")  # the only row of Z77, not a value
    bad[len(lines)] = "Z77"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return bad


def _row_of(message: str) -> int:
    return int(re.search(r"row (\d+)", message).group(1))


def test_refused_rows_name_their_unit_in_every_output(engine, tmp_path, capsys):
    # The row numbers and units come from the file as written above, not from the code.
    units = _units(engine)
    batch = tmp_path / "batch.csv"
    bad = _batch_with_refused_rows(batch, units)
    assert main(["triage", str(CASE), str(batch), "--json"]) == 1
    out = capsys.readouterr()
    obj = json.loads(out.out)
    err = out.err.splitlines()
    assert len(err) == len(bad)  # one line per refused row
    for row, unit in bad.items():
        want = f"row {row} (unit {unit}): " if unit else f"row {row}: no unit name"
        assert sum(want in line for line in err) == 1, want
    # JSON: each unit's refused rows with the unit; the others in the summary
    by_unit = {u["unit"]: sorted(_row_of(m) for m in u["rejected"]) for u in obj["units"]}
    for name in units:
        assert by_unit[name] == sorted(r for r, u in bad.items() if u == name)
    s = obj["summary"]
    assert s["rows_rejected"] == len(bad)
    assert s["units_with_rows_rejected"] == ["A01", "A02", "A03"]  # batch order
    assert s["not_triaged"] == ["Z77"]
    assert sorted(_row_of(m) for m in s["rejected"]) == sorted(
        r for r, u in bad.items() if u not in units)
    assert "Z77" not in by_unit
    # --out reports carry the messages with their units, once each
    for fmt in ("md", "csv", "json"):
        rep = tmp_path / f"report.{fmt}"
        assert main(["triage", str(CASE), str(batch), "--out", str(rep)]) == 1
        text = rep.read_text(encoding="utf-8")
        for row, unit in bad.items():
            if unit:
                assert text.count(f"row {row} (unit {unit}): ") == 1, (fmt, row)
        assert f"{len(bad)} refused rows listed in it" in capsys.readouterr().err
    md = (tmp_path / "report.md").read_text(encoding="utf-8")
    a01 = next(line for line in md.splitlines() if line.startswith("| A01 |"))
    row_a01 = next(r for r, u in bad.items() if u == "A01")
    assert f"row {row_a01} refused" in a01
    assert "Not triaged, no row of theirs could be used: Z77." in md
    rows = list(csv.DictReader(io.StringIO((tmp_path / "report.csv").read_text())))
    a03 = next(r for r in rows if r["unit"] == "A03")
    assert a03["rows_refused"] == str(next(r for r, u in bad.items() if u == "A03"))


def test_refused_rows_shown_once_on_a_terminal(engine, tmp_path, capsys, monkeypatch):
    # On a terminal the messages go to stderr once and the report counts them; with
    # stdout sent elsewhere (a file, a pipe) the report lists them itself.
    import sys

    units = _units(engine)
    batch = tmp_path / "batch.csv"
    bad = _batch_with_refused_rows(batch, units)
    assert main(["triage", str(CASE), str(batch)]) == 1
    piped = capsys.readouterr()
    monkeypatch.setattr(sys.stdout, "isatty", lambda: True)
    monkeypatch.setattr(sys.stderr, "isatty", lambda: True)
    assert main(["triage", str(CASE), str(batch)]) == 1
    tty = capsys.readouterr()
    assert tty.err == piped.err
    for line in tty.err.splitlines():
        msg = line.removeprefix("diag: ")
        assert (tty.err + tty.out).count(msg) == 1
        assert piped.out.count(msg) == 1
    assert f"{len(bad)} rows refused, each shown above with its row and unit" in tty.out
    assert f"{len(bad)} rows of the batch file refused" in tty.out


def test_single_unit_file_refused_rows_belong_to_the_unit(engine, tmp_path, capsys):
    # A one-unit readings file given to triage: its refused rows are the unit's, as
    # `diagnose --json` lists them for the same file.
    rs = _units(engine)["A00"]
    f = tmp_path / "bench7.csv"
    f.write_text("point,kind,value\n" + "".join(f"{r.point},{r.kind},{r.value!r}\n"
                                                for r in rs) + "TP99,dc,1\n", "utf-8")
    assert main(["triage", str(CASE), str(f), "--json"]) == 1
    out = capsys.readouterr()
    tri = json.loads(out.out)
    assert f"row {len(rs) + 2} (unit bench7): unknown point 'TP99'" in out.err
    main(["diagnose", str(CASE), str(f), "--json"])
    diag_json = json.loads(capsys.readouterr().out)
    unit = tri["units"][0]
    assert set(diag_json) <= set(unit)  # the same fields as diagnose, and more
    assert [_row_of(m) for m in unit["rejected"]] == [_row_of(m) for m in
                                                       diag_json["rejected"]]
    assert tri["summary"]["rejected"] == []


def test_refused_rows_tie_only_what_the_row_names(engine):
    # A row that names no unit, and a wrong-length row whose unit column is not the
    # first (its cells cannot be trusted), stay unplaced; a plain message too.
    from diag.core.readings import parse_text

    text = "point,unit,value\nTP2,B1,12.0\nTP3,B1,2,5\nTP2,,12\nTP99,B2,1\nTP98,B1,1\n"
    rf = parse_text(text, engine.case, file="b.csv")
    got = {r.row: r.unit for r in refused_rows(rf.errors, rf.row_units)}
    assert got == {3: None, 4: None, 5: "B2", 6: "B1"}
    assert rf.row_units == {2: "B1", 5: "B2", 6: "B1"}  # kept rows name theirs too
    assert refused_rows(["b.csv: something"])[0].unit is None
    res = triage(engine, rf.units, refused_rows(rf.errors, rf.row_units))
    assert [r.row for r in res.unit("B1").refused] == [6]
    assert [r.row for r in res.unplaced] == [3, 4, 5]
    assert res.summary["not_triaged"] == ["B2"]

    from diag.tui.batch_screen import summary_text
    assert "Rows refused (left out): row 3, row 4, row 5 (B2), row 6 (B1)" in summary_text(res)


def test_csv_report_reads_back_cell_by_cell(engine):
    # Python's csv module as the outside reader: every line parses, the header comes
    # first, each caution (they hold commas) and each refused row arrive whole in one
    # cell, and the cautions close the file.
    units = _units(engine)
    cautions = caution_lines(load_rules())
    assert any("," in c for c in cautions)
    msg = "batch.csv:4: row 4 (unit A00): unknown point 'TP99' (points: TP1, TP2)"
    res = triage(engine, units, rejected=refused_rows([msg]))
    rows = list(csv.reader(io.StringIO(to_csv(res, cautions))))
    assert tuple(rows[0]) == CSV_FIELDS
    body = [r for r in rows[1:] if r]
    units_rows = [r for r in body if not r[0].startswith("#")]
    assert [r[0] for r in units_rows] == list(units)
    assert all(len(r) == len(CSV_FIELDS) for r in units_rows)
    tail = body[len(units_rows):]
    assert tail == [[CSV_REFUSED, msg]] + [[CSV_CAUTION, c] for c in cautions]


def test_every_report_closes_with_the_cautions(engine):
    # README: the cautions "close every exported report". The session report is the
    # reference the triage reports follow: Safety is its last section.
    from diag.core.session import load_cautions, new_session, report_markdown

    rules = load_rules()
    units = _units(engine)
    res = triage(engine, units)
    cautions = caution_lines(rules)
    md = to_markdown(res, "cases/sounder-driver.yaml", cautions)
    heads = [line for line in md.splitlines() if line.startswith("## ")]
    assert heads[-1] == "## Safety" and "## Units" in heads
    tail = md.split("## Safety")[1]
    assert all(c in tail for c in cautions)
    assert md.rstrip().endswith(cautions[-1])
    assert list(to_json(res, "x.yaml", cautions))[-1] == "cautions"
    lines = to_csv(res, cautions).splitlines()
    assert [next(csv.reader([line]))[1] for line in lines[-len(cautions):]] == cautions
    c, defer = load_cautions(rules)
    session = report_markdown(engine.case, new_session(engine.case),
                              engine.diagnose(units["A00"]), c, defer)
    assert [x for x in session.splitlines() if x.startswith("## ")][-1] == "## Safety"


def test_markdown_names_the_units_of_each_fault(engine):
    # Bookkeeping against the per-unit results: each fault's row lists the units it
    # leads, a healthy unit reads "no fault found", suspects below SHOWN_P are left out.
    from diag.core.triage import SHOWN_P

    res = triage(engine, _units(engine))
    md = to_markdown(res, "cases/sounder-driver.yaml")
    for r in res.summary["by_fault"]:
        want = [u.unit for u in res.units if u.status == "fault" and u.top.fault == r["fault"]]
        line = next(x for x in md.splitlines() if x.startswith(f"| {r['fault']} |"))
        assert line.rstrip(" |").endswith(", ".join(want))
    for u in res.units:
        line = next(x for x in md.splitlines() if x.startswith(f"| {u.unit} |"))
        if u.status == "healthy":
            assert "| no fault found" in line
        for sus in u.diagnosis.suspects[1:3]:
            assert (f"{sus.fault} {sus.p:.2f}" in line) == (sus.p >= SHOWN_P)
    # look-alikes of a good unit are named while they round to at least 0.1 unit
    look = res.summary["healthy_lookalikes"]
    para = next(x for x in md.splitlines() if x.startswith("These units read like"))
    named = re.findall(r"(\S+:\S+) (\d+\.\d)", para.split("sum of p over them): ")[1])
    assert named and all(float(e) >= 0.1 for _, e in named)
    assert [f for f, _ in named] == [r["fault"] for r in look[:len(named)]]
    rest = len(look) - len(named)
    assert (f" and {rest} more." in para) == (rest > 0)


@pytest.mark.ngspice
def test_ngspice_batch_matches_diagnose_and_truth(ngspice, engine, tmp_path):
    # ngspice as the reference simulator: units generated by eval.generate (richer device
    # models, meter loading and error), a batch dominated by one failure.
    from eval import generate, inject

    case = engine.case
    plan = ([("fault", "R2:open")] * 8 + [("fault", "R3:open")] * 3
            + [("healthy", None)] * 3
            + [("unmodelled", k) for k in inject.unmodelled_kinds(case)[:2]])
    gen, dropped = generate.generate_case(case, plan, 11)
    bpath, tpath = generate.write(case, gen, tmp_path)
    truth = {r["unit"]: r for r in csv.DictReader(tpath.open(encoding="utf-8"))}
    rf = parse_file(bpath, case)
    res = triage(engine, rf.units, rf.rejected)
    assert len(res.units) == len(plan) - dropped
    for u in res.units:
        _same(engine.diagnose(u.readings), u.diagnosis)
    s = res.summary
    n_r2 = sum(1 for t in truth.values() if t["fault"] == "R2:open")
    n_r3 = sum(1 for t in truth.values() if t["fault"] == "R3:open")
    by_part = {r["part"]: r["units"] for r in s["by_part"]}
    # The summary's counts against the truth labels: the dominant failure leads, and no
    # part is counted for more units than could carry it (its truth units plus the
    # healthy and unmodelled ones, which may be blamed on anything).
    assert s["by_part"][0]["part"] == "R2"
    others = len(res.units) - n_r2 - n_r3
    assert n_r2 // 2 <= by_part["R2"] <= n_r2 + others
    assert by_part.get("R3", 0) <= n_r3 + others
    r2 = [u for u in res.units if truth[u.unit]["fault"] == "R2:open"]
    assert sum(u.top.fault == "R2:open" for u in r2) >= len(r2) // 2


def test_progress_bar_on_a_terminal(engine, tmp_path, capsys, monkeypatch):
    import sys

    units = _units(engine)
    batch = tmp_path / "batch.csv"
    _write_batch(batch, units, [])
    monkeypatch.setattr("diag.commands.triage.PROGRESS_MIN_UNITS", 1)
    monkeypatch.setattr(sys.stderr, "isatty", lambda: True)
    assert main(["triage", str(CASE), str(batch), "--json"]) == 0
    err = capsys.readouterr().err
    assert f"triage {len(units)} units [" in err and "100%" in err


@sync
async def test_batch_screen_marks_a_unit_that_lost_rows(engine, diag_home):
    # The interface shows which unit a refused row belonged to (Pilot, no sleeps).
    from textual.widgets import DataTable

    from diag.core.triage import RefusedRow
    from diag.tui.app import DiagApp
    from diag.tui.batch_screen import BatchScreen

    msg = "b.csv:9: row 9 (unit A01): unknown point 'TP99'"
    res = triage(engine, _units(engine), rejected=[RefusedRow(9, "A01", msg)])
    app = DiagApp(batch=res)
    async with app.run_test(size=(160, 40)) as pilot:
        await settle(pilot)
        assert isinstance(app.screen, BatchScreen)
        table = app.screen.query_one("#batch-units", DataTable)
        status = {str(k.value): str(table.get_cell(k, "status")) for k in table.rows}
        assert status["A01"].endswith(" · 1 row refused")
        assert all("refused" not in v for k, v in status.items() if k != "A01")


def test_a_batch_with_ac_readings_carries_the_signal_warning(tmp_path):
    # the same sentence as `diag check` (tests/test_check.py works its figures), in the
    # summary and near the top of the Markdown report, once any unit read AC
    from test_check import STAGE, _write

    from diag.core.bands import healthy_bands
    from diag.core.case import load_case
    from diag.core.engine import Engine, Reading
    from diag.core.triage import to_markdown, triage

    path = _write(tmp_path, STAGE.replace("LEVEL", "20m"), "loud.yaml")
    eng = Engine(load_case(str(path)), K=16)
    text = healthy_bands(eng.case, K=0).signal_text()
    res = triage(eng, {"A": [Reading("TP1", "ac", 1.0)], "B": [Reading("TP1", "dc", 5.0)]})
    assert res.summary["signal_warning"] == text != ""
    md = to_markdown(res, str(path))
    assert md.index(text) < md.index("## Units")
    dc_only = triage(eng, {"B": [Reading("TP1", "dc", 5.0)]})
    assert dc_only.summary["signal_warning"] == ""


def _engine_in(home: Path, monkeypatch, K: int) -> Engine:
    """The case's engine with K units, built with its cache in `home` (a fresh one
    solves everything anew)."""
    monkeypatch.setenv("DIAG_HOME", str(home))
    eng = Engine(load_case(str(CASE)), load_rules(), K=K)
    eng.build()
    return eng


def test_a_large_batch_solves_every_further_unit_first_and_ranks_as_diagnose(
        tmp_path, monkeypatch):
    # our own rule (BatchScorer.run): a batch of at least as many units as hypotheses
    # solves every hypothesis's further units (Engine._refine) in one go before its
    # blocks; the answers stay those of diagnose one unit at a time
    eng = _engine_in(tmp_path / "home", monkeypatch, K=16)
    H = len(eng.specs)
    rng = np.random.default_rng(3)
    ids = [s.id for s in eng.specs]
    units = [list(eng.simulate(ids[i % H] if ids[i % H] != "healthy" else "R2:open", rng))
             for i in range(H)]
    calls = []
    solve = eng._solve
    monkeypatch.setattr(eng, "_solve", lambda specs, K, *a, **kw: calls.append(
        (len(specs), kw.get("stream", 0))) or solve(specs, K, *a, **kw))
    got = BatchScorer(eng).run(units, threads=2)
    assert calls and calls[0] == (H, 1)  # every hypothesis at once, the further stream
    assert set(ids) <= set(eng._stores["-more"].mem)  # (and pairs, where tried)
    for r, d in zip(units[:12], got[:12], strict=True):
        _same(eng.diagnose(r), d)


def test_further_units_begun_early_are_those_of_build_further_and_cancel_cleanly(
        tmp_path, monkeypatch):
    # our own rule (Engine.build_further_later, BatchScorer.run): a large batch starts
    # its further units on forked workers before its tables and collects them after;
    # they are build_further's units, and a batch stopped meanwhile leaves no worker
    import multiprocessing

    from diag.core import workers

    eng = _engine_in(tmp_path / "home", monkeypatch, K=16)
    H = len(eng.specs)
    later = eng.build_further_later()
    if workers.forkable():
        assert len(multiprocessing.active_children()) == 2
    later.cancel()
    assert multiprocessing.active_children() == []
    assert eng.further_pending() == H                     # nothing kept from it
    eng.build_further_later().get()
    assert eng.further_pending() == 0
    ref = _engine_in(tmp_path / "other", monkeypatch, K=16)
    ref.build_further()
    assert "other" in str(ref._store_file("-more"))       # solved anew, not read back
    ids = [s.id for s in eng.specs]
    np.testing.assert_array_equal(eng._on_demand("-more", list(eng.specs)),
                                  ref._on_demand("-more", list(ref.specs)))
    assert ids == [s.id for s in ref.specs]

    eng2 = _engine_in(tmp_path / "third", monkeypatch, K=16)
    rng = np.random.default_rng(5)
    units = [list(eng2.simulate("R2:open", rng)) for _ in range(H)]

    def stop(*a, **kw):
        raise InterruptedError("triage cancelled")

    monkeypatch.setattr(BatchScorer, "_run", stop)
    with pytest.raises(InterruptedError):
        BatchScorer(eng2).run(units, threads=2)
    assert multiprocessing.active_children() == []
    assert eng2.further_pending() == H


def test_pairs_for_every_unit_no_single_fault_fits_are_solved_at_once(tmp_path, monkeypatch):
    # our own rule (BatchScorer.run): units that no single fault fits, not even with
    # one slip, are left to the end of the batch; the pairs of faults tried for all of
    # them are solved in one go, and each unit then ranks as diagnose ranks it alone
    eng = _engine_in(tmp_path / "home", monkeypatch, K=32)
    rng = np.random.default_rng(1)
    units = [list(eng.simulate(f, rng)) for f in
             ["R1:open+C2:short", "R2:open+R4:open", "R1:short+R4:short"] * 2
             + ["R2:open", "healthy"]]
    calls = []
    solve = eng._solve
    monkeypatch.setattr(eng, "_solve", lambda specs, K, *a, **kw: calls.append(
        (K, [s.origin for s in specs])) or solve(specs, K, *a, **kw))
    seen = []
    got = BatchScorer(eng).run(units, threads=2, progress=seen.append)
    tried = [d for d in got if d.extra["pairs_tried"]]
    assert len(tried) >= 2
    pair_solves = [c for c in calls if c[0] == eng.K]      # the further units are 3 K
    assert len(pair_solves) == 1 and set(pair_solves[0][1]) == {"pair"}
    # the further units of the pairs leading any of them by the K units: one solve
    # first, for them all (what a unit's slips of the probe lead to comes later)
    further = [c for c in calls if c[0] != eng.K and "pair" in c[1]]
    assert further and len(further[0][1]) > 1 and set(further[0][1]) == {"pair"}
    assert seen[-1] == 1.0 and seen == sorted(seen)
    ref = _engine_in(tmp_path / "other", monkeypatch, K=32)
    for r, d in zip(units, got, strict=True):
        _same(ref.diagnose(r), d)


def test_a_unit_no_fault_leads_by_half_is_undecided_not_a_fault_found(engine):
    # our own rule (triage.FOUND_P): a fault counts as found only where its group holds
    # more than half the probability; units read at a point or two are mostly not there
    # yet, and the report lists them to be read further, outside the faults found
    from diag.core.triage import FOUND_P

    rng = np.random.default_rng(7)
    units = {}
    for i, f in enumerate(["R2:open", "R3:open", "Q1:be-open", "C3:short", "LS1:open"]):
        rs = list(engine.simulate(f, rng))
        units[f"one{i}"] = rs[:1]
        units[f"two{i}"] = rs[1:3]
        units[f"all{i}"] = rs
    res = triage(engine, units)
    for u in res.units:
        d = u.diagnosis
        lead = sum(s.p for s in d.suspects if s.group == d.suspects[0].group)
        if d.fits and not d.reads_healthy():
            assert u.status == ("fault" if lead > FOUND_P else "undecided"), u.unit
    undecided = res.summary["undecided"]
    assert undecided and all(n.startswith(("one", "two")) for n in undecided)
    assert res.summary["faulty"] == sum(u.status == "fault" for u in res.units)
    assert not {n for r in res.summary["by_fault"] for n in r["unit_names"]} & set(undecided)
    md = to_markdown(res, str(CASE), caution_lines(load_rules()))
    assert f"{len(undecided)} undecided" in md and "## Undecided" in md
