"""Readings files (SPEC section 2): one unit (`point,value`, `point,kind,value`) or a batch
(`unit,point,value`, `unit,point,kind,value`). The only reader of readings files.

Values are volts (DC, or AC rms), amperes at supply points, with the prefixes and units of
case files (`312m`, `0.312 V`, `1.2 mA`). Bad rows (unknown point or kind, unparsable value,
a value the circuit cannot produce) are reported with their row number (header = row 1) and
left out; the other rows are kept. `check_value` validates one typed value the same way.

A spreadsheet set to a language that writes a decimal comma saves its CSV with
semicolons between the fields (common practice, no source); a file whose first line
splits on semicolons (or tabs) and holds no comma is read that way, and a value there may
carry a decimal comma (`5,47`).

As technicians write them: a value may end in `rms`, `ac` or `dc` (`0.72 Vrms`,
`72 mV AC`), which gives the reading's kind where the row gives none (and must agree
with it where it does); a free-text column (`notes`, `comment`, `time`, ...:
FREE_COLUMNS) is ignored; a row one field short under a header with `kind` is read
without it (a DC reading).
"""

from __future__ import annotations

import csv
import io
import math
import re
from dataclasses import dataclass, field
from pathlib import Path

from diag.core.case import Case, Point
from diag.core.engine import Reading
from diag.core.errors import DiagError
from diag.core.parts.sources import LIMIT_TOL
from diag.core.rules import load_rules
from diag.core.values import format_value, parse_value

HEADER_WORDS = ("unit", "point", "kind", "value")
# Columns a technician's sheet may carry beside the readings; read past, never used.
FREE_COLUMNS = ("note", "notes", "comment", "comments", "remark", "remarks", "time",
                "date", "tech", "technician", "by")
# A kind written after the value: "0.72 Vrms", "72 mV AC", "5.1 V dc".
_KIND_SUFFIX = re.compile(r"^(.*?\S)\s*(rms|ac|dc)\s*$", re.IGNORECASE)
_DECIMAL_COMMA = re.compile(r"^\s*[+-]?\d*,\d+(?:[eE][+-]?\d+)?\s*[^\d,.]*$")


def _delimiter(text: str) -> str:
    """The field separator: `;` or a tab where the first line that is not blank or a
    comment splits on it and holds no comma but between digits (a decimal comma, in a
    file with no header row; module docstring), else `,`."""
    for line in text.splitlines():
        s = line.strip()
        if not s or s.startswith("#"):
            continue
        if "," not in re.sub(r"(?<=\d),(?=\d)", "", s):
            for d in (";", "\t"):
                if d in s:
                    return d
        return ","
    return ","


@dataclass(frozen=True)
class ReadingsFile:
    """Parsed readings. `units` maps unit name ("" for a single-unit file) to its
    readings in file order; `errors` holds one DiagError per rejected row (`line` = the
    row); `batch` is true when the file has a `unit` column; `row_units` maps each batch
    row that names a unit, kept or refused, to that name (a row with the wrong number of
    fields names one only when `unit` is the first column)."""

    file: str
    units: dict
    errors: tuple[DiagError, ...]
    batch: bool
    row_units: dict = field(default_factory=dict)

    @property
    def rejected(self) -> tuple[str, ...]:
        return tuple(str(e) for e in self.errors)

    def single(self) -> tuple[Reading, ...]:
        """The readings of the only unit; DiagError when the file holds several."""
        if len(self.units) > 1:
            raise DiagError(f"the file holds {len(self.units)} units", file=self.file,
                            hint="diagnose takes one unit; use `diag triage` for a batch")
        return next(iter(self.units.values()), ())


def limits(case: Case, rules=None) -> dict[tuple[str, str], tuple[float, float]]:
    """(point, kind) -> (lowest, highest) reading the circuit can produce under any fault,
    from its supplies alone: volts, amperes at supply points (a supply's current below
    zero only as far as the other supplies can drive it back)."""
    rules = rules or load_rules()
    cfg = rules["checks"].get("readings") or {}
    over = float(cfg.get("over_supply", 0.05))
    neg_v = float(cfg.get("negative_margin_v", 0.1))
    neg_a = float(cfg.get("negative_margin_a", 1e-4))
    supplies = [p for p in case.parts if p.kind == "supply"]
    vsum = sum(abs(p.value or 0.0) * (1 + (p.tol or 0.0)) for p in supplies)
    sig = case.signal
    vpk = (sig.value or 0.0) * math.sqrt(2) if sig is not None else 0.0
    vmax = (vsum + vpk) * (1 + over) + neg_v
    positive = case.nothing_below_ground
    def most_amps(sp) -> float:  # what the source resistance or current limit lets through
        r = float(sp.fields.get("r_source", 0.0) or 0.0)
        v = abs(sp.value or 0.0) * (1 + (sp.tol or 0.0)) * (1 + over)
        lim = sp.fields.get("limit")
        cap = float(lim) * (1 + LIMIT_TOL) * (1 + over) if lim else math.inf
        return min(v / r if r > 0 else math.inf, cap)

    out = {}
    for pt in case.points:
        for kind in pt.reads:
            if pt.supply:
                sp = case.part(pt.supply)
                # another supply can drive current back into this one (a logic pin
                # feeding a dead rail through a junction): down to what the others let
                # through; with one supply only the meter's allowance below zero
                back = sum(most_amps(o) for o in supplies if o.ref != sp.ref)
                out[(pt.id, kind)] = (-(back + neg_a), most_amps(sp))
            elif kind == "ac":
                out[(pt.id, kind)] = (0.0, vmax)
            elif positive and (pt.minus in (None, case.ground)):
                out[(pt.id, kind)] = (-neg_v, vmax)
            else:
                out[(pt.id, kind)] = (-vmax, vmax)
    return out


