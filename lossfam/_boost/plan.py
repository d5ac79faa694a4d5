"""The engine-neutral phases of ``train``: the start plan (baseline, starting scores, nuisance
pre-fit), the training path (step guard, native twin or Python objective, leaf rule), the check of
the trained raw scores, the final nuisance fit and the model's record of how it was trained.

Both adapters run the same phases in the same order: their arguments checked (``_Call``), the
start (``start_plan``), the validation sets' starts, the path (``training_path``), the engine's
plumbing (objective, metric, callbacks), the run, and the finish (``checked_training_raw``, the
nuisance fit, ``fit_info``)."""
from __future__ import annotations

import dataclasses

import numpy as np

from .. import _checks
from ..censoring import IntervalTarget
from . import facts
from .gradients import resolve_guard
from .scoring import raw_from_output

#: training passes on a censored target whose family fits nuisance parameters (see censored_passes)
CENSORED_PASSES = 2
#: ``prefit`` of the first pass: pre-fit at the baseline, no further passes
PREFIT_ONCE = "once"


@dataclasses.dataclass
class StartPlan:
    """Where training starts.

    family
        The family as trained: the given one, with its nuisance parameters
        fitted at the baseline first when it declares
        ``location_needs_nuisance`` (and ``prefit`` is on).
    baseline
        The constant raw score minimising the weighted nll given the offset
        (``family.baseline(y, w, offset=o)``), rounded to ``precision``; for
        a median / quantile family the engine's own start, a sample quantile
        of the targets by the engine's definition (``facts.engine_start``).
    start
        Starting raw scores of the training rows: ``baseline + offset``.
    """

    family: object
    baseline: float
    start: np.ndarray
    offset: np.ndarray | None

    def start_for(self, n, offset=None, what="offset"):
        """Starting raw scores of other rows (a validation set): baseline + their offset."""
        s = np.full(n, self.baseline)
        if offset is not None:
            s += _checks.check_raw(np.asarray(offset, dtype=np.float64).reshape(-1), s, what)
        return s


def start_plan(fam, y, w, offset=None, *, prefit=True, precision=np.float64, engine=None) -> StartPlan:
    """Baseline given offset and weights, starting scores and the pre-fit (see StartPlan).

    With ``engine``, a median / quantile family starts where that engine's
    built-in objective starts (``facts.engine_start``)."""
    o = None if offset is None else _checks.check_raw(np.asarray(offset, dtype=np.float64).reshape(-1), y,
                                                      f"{fam.name} offset")
    # censored rows: lossfam's censored baseline (the engines' own starts read plain targets only)
    own = None if engine is None or isinstance(y, IntervalTarget) else facts.engine_start(fam, engine, y, w, o)
    baseline = float(precision(fam.baseline(y, w, offset=o) if own is None else own))
    start = np.full(y.shape, baseline) if o is None else baseline + o
    censored = isinstance(y, IntervalTarget) and not y.exact.all()
    if prefit and (fam.location_needs_nuisance or (censored and fam.censored_fit)) and fam.params:
        fam = fit_nuisance_or_keep(fam, y, start, w)
    return StartPlan(fam, baseline, start, o)


def training_path(fam, engine, engine_name, step_limit, native, params, censored):
    """(guard, twin, rule): the step guard, the native twin's engine parameters (or None: the Python
    objective) and the leaf-value rule of the Python objective.

    The twin is taken where the family declares one for ``engine``, ``native`` is on and the guard is
    the family's default (``facts.chosen_twin``).  A censored target trains on lossfam's censored
    gradients with the engine's Newton leaves (the twins and the leaf rules read plain targets only).
    """
    guard = resolve_guard(fam, step_limit)
    rule = facts.leaf_rule(fam)
    twin = facts.chosen_twin(fam, engine, engine_name, native=native,
                             guard_is_default=guard == resolve_guard(fam, "auto"), params=params)
    if censored:
        twin, rule = None, "newton"
    return guard, twin, rule


def fit_info(twin, rule, guard) -> dict:
    """How a model was trained, as kept in ``BoostedFit.info`` and its file: the engine objective
    ("custom" or the twin's), the leaf rule ("engine" under a twin), the step guard."""
    return {"objective": twin["objective"] if twin else "custom", "leaf_value": rule if twin is None else "engine",
            "step_limit": guard.limit, "hessian_damping": guard.damping}


