"""MultinomialLikelihoodClassifier: multinomial logit regression on the multinomial family."""
import warnings

import numpy as np
import pandas as pd
import pytest
from sklearn.exceptions import ConvergenceWarning
from sklearn.utils.estimator_checks import parametrize_with_checks

import lossfam
from lossfam.sklearn import MultinomialLikelihoodClassifier, UnboundedLikelihoodWarning

WINE_COLUMNS = ["alcohol", "malic_acid", "ash", "alcalinity_of_ash"]


def _wine():
    # the wine recognition data shipped with scikit-learn (sklearn.datasets.load_wine: 178 wines,
    # 3 cultivars); four of its 13 measurements, with which the classes are not linearly separable,
    # so the unpenalised maximum-likelihood estimate exists
    from sklearn.datasets import load_wine

    d = load_wine(as_frame=True)
    return d.data[WINE_COLUMNS], d.target.to_numpy()


def test_coefficients_match_statsmodels_mnlogit_on_wine():
    import statsmodels.api as sm

    X, y = _wine()
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # not separated: no warning of any kind
        m = MultinomialLikelihoodClassifier(alpha=0.0).fit(X, y)
    # outside reference: statsmodels MNLogit (multinomial logit, the lowest class as reference),
    # fitted by its Newton method to a tight tolerance
    ref = sm.MNLogit(y, sm.add_constant(X)).fit(method="newton", maxiter=200, tol=1e-12, disp=0)
    assert ref.mle_retvals["converged"]
    params = np.asarray(ref.params)  # (p + 1, K - 1): constant first
    np.testing.assert_allclose(m.intercept_[1:], params[0], rtol=1e-6, atol=1e-8)
    np.testing.assert_allclose(m.coef_[1:], params[1:].T, rtol=1e-6, atol=1e-8)
    assert np.all(m.coef_[0] == 0.0) and m.intercept_[0] == 0.0
    np.testing.assert_allclose(m.predict_proba(X), ref.predict(sm.add_constant(X)), rtol=1e-6, atol=1e-10)
    # the log-likelihood agrees too
    fam = lossfam.family("multinomial", n_classes=3)
    np.testing.assert_allclose(-fam.nll(y, m.predict_raw(X)).sum(), ref.llf, rtol=1e-10)
    assert list(m.feature_names_in_) == WINE_COLUMNS


def test_labels_probabilities_and_weights(rng):
    X, y = _wine()
    names = np.array(["barolo", "grignolino", "barbera"])[y]
    m = MultinomialLikelihoodClassifier(alpha=0.0).fit(X, names)
    assert list(m.classes_) == ["barbera", "barolo", "grignolino"]  # sorted; barbera the reference
    proba = m.predict_proba(X)
    np.testing.assert_allclose(proba.sum(axis=1), 1.0)
    np.testing.assert_allclose(np.exp(m.predict_log_proba(X)), proba, rtol=1e-12)
    assert set(m.predict(X)) <= set(m.classes_)
    np.testing.assert_array_equal(m.predict(X), m.classes_[np.argmax(proba, axis=1)])
    assert m.score(X, names) > 0.8
    # integer weights are repeated rows
    reps = rng.integers(1, 4, size=len(names))
    a = MultinomialLikelihoodClassifier(alpha=0.0).fit(X, names, sample_weight=reps.astype(float))
    b = MultinomialLikelihoodClassifier(alpha=0.0).fit(pd.DataFrame(np.repeat(X.to_numpy(), reps, axis=0),
                                                                    columns=WINE_COLUMNS), np.repeat(names, reps))
    np.testing.assert_allclose(a.coef_, b.coef_, rtol=1e-7, atol=1e-9)
    law = m.predict_distribution(X.iloc[:5])
    np.testing.assert_allclose(law.p, proba[:5])


def test_two_classes_equal_the_binary_logistic_fit(rng):
    from lossfam.sklearn import LikelihoodClassifier

    X = rng.normal(size=(300, 3))
    y = (X @ [1.0, -0.5, 0.2] + rng.logistic(size=300) > 0).astype(int)
    m = MultinomialLikelihoodClassifier(alpha=0.0).fit(X, y)
    b = LikelihoodClassifier(alpha=0.0).fit(X, y)
    np.testing.assert_allclose(m.coef_[1], b.coef_, rtol=1e-8)
    np.testing.assert_allclose(m.intercept_[1], b.intercept_, rtol=1e-8)


def test_separated_classes_warn_without_penalty():
    X = np.array([[0.0], [0.1], [1.0], [1.1], [2.0], [2.1]])
    y = np.array([0, 0, 1, 1, 2, 2])
    with pytest.warns(UnboundedLikelihoodWarning, match="separated"):
        MultinomialLikelihoodClassifier(alpha=0.0, max_iter=50).fit(X, y)
    m = MultinomialLikelihoodClassifier(alpha=0.1).fit(X, y)
    assert np.all(np.isfinite(m.coef_))


def test_bad_input_is_named():
    X = np.zeros((4, 1))
    with pytest.raises(ValueError, match="at least two classes"):
        MultinomialLikelihoodClassifier().fit(X, [1, 1, 1, 1])
    with pytest.raises(ValueError, match="no row with positive sample weight"):
        MultinomialLikelihoodClassifier().fit(np.arange(4.0)[:, None], [0, 1, 2, 2], sample_weight=[1, 0, 1, 1])


@parametrize_with_checks([MultinomialLikelihoodClassifier()])
def test_sklearn_estimator_checks(estimator, check):
    check(estimator)