# What a handheld meter shows over its range, as technicians type it ("OL", "O.L.",
# "-OL", "0L" with a zero for the O, "over", "overload").
_OVER_RANGE = re.compile(r"[-+]?\s*[O0]\.?\s*L\.?|over(\s*range)?|overload", re.IGNORECASE)


def _over_range_hint(case: Case, unit: str, hi: float) -> str:
    """What to do about an OL display at a point reading volts or amperes (unit); hi the
    highest reading the circuit can produce there (`limits`)."""
    top = max(float(x) for x in case.meter["a_ranges" if unit == "A" else "v_ranges"])
    if unit == "A":
        return (f"take it on the meter's top current range ({format_value(top, 'A')}); "
                "if that shows OL too, a short across the supply is likely. Switch off, "
                "set the bench supply's current limit low, and look for the short with the "
                "power off (ohms across the rails) before powering it again; leave this "
                "reading out")
    if hi <= top:
        return (f"every voltage this circuit can make fits the meter's top range "
                f"({format_value(top, 'V')}): check that the meter is on volts (not ohms "
                "or a current range), on a range above the supply or autoranging, and take "
                "the reading again")
    return ("this point can read more than the meter's top range: use a meter rated for "
            "it, following local codes and licensed practice for that voltage")


def point_of(case: Case, text) -> Point | None:
    """The case's test point a typed id names: exactly, or else in any letter case when
    that names one point only ("tp3" for TP3); None when it names none."""
    t = str(text).strip()
    try:
        return case.point(t)
    except KeyError:
        same = [p for p in case.points if p.id.casefold() == t.casefold()]
        return same[0] if len(same) == 1 else None


def _said_kind(text) -> tuple[str, str | None]:
    """A typed value and the kind it names after itself ("0.72 Vrms": "0.72 V", "ac"; no
    kind named: the text as typed and None)."""
    m = _KIND_SUFFIX.match(str(text).strip())
    if m is None:
        return str(text), None
    return m.group(1), "dc" if m.group(2).lower() == "dc" else "ac"


def check_value(case: Case, point: str, kind: str, text, lim=None, *, file=None,
                row=None) -> float:
    """Validate one reading typed or read from a file; return the value in volts
    (amperes at a supply point). Raises DiagError naming the point (and row)."""
    where = f"row {row}" if row else None
    kind = (kind or "dc").strip().lower()
    pt = point_of(case, point)
    if pt is None:
        raise DiagError(f"unknown point {point!r}", file=file, line=row, where=where,
                        hint="points: " + ", ".join(p.id for p in case.points))
    if kind not in pt.reads:
        raise DiagError(f"{pt.id} offers no {kind} reading", file=file, line=row,
                        where=where, hint="offered there: " + ", ".join(pt.reads))
    unit = "A" if pt.supply else "V"
    lo, hi = (lim or limits(case))[(pt.id, kind)]
    if _OVER_RANGE.fullmatch(str(text).strip()):
        raise DiagError(f"{pt.id} {kind}: the meter showed OL (over range), and diag needs "
                        "a number", file=file, line=row, where=where,
                        hint=_over_range_hint(case, unit, hi))
    bare_text, said = _said_kind(text)
    if said is not None and said != kind:
        raise DiagError(f"{pt.id}: the value says {said} ({str(text).strip()}) but the "
                        f"reading's kind is {kind}", file=file, line=row, where=where,
                        hint="give the kind once, in the kind column or after the value")
    text = bare_text
    try:
        value = parse_value(text, unit)
    except ValueError as exc:
        raise DiagError(f"{pt.id}: {exc}", file=file, line=row, where=where) from None
    if not lo <= value <= hi:
        if value < lo:
            why = ("negative: probes reversed?" if lo >= -1.0 else "below anything the "
                   "supplies can produce")
        else:
            why = ("above anything the supplies can produce: wrong range, wrong point or "
                   "a typing slip?")
        hint = (f"this point can read from {format_value(lo, unit)} to "
                f"{format_value(hi, unit)}; take it again")
        bare = not re.search(r"[a-zA-Zµ]", str(text))
        if value > hi and bare and lo <= value * 1e-3 <= hi:  # a display in m-units
            milli = format_value(value * 1e-3, unit)
            hint = (f"if the meter showed {str(text).strip()} m{unit}, type it with its "
                    f"prefix ({str(text).strip()}m, read as {milli}); else {hint}")
        raise DiagError(f"{pt.id} {kind} reading {format_value(value, unit)} is {why}",
                        file=file, line=row, where=where, hint=hint)
    return value


