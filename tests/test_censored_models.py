"""Censored targets in the models: linear fits (Tobit, accelerated failure time) against direct
maximisation, both engines trained on censored rows, XGBoost's survival:aft parity, and simulated
right-censored durations where the censored likelihood recovers the median and dropping rows does not.

Outside references: scipy.optimize on likelihoods written from scipy.stats; XGBoost's built-in
survival:aft objective.
"""
import numpy as np
import pytest
from scipy import optimize, stats

import lossfam
from lossfam.censoring import interval_target, right_censored

ENGINES = ["lightgbm", "xgboost"]


def _adapter(engine):
    pytest.importorskip(engine)
    if engine == "lightgbm":
        import lossfam.lightgbm as mod
    else:
        import lossfam.xgboost as mod
    return mod


# ---------------------------------------------------------------------------- linear fits
def test_tobit_matches_direct_maximisation(rng):
    # gaussian left-censored at 0 (a detection limit): the Tobit likelihood written from
    # scipy.stats.norm (logpdf for observed rows, logcdf at the limit for censored ones),
    # maximised by scipy.optimize over (intercept, coef, log sigma)
    sk = pytest.importorskip("lossfam.sklearn")
    n = 600
    X = rng.normal(size=(n, 2))
    ystar = 0.4 + X @ [1.0, -0.6] + 1.3 * rng.normal(size=n)
    seen = ystar > 0
    t = interval_target(np.where(seen, ystar, -np.inf), np.where(seen, ystar, 0.0))
    m = sk.LikelihoodRegressor("gaussian").fit(X, t)

    def nll(p):
        mu, s = p[0] + X @ p[1:3], np.exp(p[3])
        return -np.sum(np.where(seen, stats.norm.logpdf(ystar, mu, s), stats.norm.logcdf(0.0, mu, s)))

    ref = optimize.minimize(nll, np.zeros(4), method="BFGS", options={"gtol": 1e-9}).x
    assert np.allclose(m.coef_, ref[1:3], atol=1e-6) and m.intercept_ == pytest.approx(ref[0], abs=1e-6)
    assert m.family_.scale == pytest.approx(np.exp(ref[3]), rel=1e-6)
    assert 0.25 < t.censored_fraction < 0.5


@pytest.mark.parametrize("name", ["weibull", "lognormal"])
def test_aft_with_right_censoring_matches_direct_maximisation(rng, name):
    # accelerated failure time: log T = x.b + noise; the likelihood from scipy.stats (logpdf of
    # observed times, logsf at the censoring time), maximised by scipy.optimize
    sk = pytest.importorskip("lossfam.sklearn")
    n = 600
    X = rng.normal(size=(n, 2))
    eta = 1.0 + X @ [0.5, -0.3]
    T = np.exp(eta) * (rng.weibull(1.6, n) if name == "weibull" else np.exp(0.7 * rng.normal(size=n)))
    C = rng.exponential(np.exp(1.8), n)
    event = T <= C
    time = np.minimum(T, C)
    m = sk.LikelihoodRegressor(name).fit(X, right_censored(time, event))

    def nll(p):
        scale, s = np.exp(p[0] + X @ p[1:3]), np.exp(p[3])
        law = stats.weibull_min(s, scale=scale) if name == "weibull" else stats.lognorm(s, scale=scale)
        return -np.sum(np.where(event, law.logpdf(time), law.logsf(time)))

    ref = optimize.minimize(nll, np.array([1.0, 0.0, 0.0, 0.0]), method="BFGS", options={"gtol": 1e-9}).x
    assert np.allclose(m.coef_, ref[1:3], atol=1e-6) and m.intercept_ == pytest.approx(ref[0], abs=1e-6)
    nuisance = m.family_.shape if name == "weibull" else m.family_.scale
    assert nuisance == pytest.approx(np.exp(ref[3]), rel=1e-6)
    assert 0.15 < 1 - event.mean() < 0.6


