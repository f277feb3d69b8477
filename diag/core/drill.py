"""Drills: a hidden unit with one fault, simulated meter readings, a score, class results.

A `Drill` is a run of one or more exercises for one trainee. Each exercise (`Round`) draws
its unit once, from a Generator seeded by the exercise, through `Engine.simulate`: part
tolerances and fault parameters are drawn once, so every reading of that exercise comes
from the same unit, and each reading is what the case's meter shows (meter error and
display resolution included; `meter.display_text` writes it as the display does). Same case,
fault and seed give the same unit.

The trainee names a fault (`Round.name`). A wrong naming costs points (a part replaced
needlessly) and the exercise goes on, up to MAX_NAMINGS namings; the trainee may also
give up and have the fault shown (`reveal`), or leave (`abandon`). Every way out is
scored (`Score`) and, in a class, written to the results CSV (`RESULT_FIELDS`).

The score: whether the named fault is the hidden one or one the offered readings cannot
tell from it (same group); the readings used and their cost against what diag's own
next-reading advice needs on that unit; the wrong namings; and the points (`work_points`,
rules below) that sum these up. `summarise` reads results files back and says who needs
which kind of practice.

Volts at voltage points, amperes at supply points, seconds for times.
"""

from __future__ import annotations

import csv
import datetime as _dt
import difflib
import math
import secrets
import threading
import time
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np

from diag.core.advise import format_bits
from diag.core.case import SEMICONDUCTORS, Case
from diag.core.engine import Diagnosis, Engine, Reading
from diag.core.errors import DiagError
from diag.core.meter import display_text

# diag's advice is followed until its leading group holds this much probability; the same
# stopping rule the evaluation's guided mode uses (eval/score.py: p >= 0.9 on one group).
P_DONE = 0.9
# A trainee who takes more than this many times the readings diag's advice needs is
# flagged as over-reading in the class summary (a teaching choice, not a physical limit).
OVERREAD_RATIO = 1.5
# How many readings the score lists as the ones that would have told the most.
N_TELLING = 3
# diag's advice is replayed on the drawn unit this many times, each with a fresh meter
# error, and the readings it needed are averaged.
ADVICE_REPLAYS = 5
# A drawn unit the solver cannot settle is drawn again from the same Generator (so the
# seed still fixes the unit), at most this many times.
DRAW_TRIES = 5

# Points (a teaching choice, stated so that a trainee can work a score out by hand):
# finding the fault earns FOUND_POINTS; each unit of reading cost (a point's `cost`, 1 by
# default) beyond what diag's advice needed on the same unit takes POINTS_PER_EXTRA_COST,
# at most READING_PENALTY_MAX in all; each wrong naming takes WRONG_NAMING_POINTS (a part
# replaced needlessly). A fault not found scores 0. MAX_NAMINGS namings in all: the last
# one wrong ends the exercise and shows the fault.
FOUND_POINTS = 100
POINTS_PER_EXTRA_COST = 5
READING_PENALTY_MAX = 40
WRONG_NAMING_POINTS = 20
MAX_NAMINGS = 3

# How an exercise ended (the `status` column of the results).
FOUND, REVEALED, NAMINGS_USED_UP, ABANDONED = "found", "revealed", "namings-used-up", "abandoned"
STATUS_WORDS = {FOUND: "found", REVEALED: "gave up, fault shown",
                NAMINGS_USED_UP: f"not found in {MAX_NAMINGS} namings",
                ABANDONED: "left before naming"}

RESULT_FIELDS = ("trainee", "exercise", "correct", "readings_used", "seconds", "case",
                 "fault", "seed", "named", "same_group", "advice_readings", "part_family",
                 "mode_class", "finished", "status", "points", "wrong_namings",
                 "named_wrong", "first_wrong_at", "reading_cost", "advice_cost")


@dataclass(frozen=True)
class Exercise:
    """One exercise: a case file, a fault id (None: drawn by the priors) and a seed."""

    case: str
    fault: str | None = None
    seed: int | None = None
    name: str = ""


@dataclass(frozen=True)
class Unit:
    """A drawn unit: its fault, the model's reading at every observable (loading
    included, meter error excluded; volts or amperes, case order) and what the meter
    showed there."""

    fault: str
    truth: np.ndarray
    shown: tuple[Reading, ...]


def _spec(engine: Engine, fault_id: str):
    from diag.core import faults

    for s in engine.specs:
        if s.id == fault_id:
            return s
    return faults.parse_fault_id(engine.case, engine.rules, fault_id)


