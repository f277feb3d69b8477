"""Part kinds: one module per family, registered here by kind name.

Each kind (a PartKind) gives nominal parameters and healthy spreads from a Part, and its
DC and AC stamps; semiconductors also a nonlinear Device. Adding a kind touches one module,
this registry and (if it has a model) one entry in rules/models.yaml.
"""

from __future__ import annotations

from diag.core.errors import DiagError
from diag.core.parts import bjt, diode
from diag.core.parts.base import GMIN, T_KELVIN, VT, Context, PartKind, Spread
from diag.core.parts.bjt import BJT
from diag.core.parts.diode import Diode
from diag.core.parts.passive import Capacitor, FuseLink, Inductor, Pot, Resistor, Speaker
from diag.core.parts.sources import SIGNAL_HZ, Signal, Supply

REGISTRY: dict[str, PartKind] = {}
for _cls in (Resistor, Pot, Capacitor, Inductor, Speaker, FuseLink, Supply, Signal,
             Diode, BJT):
    _k = _cls()
    for _name in _cls.kinds:
        REGISTRY[_name] = _k

MODEL_KINDS = {"npn": ("npn",), "pnp": ("pnp",), "diode": ("diode",), "led": ("led",),
               "zener": ("zener",)}


def kind_of(kind: str) -> PartKind:
    """The PartKind that handles `kind`; DiagError naming the known kinds otherwise."""
    try:
        return REGISTRY[kind]
    except KeyError:
        raise DiagError(f"unknown part kind {kind!r}",
                        hint="known kinds: " + ", ".join(sorted(REGISTRY))) from None


CARD_HINT = ("the model takes {} (SI units); a simulator card's capacitance, noise and "
             "temperature names are accepted too and not used")


def card_names(kind: str, used_only: bool = False) -> tuple[str, ...]:
    """SPICE model-card names a semiconductor kind accepts: the ones its model uses, then
    (unless `used_only`) the ones it carries without using (CARD_ONLY of parts/bjt.py and
    parts/diode.py)."""
    used, extra = ((bjt.MODEL_NAMES, bjt.CARD_ONLY) if kind in ("npn", "pnp")
                   else (tuple(diode.SPICE_DEFAULTS), diode.CARD_ONLY))
    return used if used_only else used + extra


def unused_card_names(part) -> tuple[str, ...]:
    """The names in a semiconductor part's model card that diag accepts and does not use
    (a card's XTB is used: ensemble.apply_ambient)."""
    if part.model is None or part.kind not in MODEL_KINDS:
        return ()
    only = bjt.CARD_ONLY if part.kind in ("npn", "pnp") else diode.CARD_ONLY
    return tuple(k for k in part.model if k in only and k != "XTB")


def check_models(models: dict, file: str | None = None) -> None:
    """Validate the models rules section: kind, params names and numbers."""

    for name, entry in (models or {}).items():
        line = getattr(models, "line_of", lambda k: None)(name)
        if not isinstance(entry, dict) or entry.get("kind") not in MODEL_KINDS:
            raise DiagError("a model needs kind: npn, pnp, diode, led or zener", file=file,
                            line=line, where=str(name))
        allowed = card_names(entry["kind"])
        for key, val in (entry.get("params") or {}).items():
            if key not in allowed:
                raise DiagError(f"unknown model parameter {key!r}", file=file, line=line,
                                where=str(name), hint=CARD_HINT.format(
                                    " ".join(card_names(entry["kind"], used_only=True))))
            if not isinstance(val, (int, float)) or isinstance(val, bool) or val < 0:
                raise DiagError(f"parameter {key} must be a non-negative number",
                                file=file, line=line, where=str(name))
            why = bjt.early_problem(key, float(val))
            if why:
                raise DiagError(why[0], file=file, line=line, where=str(name), hint=why[1])


__all__ = ["REGISTRY", "kind_of", "card_names", "CARD_HINT", "unused_card_names",
           "check_models", "Context",
           "PartKind", "Spread", "VT", "GMIN", "T_KELVIN", "SIGNAL_HZ"]
