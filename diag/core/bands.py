"""Healthy reading bands of a case: the core of `diag check`.

`healthy_bands(case, rules, K, seed)` solves the case with nominal part values (node
voltages without a meter, meter readings with its loading, transistor regions), then K
healthy units drawn within tolerance, each at its own ambient temperature in the range of
rules/faults.yaml (ensemble.draw_unit, as the engine draws them), and gives, per
observable, the band from about the 1st to the 99th percentile of the meter reading
(loading included, meter error excluded). It is the one healthy band of diag: `diag check`
prints it and the interface shows it (Engine.bands). Draws that did not converge are
listed with the solver's reason and left out of the bands.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

from diag.core.case import Case

BAND_PERCENTILES = (1.0, 99.0)
# The AC predictions are small-signal: they hold while the signal across every conducting
# base-emitter junction is small against its thermal voltage. A junction's current
# i = I0 exp(v / (N VT)) driven by a sine of peak v makes a second harmonic of about
# v / (4 N VT) of the fundamental (the exponential's Taylor series). An emitter that
# follows the signal (an unbypassed emitter resistor, a follower) is series feedback: it
# divides that distortion by 1 + v_e / v_be (the loop gain; negative feedback reduces
# distortion by 1 + loop gain, handbook). Past this fraction `diag check` warns that the
# case's signal level is too high.
DISTORTION_LIMIT = 0.10
# The same limit on the AC readings themselves: where the quasi-static large-signal pass
# (largesignal.ratios) puts a point's reading more than DISTORTION_LIMIT off its
# small-signal figure (a stage clips, or the tone swings a saturated one), `diag check`
# warns too, with the largest level of a log-spaced sweep (SWEEP_STEPS levels down to a
# thousandth of the case's, about 1.33 apart) at which every point is within the limit.
SWEEP_STEPS = 25
MAINS_VOLTS = 30.0   # a supply above this gets the mains/high-voltage cautions (common
                     # practice, no source: the usual extra-low-voltage working limit)


@dataclass(frozen=True)
class PointBand:
    """Meter reading at one observable: nominal part values, and the healthy band
    (volts, or amperes at a supply point)."""

    point: str
    kind: str
    nominal: float
    low: float
    high: float
    unit: str = "V"

    def __iter__(self):  # unpacks as (point, kind, nominal, low, high)
        return iter((self.point, self.kind, self.nominal, self.low, self.high))


@dataclass(frozen=True)
class CheckResult:
    """What `diag check` reports. nodes: node -> DC volts to ground (nominal, no meter);
    points: one PointBand per observable in case order; regions: transistor ref -> region
    word (nominal); failed: (draw index, reason) of draws that did not converge;
    cautions: ids in rules/cautions.yaml that apply to the case; K, seed: the draws."""

    case: Case
    nodes: dict[str, float]
    points: tuple[PointBand, ...]
    regions: dict[str, str]
    failed: tuple[tuple[int, str], ...]
    cautions: tuple[str, ...] = ()
    K: int = 0
    seed: int = 0
    nominal_ok: bool = True
    nominal_why: str | None = None
    extra: dict = field(default_factory=dict)
    drive: dict[str, tuple[float, float]] = field(default_factory=dict)
    swing: dict[str, tuple[float, float]] = field(default_factory=dict)
    quiet: float | None = None
    saddle: bool = False
    switched: bool = False
    generic: dict[str, tuple[str, tuple[str, ...]]] = field(default_factory=dict)
    # transistor ref -> (generic model name, the card values drawn over its class)

    def stability_text(self) -> str:
        """`stability_text` of the nominal operating point."""
        return stability_text(self.saddle, self.switched)

    @property
    def overdriven(self) -> dict[str, tuple[float, float]]:
        """The transistors of `drive` past DISTORTION_LIMIT."""
        return {r: d for r, d in self.drive.items() if d[1] > DISTORTION_LIMIT}

    @property
    def clipped(self) -> dict[str, tuple[float, float]]:
        """The AC points of `swing` whose large-signal reading is more than
        DISTORTION_LIMIT off the small-signal one (a stage clips or is swung out of
        saturation by the tone)."""
        return {p: s for p, s in self.swing.items() if abs(s[1] - 1.0) > DISTORTION_LIMIT}

    def signal_text(self) -> str:
        """The warning that the case's signal level is too big for small-signal
        predictions, with the level to lower the generator to; "" when it is not.

        Two causes: a junction driven past DISTORTION_LIMIT second harmonic, and an AC
        point whose reading the quasi-static large-signal pass puts more than
        DISTORTION_LIMIT off its small-signal figure (`swing`). The level offered meets
        both: the junction's harmonic grows with the level, so it is scaled to the
        limit; for the points, the largest level of the pass's sweep (`quiet`)."""
        from diag.core.values import format_value

        hot, clip = self.overdriven, self.clipped
        sig = self.case.signal
        if not (hot or clip) or sig is None:
            return ""
        level = float(sig.value or 0.0)
        most, why = level, []
        if hot:
            most = min(most, level * DISTORTION_LIMIT / max(h for _, h in hot.values()))
            why.append(f"under {DISTORTION_LIMIT:.0%} second harmonic at every junction")
        if clip:
            most = min(most, self.quiet if self.quiet is not None else 0.0)
            why.append(f"every AC reading within {DISTORTION_LIMIT:.0%} of its small-signal "
                       "figure")
        parts = [f"{ref}'s base-emitter junction with {format_value(v, 'V')} rms (second "
                 f"harmonic about {h:.0%} in its stage)" for ref, (v, h) in hot.items()]
        if clip:
            parts.append("the stages too far for small-signal readings at "
                         + ", ".join(f"{pt} ({format_value(v, 'V')} rms small-signal, about "
                                     f"{format_value(v * r, 'V')} rms with the tone's own "
                                     "size)" for pt, (v, r) in clip.items()))
        lower = (f"lower the generator level in the case ({sig.ref} `vrms`) to "
                 f"{format_value(most, 'V')} or less (" + " and ".join(why) + ")"
                 if most > 0 else "lower the generator level in the case until the AC "
                 "readings scale with it (diag's large-signal pass did not solve at every "
                 f"level down to a thousandth of {sig.ref}'s, so it offers no level)")
        return (f"Signal level: {sig.ref}'s {format_value(sig.value, 'V')} rms drives "
                + "; ".join(parts)
                + ". The AC bands and diag's AC predictions assume a small signal, so a "
                f"real unit will read off them; {lower}.")

    @property
    def unused_model(self) -> dict[str, tuple[str, ...]]:
        """Part ref -> the names its model card carries that diag does not use."""
        from diag.core.parts import unused_card_names

        return {p.ref: u for p in self.case.parts if (u := unused_card_names(p))}

    @property
    def supply_limits(self) -> dict[str, float]:
        """Supply ref -> the `amps` it gives (a rating), amperes: read and not modelled
        (a current limit that is modelled is given as `limit:`)."""
        return {p.ref: float(p.fields["amps"]) for p in self.case.parts
                if p.kind == "supply" and p.fields.get("amps")}

    @property
    def current_limits(self) -> dict[str, dict[str, float | None]]:
        """Supply ref -> {"limit": its `limit:` in amperes, "high": the healthy band's top
        at a point reading that supply's current (None without one)}."""
        out = {}
        for p in self.case.parts:
            if p.kind == "supply" and p.fields.get("limit"):
                tops = [b.high for b in self.points if b.kind == "dc"
                        and self.case.point(b.point).supply == p.ref and np.isfinite(b.high)]
                out[p.ref] = {"limit": float(p.fields["limit"]),
                              "high": max(tops) if tops else None}
        return out

    def current_limit_text(self) -> str:
        """The sentence on modelled current limits, and a warning where a healthy unit
        comes within the limit's spread of it; "" when no supply has one."""
        from diag.core.parts.sources import LIMIT_TOL
        from diag.core.values import format_value

        parts = []
        for ref, c in self.current_limits.items():
            s = f"{ref} holds its current at {format_value(c['limit'], 'A')}"
            if c["high"] is not None and c["high"] >= c["limit"] * (1 - LIMIT_TOL):
                s += (f" (a healthy unit draws up to {format_value(c['high'], 'A')}, close "
                      f"enough for the limit to shape good readings: set it higher)")
            parts.append(s)
        if not parts:
            return ""
        return ("Current limits: " + "; ".join(parts) + ". A fault that would draw more is "
                "predicted at the limit with its rail fallen.")

    def supply_limit_text(self) -> str:
        """The sentence on supplies' current limits diag does not model; "" if none."""
        from diag.core.values import format_value

        return _read_not_used(
            "Supply limits", {r: f"amps {format_value(a, 'A')}"
                              for r, a in self.supply_limits.items()},
            "does not model: such a supply is its volts behind its source resistance, so "
            "diag predicts a fault that would draw more (a short) at whatever current that "
            "resistance lets through. If the supply holds its current at a set limit and "
            "lets its voltage fall (a bench supply's constant-current setting), give that "
            "as `limit:` instead, which diag models.")

    def generic_text(self) -> str:
        """The sentence naming transistors drawn over their generic model's class of part
        types, with what is drawn over it (`generic`: ref -> (model, class keys)); ""
        when there are none."""
        if not self.generic:
            return ""
        words = {"vaf": "Early voltage", "ikf": "gain at high current",
                 "ise": "gain at low current", "is": "base-emitter drop"}
        keys = {k for _, ks in self.generic.values() for k in ks}
        drawn = [w for k, w in words.items() if k in keys]
        refs = ", ".join(f"{r} ({m})" for r, (m, _) in self.generic.items())
        return (f"Generic transistor models: {refs} stand for a class of part types, and "
                f"the bands cover the class ({', '.join(drawn)} drawn over the types that "
                "answer to the name). Where the fitted type is known, give its own card "
                "(`model:` with its SPICE figures) to narrow them.")

    def unused_model_text(self) -> str:
        """The sentence naming card parameters diag leaves out; "" when there are none."""
        return _read_not_used(
            "Model cards", {r: " ".join(n) for r, n in self.unused_model.items()},
            "does not use (junction capacitance, transit time, noise and temperature: its "
            "AC analysis is low-frequency, and the ambient moves every junction by the "
            "rules' figure).")

    def to_json(self, case_path: str | None = None) -> dict[str, Any]:
        """SPEC section 6 object (plus the extra keys regions, failed, draws,
        junction_signal, ac_swing, quiet_level, unstable_operating_point,
        switched_states, class_models, unused_model_params, unmodelled_supply_limits,
        current_limits)."""
        def num(x: float) -> float | None:
            return float(x) if np.isfinite(x) else None

        return {
            "case": case_path if case_path is not None else self.case.path,
            "nodes": {n: num(v) for n, v in self.nodes.items()},
            "points": [{"point": p.point, "kind": p.kind, "nominal": num(p.nominal),
                        "low": num(p.low), "high": num(p.high), "unit": p.unit}
                       for p in self.points],
            "regions": dict(self.regions),
            "failed": [{"draw": k, "why": why} for k, why in self.failed],
            "draws": self.K,
            "seed": self.seed,
            "junction_signal": {r: {"vrms": v, "second_harmonic": h}
                                for r, (v, h) in self.drive.items()},
            "ac_swing": {p: {"vrms": v, "large_signal_ratio": r}
                         for p, (v, r) in self.swing.items()},
            "quiet_level": self.quiet,
            "unstable_operating_point": self.saddle,
            "switched_states": self.switched,
            "class_models": {r: {"model": m, "drawn_over_class": list(k)}
                             for r, (m, k) in self.generic.items()},
            "unused_model_params": {r: list(n) for r, n in self.unused_model.items()},
            "unmodelled_supply_limits": self.supply_limits,
            "current_limits": self.current_limits,
        }