def draw_unit(engine: Engine, fault_id: str, rng: np.random.Generator) -> Unit:
    """Draw one unit with this fault (tolerances and fault values once, then the meter
    error of each reading), in the same order of draws as Engine.simulate: the same
    Generator state gives the same readings as `diag simulate`."""
    from diag.core import ensemble, meter, solver

    circ = engine.circuit
    obs = engine.case.observables
    params = ensemble.draw_unit(circ, _spec(engine, fault_id), 1, rng,
                                engine.inf.get("ambient"))
    dc = solver.solve_dc(circ, params)
    ac = solver.solve_ac(circ, params, dc) if any(o.kind == "ac" for o in obs) else None
    x = np.asarray(meter.observe(circ, params, dc, ac, obs, engine.case.meter)[0], float)
    if not np.all(np.isfinite(x)):
        why = next((w for w in dc.why if w), "the circuit did not solve")
        raise DiagError(f"{fault_id}: {why}", file=engine.case.path,
                        hint="try another seed")
    return Unit(fault_id, x, show(engine, x, rng))


def show(engine: Engine, truth: np.ndarray, rng: np.random.Generator) -> tuple[Reading, ...]:
    """What the case's meter shows for the model readings `truth` (M,): meter error drawn
    within its stated accuracy (`meter.display_unit`), rounded to the display resolution."""
    from diag.core import meter

    obs = engine.case.observables
    shown = meter.display_unit(truth, obs, engine.case.meter, rng)
    return tuple(Reading(o.point, o.kind, float(v)) for o, v in zip(obs, shown, strict=True))


def close_names(text: str, ids: Sequence[str], n: int = 4) -> list[str]:
    """Fault ids close to a typed name that matches none (a slip such as `R99:open`,
    `Q1:be-shrt`, `helthy`), best first, at most `n`. Part reference and mode are
    compared apart (difflib's ratio, the reference weighing more), so another mode of the
    typed part, or the typed mode of a nearby part, comes first."""
    t = text.strip().lower()
    if not t:
        return []
    ref, colon, mode = t.partition(":")
    scored = []
    for fid in ids:
        f = fid.lower()
        whole = difflib.SequenceMatcher(None, t, f).ratio()
        fref, fcolon, fmode = f.partition(":")
        if colon and fcolon:
            parts = (0.6 * difflib.SequenceMatcher(None, ref, fref).ratio()
                     + 0.4 * difflib.SequenceMatcher(None, mode, fmode).ratio())
        elif fcolon:
            parts = 0.9 * difflib.SequenceMatcher(None, t, fref).ratio()
        else:
            parts = 0.0
        score = max(whole, parts)
        if score >= 0.5:
            scored.append((-score, fid))
    scored.sort()
    return [fid for _, fid in scored[:n]]


@dataclass(frozen=True)
class Telling:
    """A reading that would have told much: (point, kind) and why, in words."""

    point: str
    kind: str
    why: str


@dataclass(frozen=True)
class Points:
    """A score worked out by the rules above, each part in whole points: `found` (100 or
    0), `readings` and `namings` (the deductions, 0 or negative) and `total` (their sum,
    never below 0; 0 when the fault was not found)."""

    found: int
    readings: int
    namings: int
    total: int


def work_points(found: bool, reading_cost: float, advice_cost: float,
                wrong_namings: int) -> Points:
    """The points of an exercise: FOUND_POINTS if found, less POINTS_PER_EXTRA_COST for
    each unit of reading cost beyond `advice_cost` (rounded to a whole point, halves up; at
    most READING_PENALTY_MAX), less WRONG_NAMING_POINTS for each wrong naming; 0 at least,
    and 0 when not found. Example: found, cost 5 against 2.4, one wrong naming:
    100 - round(5 × 2.6) - 20 = 100 - 13 - 20 = 67."""
    extra = round(max(0.0, reading_cost - advice_cost), 6)
    readings = min(READING_PENALTY_MAX, math.floor(POINTS_PER_EXTRA_COST * extra + 0.5))
    namings = WRONG_NAMING_POINTS * wrong_namings
    base = FOUND_POINTS if found else 0
    total = max(0, base - readings - namings) if found else 0
    return Points(base, -readings, -namings, total)


@dataclass(frozen=True)
class Contrast:
    """A reading the trainee took, against what a named fault predicts there: the
    predicted band (about the 1st to 99th percentile, as the meter shows it) and the
    measured value, volts or amperes; `why` says it in words."""

    point: str
    kind: str
    low: float
    high: float
    measured: float
    why: str