def checked_training_raw(fam, raw=None, pred=None):
    """Check the trained scores of the training rows (``check_trained``): ``raw`` scores, or ``pred``,
    a native twin's transformed predictions (overwritten).  Returns the training rows' raw scores
    where the nuisance fit needs them: ``raw`` as given, or ``pred`` mapped back through the link
    (None for a twin's predictions when the family has no nuisance parameters)."""
    if pred is not None:
        check_trained(fam, pred=pred)
        return raw_from_output(fam, pred, overwrite=True) if fam.params else None
    check_trained(fam, raw=raw)
    return raw


def fit_nuisance_or_keep(fam, y, raw, w):
    """``fam.fit_nuisance``, keeping the given parameters where no maximum-likelihood value exists
    (every residual zero: a scale of 0, a shape of infinity)."""
    if not fam.params:
        return fam
    try:
        return fam.fit_nuisance(y, raw, w)
    except ValueError:
        return fam


def check_trained(fam, raw=None, pred=None, what="the training rows"):
    """Refuse trained scores that are not finite or whose predictions leave the link's range.

    Give ``raw`` (raw scores) or ``pred`` (the engine's transformed predictions
    under a built-in objective: a probability, a mean).  A learning rate far
    too large sends raw scores to +-inf or, under a log link, means to 0 or
    inf; none of that is a model.  Raises ValueError naming the rows.
    """
    link = fam.link_function
    if _inside_quickly(link, raw, pred):
        return
    with np.errstate(over="ignore", invalid="ignore"):
        if raw is not None:
            values = np.asarray(raw, dtype=np.float64).reshape(-1)
            bad = ~np.isfinite(values)
            if not bad.any():
                bad = ~link.prediction_domain.inside(link.inverse(values))
            kind = "raw scores"
        else:
            values = np.asarray(pred, dtype=np.float64).reshape(-1)
            bad = ~link.prediction_domain.inside(values)
            kind = "predictions"
    if bad.any():
        raise ValueError(
            f"{fam.name}: training diverged: the trained model's predictions for {what} are not finite or "
            f"leave the {link.name} link's range at {_checks._describe_rows(bad, values).replace(' outside', '')} "
            f"({kind}); use a smaller learning rate (or a step_limit)"
        )


def _inside_quickly(link, raw, pred) -> bool:
    """True when one pass over the scores proves every prediction inside the link's range.

    The inverse link is monotone and its range an interval, so the predictions of all
    rows lie inside when those of the smallest and largest raw score do.  False means
    "not proven" (the caller then checks row by row and names the rows).
    """
    values = np.asarray(raw if raw is not None else pred).reshape(-1)
    if values.dtype != np.float64 or values.size == 0:
        return False
    lo, hi = _checks._bounds(values)
    if not (np.isfinite(lo) and np.isfinite(hi)):
        return False
    ends = np.array([lo, hi])
    with np.errstate(over="ignore", invalid="ignore"):
        if raw is not None:
            ends = link.inverse(ends)
        return bool(np.all(link.prediction_domain.inside(ends)))


def censored_passes(fam, y, prefit) -> bool:
    """True when training should run in passes: a censored target (some row not exact) and a family
    that fits nuisance parameters under censoring.

    With censored rows the location minimiser depends on the nuisance parameters (a right-censored
    row pushes the location up by an amount that grows with the assumed scale), so trees grown under
    wrong ones are biased; the parameters fitted at the baseline are the marginal ones, too wide
    where the features explain part of the spread.  Pass 1 pre-fits them at the baseline and trains;
    each further pass trains afresh with the parameters fitted to the previous pass's raw scores
    (``CENSORED_PASSES`` in all).  ``prefit=False`` trains once with the parameters as given.
    """
    return (prefit is True and isinstance(y, IntervalTarget) and not y.exact.all()
            and bool(fam.censored_fit) and bool(fam.params))


def train_in_passes(train, fam, **call):
    """``train(fam, prefit=PREFIT_ONCE, **call)``, then CENSORED_PASSES - 1 more passes, each started
    from the previous fit's fitted family (``censored_passes``)."""
    fit = train(fam, prefit=PREFIT_ONCE, **call)
    for _ in range(CENSORED_PASSES - 1):
        fit = train(fit.fitted_family, prefit=False, **call)
    return fit
