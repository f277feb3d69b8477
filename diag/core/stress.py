"""Stress on parts with a fault in place: does a short really burn a resistor or blow a fuse?

A linked fault (rules/collateral.yaml) pairs a failure with a part it commonly takes with
it: `overheats` a resistor that the failure overloads, `overcurrent` a fuse that it
blows. Topology alone keeps far too many (a resistor in series with others sees a
fraction of the supply). Here each cause fault is solved on K drawn units (tolerances and
the fault's own range, diag's ensemble draws) and the candidate parts are read off the
node voltages: a resistor's power (V_a - V_b)² / R in watts (Joule's law), a fuse's
current |V_a - V_b| / R in amperes (Ohm's law, R its cold resistance), the most over the
units: the worst unit the tolerances allow.

    worst = stress.worst(circuit, case, {"Q1:ce-short": ("R3", "F1")}, specs)
    worst["Q1:ce-short"]["R3"]   # watts;  worst["Q1:ce-short"]["F1"]  # amperes
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np

DRAWS = 32     # units per cause fault: the worst of 32 reaches the top few % of the spread
SEED = 0       # fixed: the hypothesis set must not depend on the user's --seed


def worst(circuit, case, candidates: Mapping[str, Sequence[str]], specs: Mapping,
          K: int = DRAWS) -> dict[str, dict[str, float]]:
    """Cause fault id -> part ref -> the most watts (resistor) or amperes (fuse) over K
    units with that fault (NaN when no unit solved). `specs` maps each cause id to its
    FaultSpec."""
    from diag.core import ensemble, solver

    causes = [c for c in candidates if candidates[c]]
    if not causes:
        return {}
    params = ensemble.draw_hypotheses(circuit, [specs[c] for c in causes], K, SEED)
    with np.errstate(all="ignore"):
        dc = solver.solve_dc(circuit, params)
    v = np.where(np.asarray(dc.ok, bool)[:, None], np.asarray(dc.v, float), np.nan)
    v = v.reshape(len(causes), K, -1)

    def node(i: int, name: str) -> np.ndarray:
        return np.zeros(K) if name == case.ground else v[i, :, circuit.nodes.index(name)]

    out: dict[str, dict[str, float]] = {}
    for i, c in enumerate(causes):
        row = {}
        for ref in candidates[c]:
            part = case.part(ref)
            a, b = part.nodes
            key = f"{ref}.r"
            r = (np.asarray(params[key], float).reshape(len(causes), K)[i] if key in params
                 else np.full(K, float(circuit.nominal[key])))
            drop = node(i, a) - node(i, b)
            x = drop ** 2 / r if part.kind == "resistor" else np.abs(drop) / r
            row[ref] = float(np.nanmax(x)) if np.isfinite(x).any() else float("nan")
        out[c] = row
    return out
