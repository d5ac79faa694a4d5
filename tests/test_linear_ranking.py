"""The ranking's linear engine on data whose unpenalised likelihood has no finite maximiser.

Reference data: scikit-learn's breast-cancer set (Wisconsin diagnostic, 569 rows, 30 features,
``sklearn.datasets.load_breast_cancer``), whose two classes are linearly separable on the
training folds, so unpenalised logistic regression diverges there.
"""
import warnings

import numpy as np
import pytest
from sklearn.datasets import load_breast_cancer

import lossfam
from lossfam.sklearn import UnboundedLikelihoodWarning


def test_bernoulli_ranks_first_on_breast_cancer_at_defaults():
    X, y = load_breast_cancer(return_X_y=True)
    with warnings.catch_warnings():
        warnings.simplefilter("error", UnboundedLikelihoodWarning)  # handled, not passed on
        table = lossfam.rank_families(X, y.astype(float), as_frame=False)
    assert table[0]["family"] == "bernoulli", [(r["family"], r["nll_per_row"]) for r in table]
    assert "ridge alpha=" in table[0]["note"] and "unpenalised MLE unbounded" in table[0]["note"]
    # a bernoulli model that predicts this well has held-out log loss well below log 2
    assert table[0]["nll_per_row"] < 0.2


def test_bounded_fits_stay_unpenalised():
    rng = np.random.default_rng(0)
    X = rng.standard_normal((300, 2))
    y = (rng.random(300) < 1 / (1 + np.exp(-X[:, 0]))).astype(float)
    table = lossfam.rank_families(X, y, families=["bernoulli"], as_frame=False)
    assert "ridge" not in table[0]["note"]
    # the overlapping classes of this demo: the same held-out nll as a plain alpha=0 fit per fold
    explicit = lossfam.rank_families(X, y, families=["bernoulli"], engine_params={"alpha": 0.0}, as_frame=False)
    assert table[0]["nll_per_row"] == pytest.approx(explicit[0]["nll_per_row"], rel=1e-12)