def parse_text(text: str, case: Case, file: str = "<readings>", rules=None) -> ReadingsFile:
    """Parse readings CSV text (see module docstring)."""
    lim = limits(case, rules)
    text = text.lstrip("\ufeff")
    delim = _delimiter(text)
    rows = list(csv.reader(io.StringIO(text), delimiter=delim))
    errors: list[DiagError] = []
    units: dict[str, dict[tuple[str, str], Reading]] = {}
    seen_row: dict[tuple[str, str, str], int] = {}
    row_units: dict[int, str] = {}
    cols: list[str] | None = None
    batch = False
    for i, raw in enumerate(rows, start=1):
        cells = [c.strip() for c in raw]
        if not any(cells) or cells[0].startswith("#"):
            continue
        if cols is None:
            low = [c.lower() for c in cells]
            if "point" in low and "value" in low:
                odd = [c for c in low if c not in HEADER_WORDS + FREE_COLUMNS]
                if odd:
                    raise DiagError(f"unknown column {odd[0]!r} in the header", file=file,
                                    line=i, hint="columns: " + ", ".join(HEADER_WORDS)
                                    + " (and notes, ignored)")
                cols = low
                batch = "unit" in cols
                continue
            if len(cells) in (2, 3):  # no header: point,value or point,kind,value
                cols = ["point", "value"] if len(cells) == 2 else ["point", "kind", "value"]
            else:
                raise DiagError("no header row", file=file, line=i,
                                hint="start the file with point,value (or point,kind,value; "
                                "unit,point,value for a batch), fields separated by commas "
                                "(or semicolons throughout)")
        if batch:
            col = cols.index("unit")
            if col < len(cells) and cells[col] and (col == 0 or len(cells) == len(cols)):
                row_units[i] = cells[col]
        if len(cells) == len(cols) - 1 and "kind" in cols and "" not in cells:
            cells.insert(cols.index("kind"), "")  # no kind given: a DC reading
        if len(cells) != len(cols):
            comma = (len(cells) == len(cols) + 1 and cells[-2].lstrip("+-").isdigit()
                     and cells[-1][:1].isdigit())
            errors.append(DiagError(
                f"{len(cells)} fields, expected {len(cols)} ({','.join(cols)})", file=file,
                line=i, where=f"row {i}",
                hint=(f"a decimal comma? The comma separates the columns: write "
                      f"{cells[-2]}.{cells[-1]}") if comma else None))
            continue
        rec = dict(zip(cols, cells, strict=True))
        if delim != "," and _DECIMAL_COMMA.match(rec["value"]):
            rec["value"] = rec["value"].replace(",", ".", 1)
        unit = rec.get("unit", "")
        if batch and not unit:
            errors.append(DiagError("no unit name", file=file, line=i, where=f"row {i}",
                                    hint="every batch row starts with the unit's name"))
            continue
        kind = (rec.get("kind") or _said_kind(rec["value"])[1] or "dc").lower()
        try:
            value = check_value(case, rec["point"], kind, rec["value"], lim, file=file, row=i)
        except DiagError as exc:
            errors.append(exc)
            continue
        key = (point_of(case, rec["point"]).id, kind)  # as the case spells it
        prev = seen_row.get((unit, *key))
        if prev is not None:
            errors.append(DiagError(f"{key[0]} {kind} also given on row {prev}; the later "
                                    "reading is used", file=file, line=prev,
                                    where=f"row {prev}"))
        seen_row[(unit, *key)] = i
        units.setdefault(unit, {}).pop(key, None)
        units[unit][key] = Reading(key[0], kind, value, row=i)
    if cols is None:
        raise DiagError("empty readings file", file=file,
                        hint="give at least the header row point,value")
    if not batch and not units:
        units[""] = {}
    return ReadingsFile(file, {u: tuple(r.values()) for u, r in units.items()},
                        tuple(errors), batch, row_units)


def parse_file(path: str | Path, case: Case, rules=None) -> ReadingsFile:
    """Read and parse a readings CSV file (UTF-8)."""
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise DiagError("file not found", file=str(path), hint="check the path") from None
    except UnicodeDecodeError:
        raise DiagError("not UTF-8 text", file=str(path), hint="save the file as UTF-8") from None
    return parse_text(text, case, file=str(path), rules=rules)
