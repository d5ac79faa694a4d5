"""A family's engine facts (declared on the family class) turned into the numbers the engines use."""
from __future__ import annotations

import numpy as np

from ..families._base import LEAF_VALUE_RULES, FromParam
from .quantiles import single_precision_quantile

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


# The engines' own sample quantile definitions (lossfam._boost.quantiles): facts about the
# engines, not the families.  Measured on lightgbm 4.7.0 and xgboost 3.2.0 by growing one tree
# from a zero start at learning rate 1 and comparing every leaf with each of numpy.quantile's
# methods on that leaf's residuals (and the start, from an essentially zero learning rate, with
# the targets' quantiles):
#   LightGBM regression_l1 / quantile, no weights: "linear" (Hyndman-Fan 7), leaves and start;
#       with weights: an interpolation of its own between weighted order statistics that
#       depends on the weights' absolute size (matched none of the definitions), not reproduced;
#   XGBoost reg:absoluteerror / reg:quantileerror, no weights: "weibull" (Hyndman-Fan 6),
#       leaves and start; with weights (any, all ones included): "lower" (inverted cdf).
# At level 1/2 "linear", "weibull" and "midpoint" all give the usual median.
_RENEWAL = {"lightgbm": ("linear", None), "xgboost": ("weibull", "lower")}


def renewal_definition(engine: str, weighted: bool) -> str:
    """The sample quantile definition with which ``engine``'s built-in median / quantile objective
    renews leaves (on rows with or without weights); "midpoint" where lossfam cannot reproduce it."""
    unweighted_rule, weighted_rule = _RENEWAL[engine]
    rule = weighted_rule if weighted else unweighted_rule
    return rule or "midpoint"


def engine_start(fam, engine: str, y, w, offset=None) -> float | None:
    """Where ``engine`` starts a median / quantile family: its built-in objective's own start.

    The engines start their median and quantile objectives at a sample quantile
    of the targets by their renewal definition, in single precision
    (``quantiles.single_precision_quantile``).  lossfam starts a family whose
    leaves take a residual quantile (``leaf_level``) there too, on the native
    and on the custom path, so that both grow exactly the built-in's trees:
    the first trees of a quantile model depend on the start, and on targets
    with ties one float32 ulp moves the held-out loss by percents.  With an
    offset the same rule applies to ``y - offset`` (the built-ins have no
    start of their own there).  The family's ``baseline`` (the midpoint of
    the minimisers of the pinball loss) is what the engines fall back to
    where lossfam cannot reproduce the engine (LightGBM with weights), and
    what the linear models and the diagnostics use; every rule here is a
    minimiser or lies between the two order statistics around it.

    Returns None for the other families (their baseline is the unique
    minimiser of the nll, the same in every engine).
    """
    level = leaf_level(fam)
    if level is None:
        return None
    weighted = w is not None
    definition = renewal_definition(engine, weighted)
    if definition == "midpoint":
        return None
    x = np.asarray(y, dtype=np.float64).reshape(-1)
    if offset is not None:
        x = x - np.asarray(offset, dtype=np.float64).reshape(-1)
    if weighted:
        w = np.asarray(w, dtype=np.float64).reshape(-1)
        keep = w > 0
        x, w = x[keep], w[keep]
    return single_precision_quantile(x, w, level, definition)
