"""Power in resistors with a fault in place: does a shorted part really overheat one?

A linked fault (rules/collateral.yaml, `overheats`) pairs a short with a resistor that
the short could burn. The supply-span bound (faults.can_overheat) keeps every resistor
that the whole supply could overload; most of them are in series with other parts and
see far less. Here each cause fault is solved on K drawn units (tolerances and the
fault's own range, diag's ensemble draws) and each candidate resistor's power is
(V_a - V_b)² / R in watts (Joule's law), the most over the units: the worst unit the
tolerances allow.

    watts = dissipation.worst(circuit, case, {"Q1:ce-short": ("R3", "R4")}, specs)
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np

DRAWS = 32     # units per cause fault: the worst of 32 reaches the top few % of the spread
SEED = 0       # fixed: the hypothesis set must not depend on the user's --seed


def worst(circuit, case, candidates: Mapping[str, Sequence[str]], specs: Mapping,
          K: int = DRAWS) -> dict[str, dict[str, float]]:
    """Cause fault id -> resistor ref -> the most watts it dissipates over K units with
    that fault (NaN when no unit solved). `specs` maps each cause id to its FaultSpec."""
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
            a, b = case.part(ref).nodes
            r = np.asarray(params[f"{ref}.r"], float).reshape(len(causes), K)[i]
            p = (node(i, a) - node(i, b)) ** 2 / r
            row[ref] = float(np.nanmax(p)) if np.isfinite(p).any() else float("nan")
        out[c] = row
    return out