@pytest.mark.parametrize("name", ["laplace", "student_t"])
def test_surrogate_hessian_families_fit_censored_rows_by_direct_minimisation(name):
    # laplace (a kink at every exact row) and student_t (not convex): right-, left- and
    # interval-censored rows; the likelihood written from scipy.stats (logpdf, logsf, logcdf, and
    # the difference of cdfs) maximised over (intercept, coef, log scale) by scipy.optimize
    # (Powell, then Nelder-Mead restarts each followed by a Brent search in the log scale)
    sk = pytest.importorskip("lossfam.sklearn")
    rng = np.random.default_rng(11)
    n = 400
    X = rng.normal(size=(n, 2))
    mu = 0.5 + X @ [1.0, -0.7]
    ys = mu + (0.8 * rng.laplace(size=n) if name == "laplace" else 0.9 * rng.standard_t(4.0, size=n))
    kind = rng.integers(0, 4, n)  # 0 exact, 1 right-censored at c, 2 left-censored at c, 3 in a unit cell
    c = rng.uniform(-0.5, 2.0, n)
    right, left = (kind == 1) & (ys > c), (kind == 2) & (ys < c)
    cell = kind == 3
    lo = np.where(right, c, np.where(left, -np.inf, np.where(cell, np.floor(ys), ys)))
    hi = np.where(right, np.inf, np.where(left, c, np.where(cell, np.floor(ys) + 1.0, ys)))
    t = interval_target(lo, hi)
    m = sk.LikelihoodRegressor(name).fit(X, t)
    exact, closed = lo == hi, np.isfinite(lo) & np.isfinite(hi) & (lo < hi)
    a, b = np.where(np.isfinite(lo), lo, 0.0), np.where(np.isfinite(hi), hi, 0.0)

    def nll(p):
        loc, s = p[0] + X @ p[1:3], np.exp(p[3])
        law = stats.laplace(loc, s) if name == "laplace" else stats.t(4.0, loc, s)
        with np.errstate(divide="ignore", invalid="ignore"):
            ll = np.where(exact, law.logpdf(a), np.where(closed, np.log(law.cdf(b) - law.cdf(a)),
                                                         np.where(np.isfinite(lo), law.logsf(a), law.logcdf(b))))
        return -np.sum(ll)

    ref = optimize.minimize(nll, np.zeros(4), method="Powell", options={"xtol": 1e-12, "ftol": 1e-15}).x
    for _ in range(2):
        ref = optimize.minimize(nll, ref, method="Nelder-Mead",
                                options={"xatol": 1e-11, "fatol": 1e-14, "maxfev": 4000}).x
        ref[3] = optimize.minimize_scalar(lambda ls: nll(np.r_[ref[:3], ls]), bracket=(ref[3] - 0.01, ref[3] + 0.01),
                                          tol=1e-12).x
    assert np.allclose(m.coef_, ref[1:3], atol=1e-6) and m.intercept_ == pytest.approx(ref[0], abs=1e-6)
    assert m.family_.scale == pytest.approx(np.exp(ref[3]), rel=1e-6)
    ours = np.r_[m.intercept_, m.coef_, np.log(m.family_.scale)]
    assert nll(ours) <= nll(ref) + 1e-9 * abs(nll(ref))
    assert 0.1 < t.censored_fraction < 0.6 and right.any() and left.any() and cell.any()


def test_exponential_linear_model_without_covariates_is_events_over_time_at_risk(rng):
    # textbook closed form (exponential lifetimes, right-censored, no covariates: rate = events /
    # total time at risk; e.g. Lawless 2003, section 2.2, recalled from memory), through the linear
    # estimator with one all-zero column and the shape held at 1 by a censored-fit-free family
    sk = pytest.importorskip("lossfam.sklearn")
    time = rng.exponential(2.0, 400)
    cut = rng.uniform(0.5, 4.0, 400)
    event = time <= cut
    obs = np.minimum(time, cut)

    from dataclasses import dataclass
    from lossfam.families import Weibull

    @dataclass(frozen=True)
    class Exponential(Weibull):
        name = "exponential_test"
        censored_fit = ()

    m = sk.LikelihoodRegressor(Exponential(shape=1.0)).fit(np.zeros((400, 1)), right_censored(obs, event))
    assert np.exp(-m.intercept_) == pytest.approx(event.sum() / obs.sum(), rel=1e-9)


