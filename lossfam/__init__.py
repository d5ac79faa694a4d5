"""lossfam: a noise model for the target becomes the matching loss for gradient-trained models.

The loss of a noise model is the negative log of its density (or mass): a
Gaussian gives squared error, Laplace absolute error, Bernoulli log loss, and
so on.  ``lossfam.family(name, **params)`` returns a family with the per-row
nll, its gradient and Hessian in the raw score, the link, the baseline score,
maximum-likelihood nuisance parameters and the predictive law.

Engine adapters live in ``lossfam.lightgbm``, ``lossfam.xgboost`` and
``lossfam.sklearn``; they import their engine only when used.  Both engines'
``train`` return a :class:`BoostedFit`; ``lossfam.load(path)`` reads either
engine's saved model.  ``ClusterData`` (Dask collections) in place of a Dataset / DMatrix trains
on a Dask cluster.  ``lossfam.interval_target`` / ``lossfam.right_censored`` build censored
and interval targets (``lossfam.censoring``), accepted wherever a target goes.
"""
from ._boost.cluster import ClusterData
from ._boost.model import BoostedFit, SeveralScoreFit, load
from .censoring import IntervalTarget, interval_target, right_censored
from .families import Family, SeveralScoreFamily
from .registry import available, family, register, unregister
from .selection import rank_families  # numpy/scipy only at import; engines, pandas load on use

__version__ = "0.1.0"

__all__ = ["BoostedFit", "SeveralScoreFit", "ClusterData", "Family", "SeveralScoreFamily", "IntervalTarget", "interval_target", "right_censored", "available", "load", "rank_families", "family", "register", "unregister", "__version__"]
