"""``BoostedFit``: the trained model of both engines, and ``load``, which reads either engine's file."""
from __future__ import annotations

import importlib
import math

import numpy as np

from .. import _checks
from .._modelfile import read_model_file, write_model_file
from . import cluster
from .scoring import Scorer
from .several import SeveralScorer, is_several, offset_matrix

_ADAPTERS = {"lightgbm": "lossfam.lightgbm", "xgboost": "lossfam.xgboost"}


def _adapter(engine):
    if engine not in _ADAPTERS:
        raise ValueError(f"unknown engine {engine!r}; lossfam models come from {sorted(_ADAPTERS)}")
    return importlib.import_module(_ADAPTERS[engine])


class BoostedFit:
    """A boosted model trained on a family's nll, by LightGBM or XGBoost.

    Attributes
    ----------
    engine : "lightgbm" or "xgboost"
    booster : the engine's booster (``lightgbm.Booster`` / ``xgboost.Booster``)
    family : Family
        The family as trained (nuisance parameters pre-fitted at the baseline
        when the family's location depends on them).
    fitted_family : Family
        ``family`` with its nuisance parameters fitted by maximum likelihood
        on the training rows (or the ``nuisance_set``) at the final raw
        scores; used by :meth:`distribution`.
    baseline : float
        The starting raw score; ``predict_raw`` adds it (and the offset).
    best_iteration : int or None
        After early stopping, the 0-based index of the best round (the model
        keeps rounds 0..best_iteration); None otherwise.
    info : dict
        How it was trained: the engine objective (``"custom"`` or the native
        twin), the step guard, the leaf-value rule.
    """

    def __init__(self, engine, booster, family, baseline, fitted_family=None, best_iteration=None, info=None):
        self.engine = engine
        self.booster = booster
        self.family = family
        self.baseline = float(baseline)
        self.fitted_family = family if fitted_family is None else fitted_family
        self.best_iteration = None if best_iteration is None else int(best_iteration)
        self.info = dict(info or {})

    def __repr__(self):
        return (f"BoostedFit(engine={self.engine!r}, family={self.family!r}, baseline={self.baseline:.6g}, "
                f"rounds={_adapter(self.engine)._rounds(self.booster)})")

    def predict_raw(self, X, offset=None):
        """Raw scores (link scale), float64: trees + baseline (+ offset, one per row).

        ``X``: numpy array, pandas DataFrame, scipy sparse matrix or the
        engine's own data object (an XGBoost DMatrix, whose ``base_margin``
        is read as the offset when ``offset`` is None).  A Dask array or
        DataFrame (offset a Dask array / Series, or numpy for a Dask array)
        gives a lazy Dask array / Series, computed partition by partition on
        the workers.
        """
        if cluster.is_dask_collection(X):
            return cluster.predict_raw(self, X, offset)
        return np.asarray(_adapter(self.engine)._margin(self, X, offset), dtype=np.float64).reshape(-1)

    def predict(self, X, offset=None):
        """Predictions on the response scale (``family.prediction_kind``): inverse link of predict_raw
        (lazy on Dask input)."""
        raw = self.predict_raw(X, offset)
        if cluster.is_dask_collection(raw):
            return cluster.inverse_link_lazy(self.family, raw)
        return self.family.link_function.inverse(raw)

    def distribution(self, X, offset=None):
        """The predictive law per row, with the fitted nuisance parameters."""
        if cluster.is_dask_collection(X):
            raise TypeError("distribution() builds a scipy law in memory: pass numpy or pandas rows (e.g. a computed "
                            "partition); predict() and predict_raw() stay lazy on Dask input")
        return self.fitted_family.distribution(self.predict_raw(X, offset))

    def mean_loss(self, X, y, weight=None, offset=None, kind="nll", client=None):
        """The weighted mean nll (``kind="nll"``, with the fitted nuisance parameters) or unit deviance
        of the rows ``(X, y)``.

        With Dask input (``X``, ``y`` and the optional ``weight`` / ``offset``
        Dask collections) each partition's sums are computed on the workers and
        only their totals come back (``client``: given, or the current one).
        """
        fam = self.fitted_family
        if cluster.is_dask_collection(X):
            client = cluster.get_client(client)
            data = cluster.ClusterData(X, y, weight, offset)
            X, y, w, o = data.aligned(client)
            cluster.check_rows(client, fam, y, w, o, "mean_loss", for_nll=kind == "nll")
            return cluster.mean_loss(client, fam, kind, y, w, cluster.predict_raw(self, X, o, lengths=y.chunks[0]))
        y = fam.check_target(np.asarray(y, dtype=np.float64).reshape(-1), for_nll=kind == "nll")
        w = None if weight is None else _checks.check_weight(np.asarray(weight, dtype=np.float64).reshape(-1), y, fam.name)
        raw = _checks.check_raw(self.predict_raw(X, offset), y, fam.name)
        return Scorer(fam, kind).value(y, raw, w)

    def save(self, path, key=None):
        """Write the model to ``path``: one JSON file (the engine's model, the family, the baseline)."""
        adapter = _adapter(self.engine)
        text, extra = adapter._model_text(self.booster)
        extra.update(fitted_params=self.fitted_family.params, best_iteration=self.best_iteration, info=self.info)
        write_model_file(path, engine=self.engine, family=self.family, baseline=self.baseline, model=text,
                         extra=extra, key=key)


