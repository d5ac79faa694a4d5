"""A family's engine facts (declared on the family class) turned into the numbers the engines use."""
from __future__ import annotations

from ..families._base import LEAF_VALUE_RULES, FromParam

ENGINES = ("lightgbm", "xgboost")


def dispersion_unit(fam) -> float:
    """parameter ** power from ``fam.dispersion_unit`` (1.0 when the family declares none)."""
    decl = fam.dispersion_unit
    if decl is None:
        return 1.0
    name, power = decl
    return float(fam.params[name]) ** float(power)


def leaf_rule(fam) -> str:
    rule = fam.leaf_value
    if rule not in LEAF_VALUE_RULES:
        raise ValueError(f"{fam.name}: leaf_value must be one of {LEAF_VALUE_RULES}, got {rule!r}")
    return rule


def leaf_level(fam) -> float | None:
    """The residual quantile a leaf takes under the "median"/"quantile" rules, else None."""
    rule = leaf_rule(fam)
    if rule == "median":
        return 0.5
    if rule == "quantile":
        if "quantile" not in fam.params:
            raise ValueError(f"{fam.name}: leaf_value 'quantile' needs a parameter named 'quantile'")
        return float(fam.params["quantile"])
    return None


def twin_params(fam, engine: str) -> dict | None:
    """The engine parameters of the family's native twin (``FromParam`` resolved), or None."""
    spec = (fam.native_twins or {}).get(engine)
    if not spec:
        return None
    return {k: (fam.params[v.name] if isinstance(v, FromParam) else v) for k, v in spec.items()}


def chosen_twin(fam, engine: str, engine_name: str, *, native: bool, guard_is_default: bool, params: dict):
    """The native twin's parameters when training should use it, else None.

    The twin is used only with ``native=True`` and the default step guard (the
    twin's own damping).  User parameters that would change the twin's loss are
    refused rather than silently overridden.
    """
    twin = twin_params(fam, engine) if native and guard_is_default else None
    if twin is not None:
        clash = sorted(k for k in twin if k != "objective" and k in params and params[k] != twin[k])
        if clash:
            raise ValueError(f"params {clash} would change {engine_name}'s built-in objective away from the "
                             f"{fam.name} loss; drop them or pass native=False")
    return twin