def case_cautions(case: Case) -> tuple[str, ...]:
    """Caution ids (rules/cautions.yaml) the case calls for: `mains` and `meter` when a
    supply is above MAINS_VOLTS or any note or the about text mentions mains."""
    texts = [case.about or ""] + [str(p.fields.get("note", "")) for p in case.parts]
    mains = any("mains" in t.lower() for t in texts)
    high = any(p.kind == "supply" and abs(float(p.value or 0.0)) > MAINS_VOLTS
               for p in case.parts)
    out = []
    if mains or high:
        out += ["mains", "meter"]
    if high:
        out.append("capacitors")
    return tuple(out)


def stability(circuit: Any, dc: Any) -> dict[str, bool]:
    """{"saddle", "switched"} of the nominal solution `dc` (one variant) of `circuit`,
    for `stability_text`: a balance point left in place, and a circuit diag draws in two
    switched states (solver.solve_dc's settling, or solver.two_states)."""
    from diag.core import solver

    return {"saddle": bool(solver.saddle(circuit, {}, dc)[0]),
            "switched": bool(dc.settled[0]) or solver.two_states(circuit)}


def stability_text(saddle: bool, switched: bool = False) -> str:
    """What to say about a circuit with two switched states: `switched`, diag draws its
    units in both (solver.solve_dc: off the balance point a real unit leaves, or into
    the other stable state); `saddle`, its solution is a balance point (solver.saddle)
    that could not be left; "" for neither."""
    if switched:
        return ("Operating point: this circuit has two switched states (a loop in it has a "
                "gain above one at DC: a latch, a flip-flop, a thyristor pair, or a trigger "
                "whose input sits inside its hysteresis), and which one a unit is in "
                "depends on its history, not on its parts. diag puts each drawn unit in one "
                "of them, half each way (off the balance point between them, where no "
                "working unit stays, when that is where the solver lands), so the bands "
                "cover both and the nominal column shows one of them. A unit's readings "
                "tell which state it is in.")
    if not saddle:
        return ""
    return ("Operating point: the balance point diag solved is unstable. A loop in this "
            "circuit has a gain above one at DC (a latch or flip-flop, or bias that feeds "
            "itself), so a real unit leaves that point and settles in a switched state, "
            "and diag's predicted readings, which are of the balance point, will not "
            "match a working unit. Read a known-good unit before trusting a diagnosis of "
            "this case.")