# ---------------------------------------------------------------------------- engines
def _durations(rng, n, censor_scale):
    X = rng.normal(size=(n, 3))
    eta = 1.0 + 0.6 * X[:, 0] - 0.4 * X[:, 1]
    T = np.exp(eta + 0.5 * rng.normal(size=n))
    C = rng.exponential(censor_scale, n)
    return X, eta, right_censored(np.minimum(T, C), T <= C)


@pytest.mark.parametrize("engine", ENGINES)
@pytest.mark.parametrize("name", ["lognormal", "weibull",
                                  *(pytest.param(n, marks=pytest.mark.slow)
                                    for n in ("gamma", "gaussian", "laplace", "student_t"))])
def test_engines_train_on_censored_rows(rng, engine, name):
    mod = _adapter(engine)
    X, eta, t = _durations(rng, 400, np.exp(1.5))
    if name in ("gaussian", "laplace", "student_t"):  # on log time, a real-valued target
        t = interval_target(np.log(t.lower), np.log(t.upper))
    params = ({"num_leaves": 4, "learning_rate": 0.2, "verbose": -1, "num_threads": 1, "min_data_in_leaf": 5}
              if engine == "lightgbm" else {"max_depth": 2, "eta": 0.2, "nthread": 1})
    data = mod.censored_dataset(X, t) if engine == "lightgbm" else mod.censored_dmatrix(X, t)
    fit = mod.train(name, params, data, 30, **({} if engine == "lightgbm" else {"verbose_eval": False}))
    raw = fit.predict_raw(X)
    fam = fit.fitted_family
    assert np.all(np.isfinite(raw)) and fit.info["objective"] == "custom"
    # the trained model fits the censored likelihood better than its own constant start
    assert fam.nll(t, raw).mean() < fam.nll(t, np.full(t.size, fam.baseline(t))).mean()
    # it ranks rows like the simulated linear predictor
    assert np.corrcoef(raw, eta)[0, 1] > 0.8


@pytest.mark.parametrize("engine", ENGINES)
def test_engine_metric_is_the_censored_nll(rng, engine):
    mod = _adapter(engine)
    X, _, t = _durations(rng, 300, np.exp(1.5))
    fam = lossfam.family("lognormal", scale=0.5)
    if engine == "lightgbm":
        import lightgbm as lgb
        train, valid = mod.censored_dataset(X[:200], t[:200]), mod.censored_dataset(X[200:], t[200:])
        res = {}
        fit = mod.train(fam, {"num_leaves": 4, "verbose": -1, "num_threads": 1, "min_data_in_leaf": 5}, train, 10,
                        valid_sets=[valid], valid_names=["v"], prefit=False,
                        callbacks=[lgb.record_evaluation(res)])
        last = res["v"]["lognormal_nll"][-1]
    else:
        train, valid = mod.censored_dmatrix(X[:200], t[:200]), mod.censored_dmatrix(X[200:], t[200:])
        res = {}
        fit = mod.train(fam, {"max_depth": 2, "nthread": 1}, train, 10, evals=[(valid, "v")], evals_result=res,
                        verbose_eval=False, prefit=False)
        last = res["v"]["lognormal_nll"][-1]
    assert last == pytest.approx(fam.nll(t[200:], fit.predict_raw(X[200:])).mean(), rel=1e-5)


