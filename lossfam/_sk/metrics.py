r"""Likelihood metrics for scikit-learn: mean nll, mean deviance, D^2, and scorers built on them.

The plain metric functions take predictions on the **response scale** (what
``predict`` returns: a mean, a median or a quantile, a probability for
bernoulli), so they work with any fitted model, not only lossfam's:

    mean_nll(y, pred, family)      = sum w nll(y, g(pred)) / sum w
    mean_deviance(y, pred, family) = sum w dev(y, g(pred)) / sum w
    d2_score(y, pred, family)      = 1 - sum w dev(y, g(pred)) / sum w dev(y, g^-1(c0))

with g the family's link and c0 = family.baseline(y, w), the best constant
raw score for these very targets (so D^2 is 0 for the constant model and 1 for
a perfect fit; it is the scale-free "fraction of deviance explained").  D^2
is nan when the targets are all equal under the family (null deviance 0).

``y`` may be a :class:`lossfam.censoring.IntervalTarget` (censored and interval rows) in
``mean_nll`` and in the scorers of kind "nll": the mean censored nll.  The deviance kinds
(``mean_deviance``, ``d2_score``, "deviance", "d2") refuse censored rows, which have no unit
deviance.

``scorer(family, kind)`` turns one of them into a scikit-learn scorer
(greater is better: it returns -mean_nll, -mean_deviance or D^2).  For lossfam
estimators it reads the raw score directly (``predict_raw`` or
``decision_function``, with the rows' offset when one is given) and, when the
estimator's fitted ``family_`` is the same family, uses its fitted nuisance
parameters (``use_fitted=True``).  Like scikit-learn's own scorers it takes
part in metadata routing: ``scorer(...).set_score_request(offset=True,
sample_weight=True)`` lets GridSearchCV / cross_validate pass each test fold's
offset and weights to it (with ``sklearn.set_config(enable_metadata_routing=True)``).
"""
from __future__ import annotations

import numpy as np

from .. import _checks
from ..censoring import IntervalTarget
from ..registry import family as make_family


def _weights(sample_weight, y, owner):
    if sample_weight is None:
        return None
    return _checks.check_weight(sample_weight, y, owner, need_positive_sum=True)


def _raw_from_pred(fam, pred):
    return fam.link(pred)


def _mean(values, w):
    return float(np.mean(values)) if w is None else float(np.dot(w, values) / np.sum(w))


def _nll_raw(fam, y, raw, w):
    return _mean(fam.nll(y, raw), w)


def _dev_raw(fam, y, raw, w):
    return _mean(fam.deviance(_plain(fam, y), raw), w)


def _plain(fam, y):
    """An IntervalTarget whose rows are all exact as its plain targets (the deviance kinds); censored
    rows are refused by the family (they have no unit deviance)."""
    if isinstance(y, IntervalTarget):
        if not y.exact.all():
            fam.deviance(y, np.zeros(y.size))  # raises, naming the censored rows
        return y.lower
    return y


def _d2_raw(fam, y, raw, w):
    y = _plain(fam, fam.check_target(y, for_nll=False))
    dev = fam.deviance(y, raw)
    c0 = fam.baseline(y, w)
    null = fam.deviance(y, np.full_like(y, c0))
    ww = np.ones_like(y) if w is None else w
    denom = float(np.dot(ww, null))
    if not denom > 0:
        return float("nan")
    return 1.0 - float(np.dot(ww, dev)) / denom


def mean_nll(y, pred, family, sample_weight=None):
    """Weighted mean negative log-likelihood (nats per row) of response-scale predictions ``pred``."""
    fam = make_family(family)
    y = fam.check_target(y)
    raw = _raw_from_pred(fam, _same_shape(pred, y, fam))
    return _nll_raw(fam, y, raw, _weights(sample_weight, y, fam.name))


def mean_deviance(y, pred, family, sample_weight=None):
    """Weighted mean unit deviance of response-scale predictions ``pred``."""
    fam = make_family(family)
    y = fam.check_target(y, for_nll=False)
    raw = _raw_from_pred(fam, _same_shape(pred, y, fam))
    return _dev_raw(fam, y, raw, _weights(sample_weight, y, fam.name))