def healthy_bands(case: Case, rules: Any = None, K: int = 400, seed: int = 0) -> CheckResult:
    """Nominal operating point and healthy bands of `case` over K tolerance draws.

    rules: a Rules (default: the bundled rules). The draws come from
    ensemble.draw_unit (tolerances, then the ambient temperature of the rules'
    `inference.ambient`) with numpy.random.default_rng(seed); the band of each observable
    is the 1st..99th percentile of the converged draws' meter readings (volts or
    amperes). Raises DiagError through the loader/compiler for a bad case; a nominal
    solution that does not converge is reported in `nominal_ok` / `nominal_why`.
    """
    from diag.core import ensemble, faults, meter, netlist, solver
    from diag.core.rules import load_rules

    rules = rules if rules is not None else load_rules()
    circuit = netlist.compile_case(case, rules)
    obs = case.observables
    has_ac = any(o.kind == "ac" for o in obs)

    dc0 = solver.solve_dc(circuit, {})
    ac0 = solver.solve_ac(circuit, {}, dc0) if has_ac else None
    nom = meter.observe(circuit, {}, dc0, ac0, obs, case.meter)[0]
    nodes = {n: float(dc0.v[0, circuit.node_index[n]]) for n in case.nodes}
    regions = {ref: str(r[0]) for ref, r in solver.regions(circuit, {}, dc0).items()}

    low = np.full(len(obs), np.nan)
    high = np.full(len(obs), np.nan)
    failed: list[tuple[int, str]] = []
    if K > 0:
        rng = np.random.default_rng(seed)
        params = ensemble.draw_unit(circuit, faults.healthy_spec(), K, rng,
                                    faults.inference(rules).get("ambient"))
        dc = solver.solve_dc(circuit, params)
        ac = solver.solve_ac(circuit, params, dc) if has_ac else None
        readings = meter.observe(circuit, params, dc, ac, obs, case.meter)
        ok = np.asarray(dc.ok, dtype=bool) & np.all(np.isfinite(readings), axis=1)
        failed = [(int(k), str(dc.why[k] or "reading not finite"))
                  for k in np.flatnonzero(~ok)]
        if ok.any():
            low, high = np.percentile(readings[ok], BAND_PERCENTILES, axis=0)
    points = tuple(PointBand(o.point, o.kind, float(nom[m]), float(low[m]), float(high[m]),
                             o.unit) for m, o in enumerate(obs))
    return CheckResult(case=case, nodes=nodes, points=points, regions=regions,
                       failed=tuple(failed), cautions=case_cautions(case), K=K, seed=seed,
                       nominal_ok=bool(dc0.ok[0]), nominal_why=dc0.why[0],
                       drive=junction_drive(circuit, dc0, ac0, regions) if has_ac else {},
                       generic=class_models(case, rules),
                       **stability(circuit, dc0),
                       **(level_sweep(circuit, dc0, ac0) if has_ac else {}))