@dataclass(frozen=True)
class Score:
    """The outcome of one exercise.

    `status` says how it ended (FOUND, REVEALED, NAMINGS_USED_UP, ABANDONED). `correct`
    is true when the named fault is the hidden one or in its group (the offered readings
    cannot tell them apart; `same_group` says which). `named` is the last fault named ("" if
    none); `wrong` the wrong namings in order. `advice_readings` (and `advice_cost`, the
    same in cost units) is the mean number of readings diag's own advice took on this unit
    until one group held P_DONE (or nothing was left to learn), over ADVICE_REPLAYS fresh
    meter errors; `advice_fault` is where the advice ended on the readings the trainee saw.
    `points` works them into one figure (`work_points`).
    """

    truth: str
    truth_text: str
    named: str
    named_text: str
    correct: bool
    same_group: bool
    readings_used: int
    advice_readings: float
    advice_fault: str
    advice_p: float
    telling: tuple[Telling, ...]
    seconds: float
    status: str = FOUND
    wrong: tuple[Naming, ...] = ()
    reading_cost: float = 0.0
    advice_cost: float = 0.0
    points: Points = Points(0, 0, 0, 0)

    def breakdown(self) -> tuple[tuple[str, int | None], ...]:
        """How the points were worked out, as (what, points) lines, the last one the
        score; the others sum to it. When the fault was not found the readings and the
        namings are listed with None (not counted: the score is 0)."""
        pts = self.points
        found = bool(pts.found)
        cost = (f", cost {self.reading_cost:g}" if self.reading_cost != self.readings_used
                else "")
        par = (f", cost {self.advice_cost:.1f}"
               if abs(self.advice_cost - self.advice_readings) > 1e-9 else "")
        wrong = ", ".join(w.fault for w in self.wrong)
        if found and self.named == "healthy" and self.truth != "healthy":
            head = (f"found as far as the offered readings go: {self.truth} reads like a "
                    "good unit at every point offered")
        else:
            head = "found the fault" if found else f"not found ({STATUS_WORDS[self.status]})"
        return (
            (head, pts.found),
            (f"readings: {self.readings_used} taken{cost}; an efficient search (diag's "
             f"advice) needed {self.advice_readings:.1f}{par}; {POINTS_PER_EXTRA_COST} "
             f"per unit of cost beyond it, at most {READING_PENALTY_MAX}",
             pts.readings if found else None),
            (f"wrong namings: {len(self.wrong)}" + (f" ({wrong})" if wrong else "")
             + f"; {WRONG_NAMING_POINTS} each (a part replaced needlessly)",
             pts.namings if found else None),
            ("score", pts.total),
        )


@dataclass(frozen=True)
class Naming:
    """One naming of a fault by the trainee: the fault id and its text, whether it is
    right (the hidden fault or in its group), the readings taken when it was named, for a
    wrong one the readings that speak against it (`against`, furthest off first), and the
    exercise's score when this naming ended it (right, or the last naming allowed)."""

    fault: str
    text: str
    right: bool
    same_group: bool
    readings: int
    against: tuple[Contrast, ...] = ()
    score: Score | None = None


def fault_family(case: Case, fault_id: str) -> tuple[str, str]:
    """(part family, mode class) of a fault id, for the class summary.

    Part family: `junction` for diodes, LEDs, zeners and transistors, `resistor` for
    resistors and pots, `capacitor` for both capacitor kinds, otherwise the part kind;
    `multiple` for a multiple fault, `healthy` for the healthy unit. Mode class: `open`,
    `short`, or `drift` (a value off or a part fitted wrong: high, low, leaky, low-beta,
    reversed, ce-swapped, ...).
    """
    if fault_id == "healthy":
        return "healthy", "healthy"
    members = fault_id.split("+")
    if len(members) > 1:
        return "multiple", "multiple"
    ref, _, mode = fault_id.partition(":")
    try:
        kind = case.part(ref).kind
    except KeyError:
        raise DiagError(f"fault {fault_id!r} names no part of the case", file=case.path,
                        where=ref, hint="use a fault id listed by `diag faults`") from None
    if kind in SEMICONDUCTORS:
        family = "junction"
    elif kind in ("resistor", "pot"):
        family = "resistor"
    elif kind in ("capacitor", "electrolytic"):
        family = "capacitor"
    else:
        family = kind
    if "open" in mode or mode == "dead":
        cls = "open"
    elif "short" in mode:
        cls = "short"
    else:
        cls = "drift"
    return family, cls


def pick_fault(engine: Engine, rng: np.random.Generator, visible: bool = False) -> str:
    """A fault id drawn by the hypotheses' priors (`healthy` excluded). With `visible`,
    none of the healthy unit's group either: no offered reading shows those faults, so a
    drill could only be won on them by guessing (unless every fault is in it)."""
    hyps = [h for h in engine.ensemble.hypotheses if h.id != "healthy"]
    if visible:
        group = _group_of(engine)
        seen = [h for h in hyps if group[h.id] != group.get("healthy")]
        hyps = seen or hyps
    if not hyps:
        raise DiagError("the case has no fault hypotheses to drill", file=engine.case.path,
                        hint="check rules/faults.yaml covers the case's part kinds")
    p = np.array([max(h.prior, 0.0) for h in hyps], dtype=float)
    p = p / p.sum() if p.sum() > 0 else np.full(len(hyps), 1.0 / len(hyps))
    return hyps[int(rng.choice(len(hyps), p=p))].id


def _group_of(engine: Engine) -> dict[str, int]:
    ens = engine.ensemble
    return {h.id: int(g) for h, g in zip(ens.hypotheses, ens.group, strict=True)}


