"""Offsets wherever scikit-learn evaluates a model: score, the likelihood scorer, GridSearchCV,
cross_val_predict and Pipeline, through scikit-learn's metadata routing (as for sample_weight).

Reference for every check: the same fits and scores computed fold by fold by hand with the
offset passed explicitly (scikit-learn's documented routing semantics: each requested
metadata array is indexed like X for the fold, User Guide "Metadata Routing").
"""
import warnings

import numpy as np
import pytest
import sklearn
from sklearn.exceptions import UnsetMetadataPassedError
from sklearn.model_selection import GridSearchCV, KFold, cross_val_predict, cross_val_score
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler

from lossfam.sklearn import BoostedLikelihoodRegressor, LikelihoodClassifier, LikelihoodRegressor, scorer


def exposure_data(n=240, seed=0):
    # demo scenario: claim counts of vehicles observed for different lengths of time
    rng = np.random.default_rng(seed)
    X = rng.standard_normal((n, 3))
    offset = np.log(rng.uniform(0.2, 3.0, n))
    y = rng.poisson(np.exp(offset - 0.3 + X @ [0.4, -0.2, 0.1])).astype(float)
    return X, y, offset


@pytest.fixture
def routing():
    with sklearn.config_context(enable_metadata_routing=True):
        yield


def linear():
    return LikelihoodRegressor(family="poisson")


def boosted():
    import lightgbm

    return BoostedLikelihoodRegressor(lightgbm.LGBMRegressor(n_estimators=10, n_jobs=1, verbose=-1),
                                      family="poisson")


@pytest.mark.parametrize("make", [linear, boosted], ids=["linear", "boosted"])
def test_score_takes_the_offset(make):
    X, y, off = exposure_data()
    est = make().fit(X, y, offset=off)
    from lossfam.sklearn import d2_score

    # reference: D^2 of the offset-aware predictions
    assert est.score(X, y, offset=off) == pytest.approx(d2_score(y, est.predict(X, offset=off), "poisson"))
    assert est.score(X, y, offset=off) != pytest.approx(est.score(X, y, offset=np.zeros_like(off)))


def test_grid_search_routes_offsets_to_fit_score_and_scorer(routing):
    X, y, off = exposure_data()
    cv = KFold(3, shuffle=True, random_state=0)
    est = linear().set_fit_request(offset=True).set_score_request(offset=True)
    grid = {"alpha": [0.0, 0.5]}
    by_score = GridSearchCV(est, grid, cv=cv).fit(X, y, offset=off)
    sc = scorer("poisson").set_score_request(offset=True)
    by_scorer = GridSearchCV(est, grid, cv=cv, scoring=sc).fit(X, y, offset=off)
    for alpha_index, alpha in enumerate(grid["alpha"]):
        d2s, nlls = [], []
        for tr, te in cv.split(X):
            m = LikelihoodRegressor(family="poisson", alpha=alpha).fit(X[tr], y[tr], offset=off[tr])
            d2s.append(m.score(X[te], y[te], offset=off[te]))
            nlls.append(scorer("poisson")(m, X[te], y[te], offset=off[te]))
        np.testing.assert_allclose(by_score.cv_results_["mean_test_score"][alpha_index], np.mean(d2s), rtol=1e-10)
        np.testing.assert_allclose(by_scorer.cv_results_["mean_test_score"][alpha_index], np.mean(nlls), rtol=1e-10)
    # the final refit used the offset too
    ref = LikelihoodRegressor(family="poisson", alpha=by_score.best_params_["alpha"]).fit(X, y, offset=off)
    np.testing.assert_allclose(by_score.best_estimator_.coef_, ref.coef_, rtol=1e-10)


def test_cross_val_score_with_scorer_and_sample_weight(routing):
    X, y, off = exposure_data()
    w = np.random.default_rng(1).uniform(0.5, 2.0, y.size)
    cv = KFold(4)
    est = linear().set_fit_request(offset=True, sample_weight=True)
    sc = scorer("poisson", "deviance").set_score_request(offset=True, sample_weight=True)
    got = cross_val_score(est, X, y, cv=cv, scoring=sc, params={"offset": off, "sample_weight": w})
    want = []
    for tr, te in cv.split(X):
        m = linear().fit(X[tr], y[tr], offset=off[tr], sample_weight=w[tr])
        want.append(sc(m, X[te], y[te], offset=off[te], sample_weight=w[te]))
    np.testing.assert_allclose(got, want, rtol=1e-10)