def d2_score(y, pred, family, sample_weight=None):
    """Fraction of deviance explained by response-scale predictions ``pred`` (see module docstring)."""
    fam = make_family(family)
    y = fam.check_target(y, for_nll=False)
    raw = _raw_from_pred(fam, _same_shape(pred, y, fam))
    return _d2_raw(fam, y, raw, _weights(sample_weight, y, fam.name))


def _same_shape(pred, y, fam):
    pred = _checks.as_float_array(pred, "pred", fam.name)
    if pred.shape != y.shape:
        raise ValueError(f"{fam.name}: pred has shape {pred.shape} but y has shape {y.shape}")
    return pred


_KINDS = {"nll": (_nll_raw, -1.0), "deviance": (_dev_raw, -1.0), "d2": (_d2_raw, 1.0)}


class LikelihoodScorer:
    """A scikit-learn scorer ``scorer(estimator, X, y, sample_weight=None, offset=None)``;
    build it with :func:`scorer`."""

    _ROUTED = ("sample_weight", "offset")

    def __init__(self, family, kind="nll", use_fitted=True):
        if kind not in _KINDS:
            raise ValueError(f"scorer: kind must be one of {sorted(_KINDS)}, got {kind!r}")
        self.family = make_family(family)
        self.kind = kind
        self.use_fitted = use_fitted
        self._requests = {}

    def __repr__(self):
        return f"scorer({self.family.name!r}, kind={self.kind!r})"

    def set_score_request(self, **requests):
        """Ask metadata routing for ``sample_weight`` and/or ``offset`` (True, False, None or an alias)."""
        from sklearn.utils.metadata_routing import UNCHANGED

        for key, value in requests.items():
            if key not in self._ROUTED:
                raise TypeError(f"scorer.set_score_request: unexpected argument {key!r}; "
                                f"the scorer takes {', '.join(self._ROUTED)}")
            if value is not UNCHANGED:
                self._requests[key] = value
        return self

    def get_metadata_routing(self):
        """The scorer's metadata request (scikit-learn's routing protocol)."""
        from sklearn.utils.metadata_routing import MetadataRequest

        req = MetadataRequest(owner=type(self).__name__)
        for key in self._ROUTED:
            req.score.add_request(param=key, alias=self._requests.get(key))
        return req

    def __call__(self, estimator, X, y, sample_weight=None, offset=None):
        fam = self.family
        fitted = getattr(estimator, "family_", None)
        if self.use_fitted and fitted is not None and getattr(fitted, "name", None) == fam.name:
            fam = fitted
        classes = getattr(estimator, "classes_", None)
        censored = isinstance(y, IntervalTarget)
        if not censored:
            y = np.asarray(y)
        if classes is not None and censored:
            raise ValueError("scorer: a classifier has no censored targets; an IntervalTarget needs a regressor")
        if classes is not None:
            if len(classes) != 2:
                raise ValueError("scorer: a classifier must have exactly two classes for a likelihood score")
            y = (y == classes[1]).astype(np.float64)
            if hasattr(estimator, "decision_function") and getattr(estimator, "family_", None) is not None:
                raw = np.asarray(estimator.decision_function(X, **_offset_kw(offset)), dtype=float)
            else:
                _refuse_offset(estimator, offset)
                raw = fam.link(np.asarray(estimator.predict_proba(X))[:, 1])
        elif hasattr(estimator, "predict_raw"):
            raw = np.asarray(estimator.predict_raw(X, **_offset_kw(offset)), dtype=float)
        else:
            _refuse_offset(estimator, offset)
            raw = fam.link(estimator.predict(X))
        y = fam.check_target(y, for_nll=self.kind == "nll")
        raw = _checks.check_raw(raw, y, fam.name)
        func, sign = _KINDS[self.kind]
        return sign * func(fam, y, raw, _weights(sample_weight, y, fam.name))


def _offset_kw(offset):
    return {} if offset is None else {"offset": offset}


def _refuse_offset(estimator, offset):
    if offset is not None:
        raise ValueError(f"scorer: an offset was given but {type(estimator).__name__} has no raw score "
                         "that takes one (predict_raw or decision_function with offset=)")


def scorer(family, kind="nll", *, use_fitted=True):
    """A scikit-learn scorer for ``cross_val_score`` and ``GridSearchCV`` (greater is better).

    kind="nll" returns -mean_nll, "deviance" -mean_deviance, "d2" the D^2 score.
    """
    return LikelihoodScorer(family, kind, use_fitted=use_fitted)