def _top_group(d: Diagnosis) -> tuple[str, float]:
    """Leading suspect and the probability held by its group."""
    top = d.suspects[0]
    return top.fault, d.lead_p()


def follow_advice(engine: Engine, unit: dict[tuple[str, str], Reading]
                  ) -> tuple[list[tuple[str, str, float]], Diagnosis]:
    """Take readings of `unit` in the order diag's `next` advice gives, from none, until
    the leading group holds P_DONE or nothing is left to learn. Returns the readings taken
    as (point, kind, bits when advised) and the last diagnosis."""
    taken: list[Reading] = []
    steps: list[tuple[str, str, float]] = []
    d = engine.diagnose(taken)
    while _top_group(d)[1] < P_DONE:
        nxt = [n for n in d.next if (n.point, n.kind) in unit
               and all((r.point, r.kind) != (n.point, n.kind) for r in taken)]
        if not nxt:
            break
        n = nxt[0]
        taken.append(unit[(n.point, n.kind)])
        steps.append((n.point, n.kind, float(n.bits)))
        d = engine.diagnose(taken)
    return steps, d


def telling_readings(engine: Engine, truth: str, named: str,
                     steps: Sequence[tuple[str, str, float]]) -> tuple[Telling, ...]:
    """The readings that would have told the most. When the named fault is another one,
    the observables whose predicted bands under the two faults lie furthest apart (in
    units of their combined half-widths, each widened by two meter standard deviations);
    otherwise the first readings diag advised."""
    from diag.core import meter

    m = engine.case.meter
    units = {(o.point, o.kind): o.unit for o in engine.case.observables}
    if named != truth and named in _group_of(engine):
        bt = {(b.observable.point, b.observable.kind): b for b in engine.bands(truth)}
        bn = {(b.observable.point, b.observable.kind): b for b in engine.bands(named)}
        scored = []
        for key, a in bt.items():
            b = bn.get(key)
            if b is None or not np.isfinite([a.mid, b.mid]).all():
                continue
            sig = meter.sigma(np.array([a.mid, b.mid]), key[1], m, units[key])
            width = (a.high - a.low) / 2 + (b.high - b.low) / 2 + 2.0 * float(np.sum(sig))
            sep = abs(a.mid - b.mid) / max(width, 1e-12)
            scored.append((sep, key, a, b))
        scored.sort(key=lambda t: -t[0])
        out = []
        for sep, key, a, b in scored[:N_TELLING]:
            if sep <= 1.0:
                break
            u = units[key]
            out.append(Telling(key[0], key[1],
                               f"{truth}: {display_text(a.mid, key[1], u, m)}; "
                               f"{named}: {display_text(b.mid, key[1], u, m)}"))
        if out:
            return tuple(out)
    return tuple(Telling(p, k, f"diag's advice, {format_bits(bits)} expected")
                 for p, k, bits in steps[:N_TELLING])


def _span(low: float, high: float, kind: str, unit: str, meter_profile) -> str:
    """A predicted band as the meter would show its edges ("8.91 V to 9.02 V")."""
    a = display_text(low, "dc", unit, meter_profile)
    b = display_text(high, kind, unit, meter_profile)
    if a + (" rms" if kind == "ac" else "") == b:
        return b
    return f"{a} to {b}"


def against(engine: Engine, fault_id: str, taken: Sequence[Reading]) -> tuple[Contrast, ...]:
    """The readings in `taken` that a unit with `fault_id` would not show: outside the
    fault's predicted band (Engine.bands, about the 1st to 99th percentile) widened at
    each edge by the meter's accuracy there. Furthest off first (in meter standard
    deviations from the nearer widened edge), at most N_TELLING."""
    from diag.core import meter

    m = engine.case.meter
    units = {(o.point, o.kind): o.unit for o in engine.case.observables}
    bands = {(b.observable.point, b.observable.kind): b for b in engine.bands(fault_id)}
    found = []
    for r in taken:
        key = (r.point, r.kind)
        b = bands.get(key)
        if b is None or math.isnan(r.value) or not np.isfinite([b.low, b.high]).all():
            continue
        u = units[key]
        lo = b.low - float(meter.accuracy(np.array([b.low]), r.kind, m, u)[0])
        hi = b.high + float(meter.accuracy(np.array([b.high]), r.kind, m, u)[0])
        if lo <= r.value <= hi:
            continue
        edge = lo if r.value < lo else hi
        sig = float(meter.sigma(np.array([edge]), r.kind, m, u)[0])
        off = abs(r.value - edge) / max(sig, 1e-15)
        why = (f"{fault_id} would read {_span(b.low, b.high, r.kind, u, m)} at {r.point} "
               f"{r.kind}; you measured {display_text(r.value, r.kind, u, m)}")
        found.append((-off, len(found), Contrast(r.point, r.kind, b.low, b.high, r.value,
                                                 why)))
    found.sort(key=lambda t: (t[0], t[1]))
    return tuple(c for _, _, c in found[:N_TELLING])