class SeveralScoreFit:
    """A boosted model of a family with k raw scores per row (``lossfam.SeveralScoreFamily``),
    trained by LightGBM (one tree per raw score and round, ``num_class = k``) or XGBoost
    (``num_target = k``).

    The sibling of :class:`BoostedFit` with the same methods, where a row's raw score is a
    k-vector: ``predict_raw`` gives (n, k), ``predict`` the location (column 0 through its link),
    ``distribution`` the per-row law (every parameter per row: a scale that varies with the
    features), ``mean_loss`` the weighted mean nll, ``save`` / ``lossfam.load`` the file.

    Attributes
    ----------
    engine, booster, family, best_iteration, info : as in :class:`BoostedFit`
        (``info`` also holds the ``curvature`` trained with).
    baseline : ndarray of shape (k,)
        The starting raw scores; ``predict_raw`` adds them (and the offset).
    fitted_family : the family (several-score families have no constant nuisance parameters).
    """

    def __init__(self, engine, booster, family, baseline, best_iteration=None, info=None):
        self.engine = engine
        self.booster = booster
        self.family = family
        self.fitted_family = family
        self.baseline = np.array(baseline, dtype=np.float64).reshape(-1)
        if self.baseline.shape != (family.n_scores,):
            raise ValueError(f"{family.name}: the baseline must hold {family.n_scores} raw scores, "
                             f"got {self.baseline.size}")
        self.best_iteration = None if best_iteration is None else int(best_iteration)
        self.info = dict(info or {})

    def __repr__(self):
        return (f"SeveralScoreFit(engine={self.engine!r}, family={self.family!r}, "
                f"baseline={np.round(self.baseline, 6).tolist()}, rounds={_adapter(self.engine)._rounds(self.booster)})")

    def predict_raw(self, X, offset=None):
        """All k raw scores, float64 (n, k): trees + baseline (+ offset: (n,) on the location column
        or (n, k)).  ``X`` as for :meth:`BoostedFit.predict_raw` (in memory)."""
        if cluster.is_dask_collection(X):
            raise TypeError(f"{self.family.name}: several-score models predict in memory (numpy, pandas, sparse)")
        return _adapter(self.engine)._margin_several(self, X, offset)

    def predict(self, X, offset=None):
        """The location on the response scale (the family's ``prediction_kind``), (n,)."""
        return self.family.location(self.predict_raw(X, offset))

    def parameters(self, X, offset=None):
        """(n, k): every distribution parameter per row, each through its own inverse link."""
        return self.family.parameters(self.predict_raw(X, offset))

    def distribution(self, X, offset=None):
        """The predictive law per row, with per-row scale (a frozen scipy.stats law)."""
        return self.family.distribution(self.predict_raw(X, offset))

    def mean_loss(self, X, y, weight=None, offset=None, kind="nll"):
        """The weighted mean nll of the rows ``(X, y)``."""
        if kind != "nll":
            raise ValueError(f"{self.family.name}: several-score models report kind='nll' only, got {kind!r}")
        fam = self.family
        y = fam.check_target(np.asarray(y, dtype=np.float64).reshape(-1))
        w = None if weight is None else _checks.check_weight(np.asarray(weight, dtype=np.float64).reshape(-1), y,
                                                             fam.name)
        return SeveralScorer(fam).value(y, self.predict_raw(X, offset), w)

    def save(self, path, key=None):
        """Write the model to ``path`` (one JSON file, as :meth:`BoostedFit.save`; the baseline is a list)."""
        adapter = _adapter(self.engine)
        text, extra = adapter._model_text(self.booster)
        extra.update(best_iteration=self.best_iteration, info=self.info)
        write_model_file(path, engine=self.engine, family=self.family, baseline=self.baseline.tolist(),
                         model=text, extra=extra, key=key)