def class_models(case: Case, rules: Any) -> dict[str, tuple[str, tuple[str, ...]]]:
    """Transistor ref -> (its generic model's name, the card values its spread draws over
    the class: parts.bjt.CLASS_SPREAD keys of rules/models.yaml), for the transistors
    fitted with such a name; a case's own card is one type and is not listed."""
    from diag.core.parts.bjt import CLASS_SPREAD, DEFAULT_MODEL

    out = {}
    for p in case.parts:
        if p.kind not in ("npn", "pnp"):
            continue
        name = str(p.model.get("name")) if p.model else DEFAULT_MODEL[p.kind]
        spread = (rules["models"].get(name) or {}).get("spread") or {}
        keys = tuple(k for k in CLASS_SPREAD if k in spread)
        if keys:
            out[p.ref] = (name, keys)
    return out


def level_sweep(circuit, dc, ac, steps: int = SWEEP_STEPS) -> dict[str, Any]:
    """The nominal unit's AC points (away from the signal's own node) under the case's
    tone: {"swing": point -> (small-signal reading, volts rms, meter loading included;
    the ratio r of its large-signal to its small-signal figure, largesignal.ratios),
    "quiet": the largest level (volts rms) of a sweep from the case's down to a
    thousandth of it, `steps` levels log-spaced, at which every r (and at every lower
    level) is within DISTORTION_LIMIT of 1; None when none is}. Empty when the case has
    no such point or its nominal unit does not solve."""
    from diag.core import largesignal, meter, overdrive, solver

    case = circuit.case
    sig = case.signal
    obs = [case.observables[m] for m in overdrive.swung(case, case.observables)]
    if not obs or not bool(dc.ok[0]):
        return {}
    small = meter.observe(circuit, {}, dc, ac, obs, case.meter, large_signal=False)[0]
    levels = float(circuit.nominal[f"{sig.ref}.vac"]) * np.geomspace(1.0, 1e-3, steps)
    params = {f"{sig.ref}.vac": levels}
    dcs = solver.solve_dc(circuit, params)  # the one operating point, once per level
    r = largesignal.ratios(circuit, params, dcs, np.arange(steps),
                           overdrive.node_pairs(case, obs))
    ok = np.all(np.abs(r - 1.0) <= DISTORTION_LIMIT, axis=1)
    # the largest level below which every level passes (a NaN ratio does not pass)
    bad = np.flatnonzero(~ok)
    first = int(bad.max()) + 1 if bad.size else 0
    quiet = float(levels[first]) if first < steps else None
    return {"swing": {o.point: (float(small[m]), float(r[0, m])) for m, o in enumerate(obs)},
            "quiet": quiet}


def junction_drive(circuit, dc, ac, regions: dict[str, str]
                   ) -> dict[str, tuple[float, float]]:
    """Transistor ref -> (signal across its base-emitter junction, volts rms; the second
    harmonic its stage makes) for each transistor conducting in the first variant of
    `dc`/`ac` (overdrive.junction_drive)."""
    from diag.core import overdrive

    drive = overdrive.junction_drive(circuit, {}, dc, ac)
    return {ref: (float(v[0]), float(h[0])) for ref, (v, h) in drive.items()
            if regions.get(ref) in ("active", "saturated") and v[0] > 0}


def _read_not_used(label: str, given: dict[str, str], why: str) -> str:
    """"{label}: {ref} gives {what}; ..., which diag reads and {why}" for the parts in
    `given` (ref -> what it gives); "" when there are none."""
    if not given:
        return ""
    return (f"{label}: " + "; ".join(f"{ref} gives {what}" for ref, what in given.items())
            + f", which diag reads and {why}")