@dataclass
class Round:
    """One exercise in progress: the hidden unit (every observable's displayed reading,
    drawn once), the readings the trainee has asked for, the faults named so far, and the
    score once the exercise has ended (found, shown, namings used up, or left)."""

    exercise: Exercise
    engine: Engine
    truth: str
    drawn: Unit
    seed: int = 0
    clock: Callable[[], float] = time.monotonic
    taken: list[Reading] = field(default_factory=list)
    started: float = 0.0
    score: Score | None = None
    namings: list[Naming] = field(default_factory=list)
    lock: threading.RLock = field(default_factory=threading.RLock, repr=False,
                                  compare=False)

    @classmethod
    def start(cls, exercise: Exercise, engine: Engine,
              clock: Callable[[], float] = time.monotonic) -> Round:
        """Draw the fault (if not given) and the unit from the exercise's seed (a fresh
        seed, kept in `seed` so the unit can be replayed, when the exercise has none)."""
        seed = exercise.seed if exercise.seed is not None else secrets.randbelow(2**31)
        rng = np.random.default_rng(seed)
        groups = _group_of(engine)
        truth = exercise.fault or pick_fault(engine, rng, visible=True)
        if truth not in groups:
            raise DiagError(f"unknown fault {truth!r}", file=engine.case.path,
                            hint="list the case's faults with `diag faults CASE`")
        for attempt in range(DRAW_TRIES):
            try:
                unit = draw_unit(engine, truth, rng)
                break
            except DiagError:  # the solver could not settle this draw: draw again
                if attempt == DRAW_TRIES - 1:
                    raise
        return cls(exercise, engine, truth, unit, seed=seed, clock=clock, started=clock())

    @property
    def unit(self) -> dict[tuple[str, str], Reading]:
        """(point, kind) -> the reading the meter shows there."""
        return {(r.point, r.kind): r for r in self.drawn.shown}

    @property
    def case(self) -> Case:
        return self.engine.case

    def offered(self) -> tuple[tuple[str, str], ...]:
        """Every (point, kind) the trainee may ask for, in case order."""
        return tuple((o.point, o.kind) for o in self.case.observables)

    @property
    def wrong(self) -> tuple[Naming, ...]:
        """The wrong namings so far, in order."""
        return tuple(n for n in self.namings if not n.right)

    @property
    def namings_left(self) -> int:
        """How many more faults the trainee may name in this exercise."""
        return MAX_NAMINGS - len(self.namings)

    @property
    def reading_cost(self) -> float:
        """The summed cost (the points' `cost`, 1 by default) of the readings taken."""
        return _cost(self.case, [(r.point, r.kind) for r in self.taken])

    def shown(self, reading: Reading) -> str:
        """A reading written as the case's meter shows it (meter.display_text)."""
        o = next(o for o in self.case.observables
                 if (o.point, o.kind) == (reading.point, reading.kind))
        return display_text(reading.value, o.kind, o.unit, self.case.meter)

    def read(self, point: str, kind: str = "dc") -> Reading:
        """The meter reading at (point, kind), as the meter shows it. Asking again for a
        reading already taken returns it without counting it twice."""
        if self.score is not None:
            raise DiagError("this exercise is already scored", hint="go on to the next one")
        key = (point, kind)
        if key not in self.unit:
            offered = ", ".join(f"{p} {k}" for p, k in self.offered())
            raise DiagError(f"no {kind} reading is offered at {point}", file=self.case.path,
                            where=point, hint=f"offered: {offered}")
        for r in self.taken:
            if (r.point, r.kind) == key:
                return r
        r = self.unit[key]
        stamped = Reading(r.point, r.kind, r.value, row=None,
                          time=_dt.datetime.now(_dt.UTC).isoformat(timespec="seconds"))
        self.taken.append(stamped)
        return stamped

    def ranking(self) -> Diagnosis:
        """diag's ranking on the readings taken so far (shown only when hints are on)."""
        return self.engine.diagnose(self.taken)

    def name(self, fault_id: str) -> Naming:
        """The trainee names `fault_id` (a fault id of the case, or `healthy`). A right
        naming (the hidden fault or one of its group) ends the exercise; a wrong one costs
        WRONG_NAMING_POINTS and the exercise goes on, until MAX_NAMINGS have been made.
        The returned Naming carries the score when the exercise ended."""
        with self.lock:
            if self.score is not None:
                raise DiagError("this exercise is already scored",
                                hint="go on to the next one")
            groups = _group_of(self.engine)
            named = fault_id.strip()
            if named not in groups:
                close = close_names(named, list(groups))
                raise DiagError(f"unknown fault {named!r}", file=self.case.path,
                                hint=(f"did you mean {', '.join(close)}? " if close else "")
                                + "`diag faults CASE` lists the fault ids")
            if any(n.fault == named for n in self.namings):
                raise DiagError(f"you named {named} already: it is not the fault",
                                hint="name another fault, take more readings, or give up "
                                     "to see the fault")
            same = named != self.truth and groups[named] == groups[self.truth]
            right = named == self.truth or same
            naming = Naming(named, self.engine.hypothesis(named).text, right, same,
                            len(self.taken),
                            () if right else against(self.engine, named, self.taken))
            self.namings.append(naming)
            if right or self.namings_left <= 0:
                naming = replace(naming,
                                 score=self._finish(FOUND if right else NAMINGS_USED_UP))
                self.namings[-1] = naming
            return naming

    def reveal(self) -> Score:
        """The trainee gives up: the exercise ends unfound (0 points) and the score shows
        the fault."""
        return self._finish(REVEALED)

    def abandon(self) -> Score:
        """The trainee leaves before the exercise ended: scored as not found, with the
        readings taken so far, so that the attempt is on record."""
        return self._finish(ABANDONED)

    def _finish(self, status: str) -> Score:
        with self.lock:
            if self.score is not None:
                return self.score
            seconds = self.clock() - self.started
            steps, last = follow_advice(self.engine, self.unit)
            advice_fault, advice_p = _top_group(last)
            counts = [len(steps)]
            costs = [_cost(self.case, [(p, k) for p, k, _ in steps])]
            for r in range(1, ADVICE_REPLAYS):
                rng = np.random.default_rng([self.seed, r])
                again = {(x.point, x.kind): x
                         for x in show(self.engine, self.drawn.truth, rng)}
                more = follow_advice(self.engine, again)[0]
                counts.append(len(more))
                costs.append(_cost(self.case, [(p, k) for p, k, _ in more]))
            found = status == FOUND
            last_named = self.namings[-1] if self.namings else None
            wrong = self.wrong
            named = last_named.fault if last_named else ""
            hyp = self.engine.hypothesis
            advice_cost = float(np.mean(costs))
            cost = self.reading_cost
            self.score = Score(
                truth=self.truth, truth_text=hyp(self.truth).text,
                named=named, named_text=hyp(named).text if named else "",
                correct=found, same_group=bool(found and last_named.same_group),
                readings_used=len(self.taken), advice_readings=float(np.mean(counts)),
                advice_fault=advice_fault, advice_p=advice_p,
                telling=telling_readings(self.engine, self.truth,
                                         wrong[-1].fault if wrong else named or self.truth,
                                         steps),
                seconds=float(seconds), status=status, wrong=wrong, reading_cost=cost,
                advice_cost=advice_cost,
                points=work_points(found, cost, advice_cost, len(wrong)))
            return self.score

    def result_row(self, trainee: str) -> dict[str, str]:
        """One CSV row (RESULT_FIELDS) of the scored exercise."""
        s = self.score
        if s is None:
            raise DiagError("the exercise has not been scored yet",
                            hint="name a fault first")
        family, cls = fault_family(self.case, s.truth)
        return {
            "trainee": trainee, "exercise": self.exercise.name, "correct": str(int(s.correct)),
            "readings_used": str(s.readings_used), "seconds": f"{s.seconds:.1f}",
            "case": self.case.path, "fault": s.truth, "seed": str(self.seed),
            "named": s.named,
            "same_group": str(int(s.same_group)), "advice_readings": f"{s.advice_readings:.1f}",
            "part_family": family, "mode_class": cls,
            "finished": _dt.datetime.now(_dt.UTC).isoformat(timespec="seconds"),
            "status": s.status, "points": str(s.points.total),
            "wrong_namings": str(len(s.wrong)),
            "named_wrong": " ".join(w.fault for w in s.wrong),
            "first_wrong_at": str(s.wrong[0].readings) if s.wrong else "",
            "reading_cost": f"{s.reading_cost:g}", "advice_cost": f"{s.advice_cost:.1f}",
        }


