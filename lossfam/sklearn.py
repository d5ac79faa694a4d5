"""scikit-learn estimators, metrics and scorers for lossfam families.

* :class:`LikelihoodRegressor` -- a linear model fitted by penalised maximum
  likelihood under any registered family (exact solvers: Newton for smooth
  families; for laplace / asymmetric_laplace linear programming, or with a
  ridge penalty a certified active-set solve of the optimality conditions;
  semismooth Newton with a jointly fitted scale for huber).
* :class:`LikelihoodClassifier` -- the bernoulli family as a binary classifier.
* :class:`JointLikelihoodRegressor` -- a linear model for each raw score of a
  several-score family (location and scale, e.g. ``gaussian_spread``), fitted by
  joint maximum likelihood (varying dispersion).
* :class:`MultinomialLikelihoodClassifier` -- multinomial logit regression (K classes,
  the ``multinomial`` family with class ``classes_[0]`` as reference).
* :class:`BoostedLikelihoodRegressor`, :class:`BoostedLikelihoodClassifier` -- wrap an
  ``LGBMRegressor`` / ``XGBRegressor`` (or classifier) so that it trains on a
  family's nll with the matching starting score, metric and inverse link.
* :func:`mean_nll`, :func:`mean_deviance`, :func:`d2_score` (predictions on the
  response scale) and :func:`scorer` for ``cross_val_score`` / ``GridSearchCV``.

Importing this module imports scikit-learn (``import lossfam`` alone does not).
"""
try:
    import sklearn  # noqa: F401  (the real scikit-learn: absolute import)
except ImportError as exc:  # pragma: no cover - exercised only without scikit-learn
    raise ImportError(
        'lossfam.sklearn needs scikit-learn; install it with: pip install "lossfam[sklearn]"'
    ) from exc

from ._sk.boosted import BoostedLikelihoodClassifier, BoostedLikelihoodRegressor
from ._sk.linear import LikelihoodClassifier, LikelihoodRegressor, UnboundedLikelihoodWarning
from ._sk.several import JointLikelihoodRegressor, MultinomialLikelihoodClassifier
from ._sk.metrics import LikelihoodScorer, d2_score, mean_deviance, mean_nll, scorer

__all__ = [
    "LikelihoodRegressor",
    "LikelihoodClassifier",
    "JointLikelihoodRegressor",
    "MultinomialLikelihoodClassifier",
    "BoostedLikelihoodRegressor",
    "BoostedLikelihoodClassifier",
    "UnboundedLikelihoodWarning",
    "LikelihoodScorer",
    "scorer",
    "mean_nll",
    "mean_deviance",
    "d2_score",
]
