"""What a handheld meter shows for a true (loaded) value: autorange, calibration error,
count noise, display rounding and overload. Profiles are the mappings of
rules/meters.yaml as resolved into `Case.meter`.

Error model (eval/bench.yaml `meter`): one gain error per unit and reading kind (the same
meter takes every reading of a unit), uniform over +-pct % of reading, and a per-reading
offset uniform over +-counts of the autoranged resolution; then rounding to that
resolution. A value beyond the top range shows overload and is returned as None (the
technician writes nothing down).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from eval.unit import bench


def _keys(kind: str, unit: str) -> tuple[str, str, str]:
    if unit == "A":
        return "a_pct", "a_counts", "a_ranges"
    return (f"{kind}_pct", f"{kind}_counts", "v_ranges")


def resolution(value: float, kind: str, unit: str, meter) -> float | None:
    """Display step of the autoranged scale holding |value| (volts or amperes), or None
    when the value is beyond the top range (overload)."""
    _, _, rk = _keys(kind, unit)
    counts = float(meter["counts"])
    for fs in sorted(float(r) for r in meter[rk]):
        res = fs / counts
        if abs(value) <= fs - res:
            return res
    return None


def bound(value: float, kind: str, unit: str, meter) -> float:
    """The profile's stated accuracy at a value: pct % of reading + counts x resolution
    (volts or amperes); infinite on overload."""
    pk, ck, _ = _keys(kind, unit)
    res = resolution(value, kind, unit, meter)
    if res is None:
        return math.inf
    return float(meter[pk]) / 100.0 * abs(value) + float(meter[ck]) * res


@dataclass(frozen=True)
class MeterErrors:
    """The calibration state of the meter that reads one unit: gain error per kind."""

    gain: dict

    @staticmethod
    def draw(meter, rng: np.random.Generator) -> MeterErrors:
        f = float(bench()["meter"]["gain_uniform_of_spec"])
        g = {}
        for kind, unit in (("dc", "V"), ("ac", "V"), ("dc", "A")):
            pct = float(meter[_keys(kind, unit)[0]])
            g[(kind, unit)] = rng.uniform(-1, 1) * f * pct / 100.0
        return MeterErrors(gain=g)


def show(value: float, kind: str, unit: str, meter, err: MeterErrors,
         rng: np.random.Generator) -> float | None:
    """The displayed reading of a true value, or None for overload or no value (NaN)."""
    if not math.isfinite(value):
        return None
    res = resolution(value, kind, unit, meter)
    if res is None:
        return None
    c = float(meter[_keys(kind, unit)[1]]) * float(bench()["meter"]["offset_uniform_of_counts"])
    shown = value * (1 + err.gain[(kind, unit)]) + rng.uniform(-c, c) * res
    if kind == "ac":
        shown = abs(shown)
    shown = round(shown / res) * res
    if resolution(shown, kind, unit, meter) is None:
        return None
    return shown


def text(value: float, kind: str, unit: str, meter) -> str:
    """The reading as the display shows it: as many decimals as the range resolution."""
    res = resolution(value, kind, unit, meter) or 1.0
    dec = max(0, -int(math.floor(math.log10(res) + 1e-9)))
    return f"{value:.{dec}f}"