def _cost(case: Case, keys: Iterable[tuple[str, str]]) -> float:
    """The summed cost of readings (point, kind): each point's `cost`, 1 by default."""
    cost = {(o.point, o.kind): o.cost for o in case.observables}
    return float(sum(cost[k] for k in keys))


class Drill:
    """A run of exercises for one trainee. `engines(case_path)` gives the Engine of a case
    (the caller caches them). Each exercise, once ended (found, shown, namings used up or
    left), is appended to `results` (a CSV path) if given, once. `hints` allows the
    ranking to be shown while an exercise runs."""

    def __init__(self, exercises: Sequence[Exercise], engines: Callable[[str], Engine], *,
                 trainee: str = "", hints: bool = False, results: str | None = None,
                 clock: Callable[[], float] = time.monotonic):
        if not exercises:
            raise DiagError("no exercises to run", hint="give a case, or an exercises file")
        self.exercises = tuple(exercises)
        self.engines = engines
        self.trainee = trainee or "trainee"
        self.hints = hints
        self.results = results
        self.clock = clock
        self.index = 0
        self.done: list[Round] = []
        self._lock = threading.Lock()
        self.round = self._start(0)

    def _start(self, i: int) -> Round:
        ex = self.exercises[i]
        return Round.start(ex, self.engines(ex.case), clock=self.clock)

    @property
    def finished(self) -> bool:
        """True once the last exercise has been scored."""
        return self.index == len(self.exercises) - 1 and self.round.score is not None

    def name(self, fault_id: str) -> Naming:
        """Name a fault in the current exercise (Round.name); record the result when the
        naming ended it."""
        naming = self.round.name(fault_id)
        if naming.score is not None:
            self._record(self.round)
        return naming

    def reveal(self) -> Score:
        """Give up the current exercise and show its fault (Round.reveal), recorded."""
        score = self.round.reveal()
        self._record(self.round)
        return score

    def abandon(self) -> Score | None:
        """Leave the current exercise (Round.abandon), recorded as abandoned; None when
        it had already ended (nothing more to record)."""
        rnd = self.round
        if rnd.score is not None:
            return None
        score = rnd.abandon()
        self._record(rnd)
        return score

    def _record(self, rnd: Round) -> None:
        with self._lock:
            if any(r is rnd for r in self.done):
                return
            self.done.append(rnd)
            if self.results:
                append_result(self.results, rnd.result_row(self.trainee))

    def next_round(self) -> Round | None:
        """Go on to the next exercise (the current one must be scored); None at the end."""
        if self.round.score is None:
            raise DiagError("name a fault before going on", hint="the exercise is not scored")
        if self.index + 1 >= len(self.exercises):
            return None
        self.index += 1
        self.round = self._start(self.index)
        return self.round