@pytest.mark.parametrize("name,dist", [("lognormal", "normal"), ("weibull", "extreme")])
def test_xgboost_parity_with_survival_aft(rng, name, dist):
    # outside reference: XGBoost's built-in survival:aft at the same error law and scale
    # (normal on log time <-> lognormal; extreme value on log time <-> weibull with k = 1 / scale)
    xgb = pytest.importorskip("xgboost")
    import lossfam.xgboost as lxgb
    n = 4000
    X = rng.normal(size=(n, 5))
    eta = 1.0 + 0.6 * np.sin(X[:, 0]) - 0.4 * X[:, 1] + 0.3 * X[:, 2] * X[:, 3]
    noise = 0.5 * (rng.normal(size=n) if name == "lognormal" else np.log(rng.weibull(2.0, n)) * 2.0)
    T = np.exp(eta + noise)
    C = rng.exponential(np.exp(1.6), n)
    t = right_censored(np.minimum(T, C), T <= C)
    tr, te = slice(0, 3000), slice(3000, None)
    sigma = 0.5
    fam = lossfam.family("lognormal", scale=sigma) if name == "lognormal" else lossfam.family("weibull", shape=1 / sigma)
    p = {"max_depth": 3, "eta": 0.05, "nthread": 1}
    fit = lxgb.train(fam, p, lxgb.censored_dmatrix(X[tr], t[tr]), 200, verbose_eval=False, prefit=False)
    dm = lxgb.censored_dmatrix(X[tr], t[tr])
    q = dict(p, objective="survival:aft", aft_loss_distribution=dist, aft_loss_distribution_scale=sigma,
             base_score=float(np.exp(fam.baseline(t[tr]))))
    booster = xgb.train(q, dm, 200)
    ours = fam.nll(t[te], fit.predict_raw(X[te])).mean()
    theirs = fam.nll(t[te], booster.predict(xgb.DMatrix(X[te]), output_margin=True).astype(np.float64)).mean()
    assert ours <= 1.01 * theirs, (ours, theirs)


def test_distribution_gives_survival_curves_and_quantiles(rng):
    import lossfam.xgboost as lxgb
    pytest.importorskip("xgboost")
    X, _, t = _durations(rng, 300, np.exp(1.5))
    fit = lxgb.train("weibull", {"max_depth": 2, "nthread": 1}, lxgb.censored_dmatrix(X, t), 20, verbose_eval=False)
    law = fit.distribution(X[:5])
    raw, k = fit.predict_raw(X[:5]), fit.fitted_family.shape
    grid = np.array([0.5, 1.0, 3.0])[:, None]
    # survival curve S(t) = exp(-(t / lambda)^k) per row, and the median lambda (log 2)^(1/k)
    assert np.allclose(law.sf(grid), np.exp(-(grid / np.exp(raw)) ** k), rtol=1e-12)
    assert np.allclose(law.median(), np.exp(raw) * np.log(2.0) ** (1 / k), rtol=1e-12)


# ---------------------------------------------------------------------------- simulated durations
def _joint_fit(fam, t):
    """Intercept-only joint maximum likelihood (the profile over log nuisance, the censored
    baseline at each value) and the observed information of (c, log nuisance) by central
    differences of the censored nll."""
    key = fam.censored_fit[0]

    def profile(log_p):
        f2 = fam.with_params(**{key: float(np.exp(log_p))})
        return f2.nll(t, np.full(t.size, f2.baseline(t))).sum()

    log_p = optimize.minimize_scalar(profile, bracket=(-1.0, 1.0), tol=1e-10).x
    fam = fam.with_params(**{key: float(np.exp(log_p))})
    c = fam.baseline(t)
    theta = np.array([c, np.log(fam.params[key])])

    def total(th):
        return fam.with_params(**{key: float(np.exp(th[1]))}).nll(t, np.full(t.size, th[0])).sum()

    eps = 1e-4
    info = np.empty((2, 2))
    for i in range(2):
        for j in range(2):
            ei, ej = np.eye(2)[i] * eps, np.eye(2)[j] * eps
            info[i, j] = (total(theta + ei + ej) - total(theta + ei - ej) - total(theta - ei + ej)
                          + total(theta - ei - ej)) / (4 * eps * eps)
    return fam, theta, np.linalg.inv(info)


def _log_median(name, theta):
    """log median and its gradient in (c, log nuisance)."""
    if name == "lognormal":
        return theta[0], np.array([1.0, 0.0])
    k = np.exp(theta[1])
    return theta[0] + np.log(np.log(2.0)) / k, np.array([1.0, -np.log(np.log(2.0)) / k])