def test_cross_val_predict_routes_offsets_to_fit(routing):
    # scikit-learn's cross_val_predict routes metadata to fit only (as it does sample_weight; its
    # prediction call takes X alone), so out-of-fold predictions come without the test rows'
    # offsets: add them on the link scale (log link: multiply by exp(offset); a classifier's
    # method="decision_function" gives the raw score)
    X, y, off = exposure_data()
    cv = KFold(3)
    est = linear().set_fit_request(offset=True)
    pred = cross_val_predict(est, X, y, cv=cv, params={"offset": off})
    want = np.empty_like(y)
    for tr, te in cv.split(X):
        want[te] = linear().fit(X[tr], y[tr], offset=off[tr]).predict(X[te], offset=off[te])
    np.testing.assert_allclose(pred * np.exp(off), want, rtol=1e-10)
    clf = LikelihoodClassifier().set_fit_request(offset=True)
    yb = (y > 0).astype(int)
    score = cross_val_predict(clf, X, yb, cv=cv, params={"offset": off}, method="decision_function")
    for tr, te in cv.split(X):
        ref = LikelihoodClassifier().fit(X[tr], yb[tr], offset=off[tr]).predict_proba(X[te], offset=off[te])
        np.testing.assert_allclose(1.0 / (1.0 + np.exp(-(score[te] + off[te]))), ref[:, 1], rtol=1e-10)


def test_pipeline_score_routes_or_refuses_the_offset(routing):
    X, y, off = exposure_data()
    est = linear().set_fit_request(offset=True).set_score_request(offset=True)
    pipe = make_pipeline(StandardScaler(), est).fit(X, y, offset=off)
    Z = pipe[0].transform(X)
    assert pipe.score(X, y, offset=off) == pytest.approx(pipe[-1].score(Z, y, offset=off), rel=1e-12)
    # not requested: scikit-learn refuses rather than dropping it
    unrequested = make_pipeline(StandardScaler(), linear().set_fit_request(offset=True)).fit(X, y, offset=off)
    with pytest.raises(UnsetMetadataPassedError, match="offset"):
        unrequested.score(X, y, offset=off)


def test_scoring_a_model_fitted_with_an_offset_without_one_warns():
    # without metadata routing Pipeline.score drops extra arguments (scikit-learn's behaviour):
    # the estimator then sees no offset and says so
    X, y, off = exposure_data()
    pipe = make_pipeline(StandardScaler(), linear()).fit(X, y, likelihoodregressor__offset=off)
    with pytest.warns(UserWarning, match="fitted with an offset but is scored without one"):
        pipe.score(X, y)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        linear().fit(X, y).score(X, y)


def test_scorer_refuses_an_offset_it_cannot_use():
    from sklearn.linear_model import PoissonRegressor

    X, y, off = exposure_data()
    with pytest.raises(ValueError, match="an offset was given but PoissonRegressor has no raw score"):
        scorer("poisson")(PoissonRegressor().fit(X, y), X, y, offset=off)
    with pytest.raises(TypeError, match="unexpected argument 'exposure'"):
        scorer("poisson").set_score_request(exposure=True)


def _yes_no_with_exposure(n=400, seed=3):
    # demo scenario: whether a delivery van reports a breakdown, over observation windows of varying length
    rng = np.random.default_rng(seed)
    X = rng.standard_normal((n, 2))
    offset = np.log(rng.uniform(0.1, 4.0, n))
    y = (rng.uniform(size=n) < 1.0 / (1.0 + np.exp(-(offset + 0.8 * X[:, 0])))).astype(float)
    return X, y, offset


def _linear_classifier():
    return LikelihoodClassifier()


def _boosted_classifier():
    import lightgbm

    from lossfam.sklearn import BoostedLikelihoodClassifier

    return BoostedLikelihoodClassifier(lightgbm.LGBMRegressor(n_estimators=20, n_jobs=1, verbose=-1))


@pytest.mark.parametrize("make", [_linear_classifier, _boosted_classifier], ids=["linear", "boosted"])
def test_classifier_score_takes_the_offset(make):
    from sklearn.metrics import accuracy_score

    X, y, off = _yes_no_with_exposure()
    est = make().fit(X, y, offset=off)
    # reference: scikit-learn's accuracy of the offset-aware predictions
    assert est.score(X, y, offset=off) == accuracy_score(y, est.predict(X, offset=off))
    assert est.score(X, y, offset=off) != est.score(X, y, offset=np.zeros_like(off))
    with pytest.warns(UserWarning, match="fitted with an offset but is scored without"):
        est.score(X, y)