def append_result(path: str, row: dict[str, str]) -> None:
    """Append one result row to a class results CSV, writing the header if it is new."""
    p = Path(path)
    new = not p.exists() or p.stat().st_size == 0
    with p.open("a", encoding="utf-8", newline="") as fh:
        w = csv.DictWriter(fh, fieldnames=RESULT_FIELDS)
        if new:
            w.writeheader()
        w.writerow({k: row.get(k, "") for k in RESULT_FIELDS})
        fh.flush()


def load_exercises(path: str, default_case: str | None = None) -> tuple[Exercise, ...]:
    """Read an exercises YAML file:

        exercises:
          - {name: warm-up, case: sounder-driver.yaml, fault: R2:open, seed: 11}
          - {case: ../cases/x.yaml, seed: 3}          # fault drawn by the priors

    `case` is a path relative to the file, or the name of a bundled case (with or
    without `.yaml`); it may be left out when `default_case` is given. Raises DiagError
    naming the file and line of a bad entry.
    """
    from diag.core.yamlio import load_yaml_file

    data = load_yaml_file(path)
    items = data.get("exercises") if isinstance(data, dict) else None
    if not isinstance(items, list) or not items:
        raise DiagError("expected a list under `exercises:`", file=path, line=1,
                        hint="see examples/exercises.yaml")
    base = Path(path).resolve().parent
    out = []
    for i, item in enumerate(items):
        line = getattr(item, "line", None) or data.line_of("exercises")
        if not isinstance(item, dict):
            raise DiagError("each exercise is a mapping with case, fault and seed", file=path,
                            line=line, where=f"exercise {i + 1}")
        unknown = set(item) - {"name", "case", "fault", "seed"}
        if unknown:
            raise DiagError(f"unknown field {sorted(unknown)[0]!r}", file=path, line=line,
                            where=f"exercise {i + 1}", hint="use name, case, fault, seed")
        case = item.get("case", default_case)
        if not case:
            raise DiagError("missing `case`", file=path, line=line, where=f"exercise {i + 1}",
                            hint="give a case file path or a bundled case name")
        seed = item.get("seed")
        if seed is not None and (isinstance(seed, bool) or not isinstance(seed, int)
                                 or seed < 0):
            raise DiagError(f"seed {seed!r} is not a whole number >= 0", file=path,
                            line=line, where=f"exercise {i + 1}")
        fault = item.get("fault")
        if fault is not None and (not isinstance(fault, str) or not fault.strip()):
            raise DiagError(f"fault {fault!r} is not a fault id", file=path, line=line,
                            where=f"exercise {i + 1}", hint="e.g. R2:open, or leave it out")
        if fault in ("random", "any"):
            fault = None
        out.append(Exercise(case=_resolve_case(str(case), base),
                            fault=fault.strip() if fault else None, seed=seed,
                            name=str(item.get("name") or f"exercise {i + 1}")))
    return tuple(out)


def _resolve_case(case: str, base: Path) -> str:
    """A case named in an exercise file: relative to that file's folder first, then as
    case.find_case resolves it (a path, or a user or bundled case name)."""
    from diag.core.case import find_case

    rel = base / case
    return str(rel if rel.is_file() else find_case(case))


# ---- class summary -----------------------------------------------------------------