@pytest.mark.parametrize("name", ["lognormal", "weibull"])
@pytest.mark.parametrize("censored", [0.3, 0.6])
def test_censored_likelihood_recovers_the_median_and_dropping_or_plugging_in_does_not(name, censored):
    rng = np.random.default_rng(int(censored * 100) + len(name))
    n = 3000
    if name == "lognormal":
        T = np.exp(1.0 + 0.8 * rng.normal(size=n))
        true_log_median = 1.0
    else:
        T = np.exp(1.0) * rng.weibull(1.5, n)
        true_log_median = 1.0 + np.log(np.log(2.0)) / 1.5
    # independent exponential censoring times, their scale set so that the wanted share is censored
    u = rng.exponential(size=n)
    scale = optimize.brentq(lambda s: np.mean(u * s < T) - censored, 1e-3, 1e4)
    C = u * scale
    event = T <= C
    t = right_censored(np.minimum(T, C), event)
    fam, theta, cov = _joint_fit(lossfam.family(name), t)
    m, grad = _log_median(name, theta)
    se = float(np.sqrt(grad @ cov @ grad))
    assert abs(m - true_log_median) <= 2.58 * se, (m, true_log_median, se)   # inside the 99% band
    # dropping the censored rows keeps the short durations: the median comes out far too low
    kept = right_censored(T[event], np.ones(event.sum()))
    _, theta_d, cov_d = _joint_fit(lossfam.family(name), kept)
    m_d, grad_d = _log_median(name, theta_d)
    assert true_log_median - m_d > 5 * max(se, float(np.sqrt(grad_d @ cov_d @ grad_d)))
    # plugging in the censoring time as if the event had happened then: also far too low
    plugged = right_censored(np.minimum(T, C), np.ones(n))
    _, theta_p, cov_p = _joint_fit(lossfam.family(name), plugged)
    m_p, grad_p = _log_median(name, theta_p)
    assert true_log_median - m_p > 5 * max(se, float(np.sqrt(grad_p @ cov_p @ grad_p)))


# ---------------------------------------------------------------------------- ranking and command line
def _weibull_durations(rng, n=600):
    X = rng.normal(size=(n, 2))
    T = np.exp(1.0 + 0.5 * X[:, 0]) * rng.weibull(1.5, n)
    C = rng.exponential(4.0, n)
    return X, T, C


def test_ranking_scores_censored_targets_by_the_censored_likelihood(rng):
    X, T, C = _weibull_durations(rng, 500)
    t = right_censored(np.minimum(T, C), T <= C)
    rows = lossfam.rank_families(X, t, families=["weibull", "gaussian", "poisson"], folds=3, as_frame=False)
    by = {r["family"]: r for r in rows}
    assert by["poisson"]["status"] == "not applicable" and "no censored likelihood" in by["poisson"]["note"]
    assert rows[0]["family"] == "weibull"                      # the simulated law comes first
    assert by["gaussian"]["behind_best"] > 0.1
    assert abs(by["weibull"]["calibration90"] - 0.9) < 0.05    # randomized PIT over the censoring intervals
    assert "censored rows" in by["weibull"]["scored_by"]


def test_command_line_reads_censored_columns(tmp_path, rng, capsys):
    from lossfam import cli
    X, T, C = _weibull_durations(rng, 200)
    event = (T <= C).astype(int)
    time = np.minimum(T, C)
    path = tmp_path / "durations.csv"
    with open(path, "w") as fh:
        fh.write("x1,x2,time,event,lo,hi\n")
        for (a, b), ti, e in zip(X, time, event):
            fh.write(f"{a},{b},{ti},{e},{ti},{ti if e else 'inf'}\n")
    base = ["rank", str(path), "--folds", "3", "--quiet", "--json", "--families", "weibull,lognormal"]
    assert cli.main(base + ["--target", "time", "--event", "event", "--drop", "lo,hi"]) == 0
    by_event = capsys.readouterr().out
    assert cli.main(base + ["--lower", "lo", "--upper", "hi", "--drop", "time,event"]) == 0
    by_bounds = capsys.readouterr().out
    assert by_event == by_bounds  # the two layouts are the same censored target
    assert cli.main(base + ["--lower", "hi", "--upper", "lo", "--drop", "time,event"]) == 2
    assert "lower bound is +inf" in capsys.readouterr().err
    assert cli.main(base + ["--lower", "lo", "--drop", "time,event"]) == 2
    assert "give --lower and --upper together" in capsys.readouterr().err