def _offset_rows(fit, offset, n):
    """The (n, k) offset matrix of a prediction (None when there is none)."""
    return offset_matrix(fit.family, offset, n, f"{fit.family.name} offset")


def load(path, key=None, *, engine=None):
    """Read a model saved by :meth:`BoostedFit.save` (either engine).

    Raises ValueError for files that are truncated, corrupted, edited, written
    by the other engine when ``engine`` is given, or not lossfam model files.
    """
    doc = read_model_file(path, engine=engine, key=key)
    eng = doc["engine"]
    adapter = _adapter(eng)
    fam = doc["family"]
    baseline = doc["baseline"]
    if is_several(fam):
        return _load_several(path, doc, adapter, fam, baseline)
    if isinstance(baseline, bool) or not isinstance(baseline, (int, float)) or not math.isfinite(baseline):
        raise ValueError(f"{path}: the baseline {baseline!r} is not a finite number")
    extra = doc["extra"] if isinstance(doc["extra"], dict) else {}
    try:
        fitted = fam.with_params(**extra.get("fitted_params", {}))
    except (TypeError, ValueError) as exc:
        raise ValueError(f"{path}: the fitted parameters are malformed ({exc})") from None
    best = extra.get("best_iteration")
    if best is not None and (isinstance(best, bool) or not isinstance(best, int) or best < 0):
        raise ValueError(f"{path}: best_iteration {best!r} is not a non-negative integer")
    info = extra.get("info") if isinstance(extra.get("info"), dict) else {}
    booster = adapter._booster_from_text(doc["model"], extra, path, fam, float(baseline), info)
    return BoostedFit(eng, booster, fam, baseline, fitted, best, info)


def _load_several(path, doc, adapter, fam, baseline):
    k = fam.n_scores
    if not (isinstance(baseline, list) and len(baseline) == k and all(
            not isinstance(v, bool) and isinstance(v, (int, float)) and math.isfinite(v) for v in baseline)):
        raise ValueError(f"{path}: the baseline of {fam.name} must be a list of {k} finite numbers, got {baseline!r:.80}")
    extra = doc["extra"] if isinstance(doc["extra"], dict) else {}
    best = extra.get("best_iteration")
    if best is not None and (isinstance(best, bool) or not isinstance(best, int) or best < 0):
        raise ValueError(f"{path}: best_iteration {best!r} is not a non-negative integer")
    info = extra.get("info") if isinstance(extra.get("info"), dict) else {}
    booster = adapter._booster_from_text(doc["model"], extra, path, fam, np.asarray(baseline, dtype=np.float64), info)
    got = adapter._scores_per_round(booster)
    if got != k:
        raise ValueError(f"{path}: the {doc['engine']} model has {got} output(s) per row, {fam.name} has {k} raw "
                         "scores; the file was edited or assembled from different models")
    return SeveralScoreFit(doc["engine"], booster, fam, baseline, best, info)