@dataclass(frozen=True)
class TraineeSummary:
    """One trainee's record: exercises, right answers, misses by part family and by mode
    class (each as (misses, tried)), readings used against diag's advice, exercises left
    before naming (`left`, kept out of the other figures), and the mean points (None for
    a results file written before points were scored)."""

    trainee: str
    exercises: int
    correct: int
    by_family: dict[str, tuple[int, int]]
    by_mode: dict[str, tuple[int, int]]
    readings_used: int
    advice_readings: float
    early_misses: int
    needs: tuple[str, ...]
    left: int = 0
    points: float | None = None


def _whole(text: str | None) -> int | None:
    """A whole number from a CSV cell; None when the cell is blank or missing."""
    text = (text or "").strip()
    return int(text) if text else None


def read_results(paths: Iterable[str]) -> list[dict[str, str]]:
    """Rows of one or more class results CSVs. Raises DiagError on a missing column or a
    bad number. Files written before namings were scored lack the later columns (status,
    points, ...): a row there that is not correct ended on one wrong naming."""
    rows: list[dict[str, str]] = []
    for path in paths:
        try:
            fh = open(path, encoding="utf-8", newline="")
        except FileNotFoundError:
            raise DiagError("file not found", file=path,
                            hint="give the CSV written by `diag drill --results`") from None
        with fh:
            reader = csv.DictReader(fh)
            missing = [c for c in ("trainee", "correct", "readings_used", "advice_readings",
                                   "part_family", "mode_class") if c not in (reader.fieldnames
                                                                             or [])]
            if missing:
                raise DiagError(f"missing column {missing[0]!r}", file=path, line=1,
                                hint="the header must be: " + ",".join(RESULT_FIELDS))
            for n, row in enumerate(reader, start=2):
                try:
                    row["_correct"] = bool(int(row["correct"]))
                    row["_used"] = int(row["readings_used"])
                    row["_advice"] = float(row["advice_readings"])
                    row["_points"] = _whole(row.get("points"))
                    first = _whole(row.get("first_wrong_at"))
                except (TypeError, ValueError):
                    raise DiagError("correct, readings_used, points and first_wrong_at must "
                                    "be whole numbers, advice_readings a number", file=path,
                                    line=n) from None
                status = (row.get("status") or "").strip()
                if not status and not row["_correct"]:
                    first = row["_used"]  # an older file: the one naming ended it
                row["_left"] = status == ABANDONED
                row["_first_wrong"] = first
                rows.append(row)
    return rows


def summarise(rows: Sequence[dict]) -> list[TraineeSummary]:
    """Per trainee (in order of first appearance): misses by part family and mode class,
    and what to practise. A family or class is named when at least one exercise of it was
    missed, worst miss rate first; over-reading when the readings used exceed
    OVERREAD_RATIO times what diag's advice needed; naming too early when a first wrong
    naming came with fewer readings than the advice needed. Exercises left before naming
    are counted apart (`left`) and kept out of those figures; their 0 points count in the
    mean."""
    order: dict[str, list[dict]] = {}
    for r in rows:
        order.setdefault(r["trainee"], []).append(r)
    out = []
    for who, every in order.items():
        rs = [r for r in every if not r["_left"]]
        left = len(every) - len(rs)
        fam: dict[str, list[int]] = {}
        mode: dict[str, list[int]] = {}
        for r in rs:
            for table, key in ((fam, r["part_family"]), (mode, r["mode_class"])):
                t = table.setdefault(key, [0, 0])
                t[0] += 0 if r["_correct"] else 1
                t[1] += 1
        used = sum(r["_used"] for r in rs)
        advice = sum(r["_advice"] for r in rs)
        early = sum(1 for r in rs
                    if r["_first_wrong"] is not None and r["_first_wrong"] < r["_advice"])
        needs = []
        for table in (fam, mode):
            for key, (miss, tried) in sorted(table.items(),
                                             key=lambda kv: (-kv[1][0] / kv[1][1], kv[0])):
                if miss:
                    needs.append(f"{key} faults: missed {miss} of {tried}")
        if advice and used > OVERREAD_RATIO * advice:
            needs.append(f"over-reading: {used} readings where diag's advice needed "
                         f"{advice:.0f}")
        if early:
            needs.append(f"naming too early: {early} exercise(s) with a wrong naming made "
                         "on fewer readings than the advice needed")
        if left:
            needs.append(f"left {left} exercise(s) before naming a fault")
        pts = [r["_points"] for r in every if r["_points"] is not None]
        out.append(TraineeSummary(
            trainee=who, exercises=len(every), correct=sum(r["_correct"] for r in rs),
            by_family={k: (v[0], v[1]) for k, v in fam.items()},
            by_mode={k: (v[0], v[1]) for k, v in mode.items()},
            readings_used=used, advice_readings=advice, early_misses=early,
            needs=tuple(needs), left=left,
            points=float(np.mean(pts)) if pts else None))
    return out