def test_survival_aft_matches_the_censored_lognormal_in_the_bulk_but_clips_far_rows():
    # why survival:aft is not declared a native twin: one Newton step of a one-leaf tree (eta 1,
    # lambda 0) equals lossfam's -g/h for rows near the prediction, but not where XGBoost caps the
    # gradient (observed with xgboost 3.2: an exact row 18 sigma away moves by 3.75 = 15 sigma^2)
    xgb = pytest.importorskip("xgboost")
    fam = lossfam.family("lognormal", scale=0.5)

    def xgb_step(lo, hi):
        dm = xgb.DMatrix(np.zeros((1, 1)))
        dm.set_float_info("label_lower_bound", [lo])
        dm.set_float_info("label_upper_bound", [hi])
        p = {"objective": "survival:aft", "aft_loss_distribution": "normal", "aft_loss_distribution_scale": 0.5,
             "base_score": 1.0, "eta": 1.0, "lambda": 0.0, "max_depth": 1, "min_child_weight": 0, "nthread": 1}
        return float(xgb.train(p, dm, 1).predict(dm, output_margin=True)[0])

    def ours(lo, hi):
        g, h = fam.grad_hess(interval_target([lo], [hi]), np.zeros(1))
        return -g[0] / h[0]

    for lo, hi in [(2.0, 2.0), (2.0, np.inf), (0.0, 0.05), (1.0, 1.5)]:
        assert xgb_step(lo, hi) == pytest.approx(ours(lo, hi), rel=1e-6)
    assert xgb_step(1e4, 1e4) < 0.5 * ours(1e4, 1e4)


@pytest.mark.parametrize("engine", ENGINES)
def test_weibull_default_guard_keeps_deep_trees_finite(engine):
    # default engine settings (XGBoost: depth 6, eta 0.3) on 300 rows: the in-sample shape of pass 1
    # is large, and without the family's auto step cap the second pass's first tree stepped to -31
    # on the log scale and the raw scores overflowed (seen before auto_step_limit was declared)
    mod = _adapter(engine)
    rng = np.random.default_rng(0)
    X = rng.normal(size=(300, 2))
    T = np.exp(X[:, 0] + 0.5 * rng.normal(size=300))
    C = rng.exponential(3.0, 300)
    t = right_censored(np.minimum(T, C), T <= C)
    if engine == "xgboost":
        fit = mod.train("weibull", {"nthread": 1}, mod.censored_dmatrix(X, t), 10, verbose_eval=False)
    else:
        fit = mod.train("weibull", {"num_threads": 1, "verbose": -1}, mod.censored_dataset(X, t), 10)
    assert fit.info["step_limit"] == 1.0
    assert np.all(np.isfinite(fit.predict_raw(X)))
    # the fitted model, saved and loaded, predicts the same
    import os
    import tempfile
    path = os.path.join(tempfile.mkdtemp(), "model")
    fit.save(path)
    again = lossfam.load(path)
    assert np.allclose(again.predict_raw(X), fit.predict_raw(X)) and again.fitted_family == fit.fitted_family


# ---------------------------------------------------------------------------- scikit-learn wrappers and scorers
def _sk_engine(engine, rounds=15):
    pytest.importorskip(engine)
    if engine == "lightgbm":
        import lightgbm
        return lightgbm.LGBMRegressor(n_estimators=rounds, num_leaves=4, learning_rate=0.2, min_child_samples=5,
                                      verbose=-1, num_threads=1)
    import xgboost
    return xgboost.XGBRegressor(n_estimators=rounds, max_depth=2, learning_rate=0.2, nthread=1)


@pytest.mark.parametrize("engine", ENGINES)
def test_boosted_wrapper_trains_what_the_engine_trains_on_censored_rows(rng, engine):
    from lossfam.sklearn import BoostedLikelihoodRegressor, mean_nll, scorer

    mod = _adapter(engine)
    X, _, t = _durations(rng, 300, np.exp(1.5))
    est = _sk_engine(engine)
    m = BoostedLikelihoodRegressor(est, "weibull").fit(X[:200], t[:200], eval_set=[(X[200:], t[200:])])
    # the same training through the engine adapter on its censored data container
    params = {k: v for k, v in est.get_params().items() if v is not None}
    if engine == "lightgbm":
        params = {"num_leaves": 4, "learning_rate": 0.2, "min_child_samples": 5, "verbose": -1, "num_threads": 1}
        fit = mod.train("weibull", params, mod.censored_dataset(X[:200], t[:200]), 15)
    else:
        params = {"max_depth": 2, "learning_rate": 0.2, "nthread": 1}
        fit = mod.train("weibull", params, mod.censored_dmatrix(X[:200], t[:200]), 15, verbose_eval=False)
    assert np.allclose(m.predict_raw(X), fit.predict_raw(X), rtol=0, atol=1e-12)
    assert m.family_ == fit.fitted_family
    # the eval-set metric is the held-out censored nll at the training family (float32 rounding aside)
    raw_val = m.predict_raw(X[200:])
    last = list(m.evals_result_["validation_0"].values())[0][-1]
    assert last == pytest.approx(m.model_.family.nll(t[200:], raw_val).mean(), rel=1e-5)
    # the likelihood scorer and mean_nll take the IntervalTarget: the mean censored nll at family_
    ref = m.family_.nll(t[200:], raw_val).mean()
    assert scorer("weibull")(m, X[200:], t[200:]) == pytest.approx(-ref, rel=1e-12)
    assert mean_nll(t[200:], m.predict(X[200:]), m.family_) == pytest.approx(ref, rel=1e-12)


@pytest.mark.parametrize("model", ["linear", "lightgbm", "xgboost"])
def test_cross_validation_with_censored_targets(rng, model):
    # scikit-learn's cross_val_score splits the IntervalTarget like any target; each fold's score is
    # the held-out mean censored nll of a model refitted on the other folds
    from sklearn.base import clone
    from sklearn.model_selection import KFold, cross_val_score

    from lossfam.sklearn import BoostedLikelihoodRegressor, LikelihoodRegressor, scorer

    X, _, t = _durations(rng, 240, np.exp(1.5))
    est = LikelihoodRegressor("weibull") if model == "linear" else BoostedLikelihoodRegressor(_sk_engine(model), "weibull")
    cv = KFold(3)
    got = cross_val_score(est, X, t, cv=cv, scoring=scorer("weibull"), error_score="raise")
    ref = []
    for tr, te in cv.split(X):
        m = clone(est).fit(X[tr], t[tr])
        ref.append(-m.family_.nll(t[te], m.predict_raw(X[te])).mean())
    assert np.allclose(got, ref, rtol=1e-12)


@pytest.mark.parametrize("model", ["linear", "lightgbm"])
def test_score_and_deviance_scorers_refuse_censored_rows_but_take_exact_interval_targets(rng, model):
    from lossfam.sklearn import BoostedLikelihoodRegressor, LikelihoodRegressor, scorer

    X, _, t = _durations(rng, 200, np.exp(1.5))
    est = LikelihoodRegressor("weibull") if model == "linear" else BoostedLikelihoodRegressor(_sk_engine(model), "weibull")
    m = est.fit(X, t)
    with pytest.raises(ValueError, match=r"score: D\^2 rests on the unit deviance, which censored rows do not have "
                                         r"\(\d+ here\); .*scorer\('weibull', 'nll'\)"):
        m.score(X, t)
    with pytest.raises(ValueError, match="unit deviance is not defined for censored rows"):
        scorer("weibull", "d2")(m, X, t)
    exact = t[t.exact]
    Xe = X[t.exact]
    assert m.score(Xe, exact) == m.score(Xe, exact.lower)
    assert scorer("weibull", "deviance")(m, Xe, exact) == scorer("weibull", "deviance")(m, Xe, exact.lower)
