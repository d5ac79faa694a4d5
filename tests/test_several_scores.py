"""Families with several raw scores per row: finite differences and scipy.stats, for every one.

Parametrised over ``lossfam.available(scores="several")``: a family added to the registry is
checked here without a new test."""
import warnings

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy import stats

import lossfam
from lossfam.families._several import CURVATURES

SEVERAL = lossfam.available(scores="several")


def _rows(fam, rng, n=40):
    """Targets drawn from the family's own law at random raw scores (so every formula is exercised
    at typical rows), plus the raw scores."""
    raw = rng.normal(0.0, 0.5, size=(n, fam.n_scores))
    return fam.sample(raw, rng), raw


def _scipy_logp(fam, law, y):
    """log density / mass of y under the frozen scipy law (class labels one-hot for the multinomial)."""
    if type(law).__name__ == "multinomial_frozen":
        return law.logpmf(np.eye(fam.n_scores)[y.astype(int)])
    return law.logpmf(y) if fam.discrete else law.logpdf(y)


@pytest.mark.parametrize("name", SEVERAL)
def test_gradient_and_hessian_match_finite_differences(name, rng):
    fam = lossfam.family(name)
    y, raw = _rows(fam, rng)
    g = fam.gradient(y, raw)
    h = fam.hessian(y, raw)
    eps = 1e-6
    for j in range(fam.n_scores):
        step = np.zeros(fam.n_scores)
        step[j] = eps
        num_g = (fam.nll(y, raw + step) - fam.nll(y, raw - step)) / (2 * eps)
        np.testing.assert_allclose(g[:, j], num_g, rtol=1e-6, atol=1e-6)
        num_h = (fam.gradient(y, raw + step) - fam.gradient(y, raw - step)) / (2 * eps)
        np.testing.assert_allclose(h[:, :, j], num_h, rtol=1e-5, atol=1e-6)
    np.testing.assert_allclose(h, np.swapaxes(h, 1, 2))


@pytest.mark.parametrize("name", SEVERAL)
def test_nll_is_minus_the_scipy_log_density(name, rng):
    # outside reference: the scipy.stats density (or mass) of the family's law, row by row
    fam = lossfam.family(name)
    y, raw = _rows(fam, rng)
    logp = _scipy_logp(fam, fam.distribution(raw), y)
    np.testing.assert_allclose(fam.nll(y, raw), -logp, rtol=1e-10, atol=1e-12)


@pytest.mark.parametrize("name", SEVERAL)
def test_fisher_is_the_variance_of_the_score(name, rng):
    # Monte Carlo over the family's own law at three fixed rows: E_y[g g^T] -> fisher (the
    # information identity; unlike E_y[hessian] it also holds where the nll has a kink)
    fam = lossfam.family(name)
    raw = rng.normal(0.0, 0.3, size=(3, fam.n_scores))
    m = 200_000
    rep = np.repeat(raw, m, axis=0)
    y = fam.sample(rep, rng)
    g = fam.gradient(y, rep).reshape(3, m, fam.n_scores)
    mc = np.einsum("rmi,rmj->rij", g, g) / m
    f = fam.fisher(raw)
    np.testing.assert_allclose(mc, f, rtol=0.03, atol=0.03 * np.abs(f).max())
    eig = np.linalg.eigvalsh(f)
    if fam.raw_shift_invariant:  # singular along (1, ..., 1) only
        np.testing.assert_allclose(f @ np.ones(fam.n_scores), 0.0, atol=1e-12)
        assert np.all(eig[:, 0] > -1e-12) and np.all(eig[:, 1:] > 0)
    else:
        assert np.all(eig > 0)


@pytest.mark.parametrize("name", SEVERAL)
@pytest.mark.parametrize("curvature", ["newton", "fisher", "natural"])
def test_engine_curvature_is_positive_and_weights_scale(name, curvature, rng):
    fam = lossfam.family(name)
    y, raw = _rows(fam, rng)
    g, d = fam.grad_hess(y, raw, curvature=curvature)
    assert g.shape == d.shape == raw.shape and np.all(d > 0) and np.isfinite(g).all()
    w = rng.uniform(0.5, 2.0, size=y.shape[0])
    gw, dw = fam.grad_hess(y, raw, w, curvature=curvature)
    np.testing.assert_allclose(gw, g * w[:, None])
    np.testing.assert_allclose(dw, d * w[:, None])


def _assert_stationary(fam, y, w, c, offset):
    """The weighted mean nll is stationary at the constant c (+ offset): its gradient is 0 in the
    smooth columns; in a column with a kink (``kinked_scores``), where a minimiser only brackets 0
    between the one-sided derivatives, the nll rises (to rounding) a step away on either side."""
    raw = np.tile(c, (y.shape[0], 1)) + offset
    grad = w @ fam.gradient(y, raw) / w.sum()
    smooth = [j for j in range(fam.n_scores) if j not in fam.kinked_scores]
    np.testing.assert_allclose(grad[smooth], 0.0, atol=1e-6)
    f0 = w @ fam.nll(y, raw) / w.sum()
    for j in fam.kinked_scores:
        for step in (1e-7, -1e-7):
            moved = raw.copy()
            moved[:, j] += step
            assert w @ fam.nll(y, moved) / w.sum() >= f0 - 1e-12, (fam.name, j, step)


@pytest.mark.parametrize("name", SEVERAL)
def test_baseline_minimises_the_weighted_nll(name, rng):
    fam = lossfam.family(name)
    y, _ = _rows(fam, rng, n=300)
    w = rng.uniform(0.2, 3.0, size=y.shape[0])
    c = fam.baseline(y, w)
    _assert_stationary(fam, y, w, c, 0.0)
    # an offset on the location column moves the location baseline by its (constant) value
    c_off = fam.baseline(y, w, offset=np.full(y.shape[0], 0.25))
    _assert_stationary(fam, y, w, c_off, np.column_stack(
        [np.full(y.shape[0], 0.25)] + [np.zeros(y.shape[0])] * (fam.n_scores - 1)))


@pytest.mark.parametrize("name", SEVERAL)
def test_natural_gradient_solves_the_fisher_system(name, rng):
    fam = lossfam.family(name)
    y, raw = _rows(fam, rng)
    g = fam.gradient(y, raw)
    nat, ones = fam.grad_hess(y, raw, curvature="natural")
    np.testing.assert_allclose(ones, 1.0)
    np.testing.assert_allclose(np.einsum("nij,nj->ni", fam.fisher(raw), nat), g, rtol=1e-8, atol=1e-10)
    _, diag = fam.grad_hess(y, raw, curvature="fisher")
    np.testing.assert_allclose(diag, np.diagonal(fam.fisher(raw), axis1=1, axis2=2), rtol=1e-12)


@pytest.mark.parametrize("name", SEVERAL)
def test_sample_follows_the_law(name, rng):
    # the mean of many draws at one row against the law's mean (a law with a finite variance)
    fam = lossfam.family(name)
    raw = np.tile(rng.normal(0.0, 0.3, size=fam.n_scores), (100_000, 1))
    y = fam.sample(raw, rng)
    if fam.raw_shift_invariant:
        freq = np.bincount(y.astype(int), minlength=fam.n_scores) / y.size
        np.testing.assert_allclose(freq, fam.parameters(raw[:1])[0], atol=0.006)
    else:
        law = fam.distribution(raw[:1])
        assert abs(y.mean() - law.mean()[0]) < 5 * law.std()[0] / np.sqrt(y.size)


def test_gaussian_spread_baseline_is_the_mean_and_ml_sd(rng):
    # closed form: the Gaussian MLE is the mean and the 1/n standard deviation
    y = rng.normal(3.0, 2.0, size=500)
    c = lossfam.family("gaussian_spread").baseline(y)
    np.testing.assert_allclose(c, [y.mean(), np.log(y.std())], rtol=1e-12)


def test_multinomial_matches_log_loss_and_class_shares(rng):
    # outside reference: scikit-learn's log_loss on softmax probabilities
    from sklearn.metrics import log_loss
    fam = lossfam.family("multinomial", n_classes=4)
    raw = rng.normal(size=(200, 4))
    y = fam.sample(raw, rng)
    p = fam.parameters(raw)
    np.testing.assert_allclose(fam.nll(y, raw).mean(), log_loss(y, p, labels=range(4)), rtol=1e-12)
    # adding a constant per row changes nothing
    np.testing.assert_allclose(fam.nll(y, raw + rng.normal(size=(200, 1)) * 50), fam.nll(y, raw), rtol=1e-10)
    # the baseline: centred log class shares (weighted)
    w = rng.uniform(0.5, 2.0, size=200)
    share = np.bincount(y.astype(int), weights=w, minlength=4) / w.sum()
    c = fam.baseline(y, w)
    np.testing.assert_allclose(c, np.log(share) - np.log(share).mean(), rtol=1e-12)
    with pytest.raises(ValueError, match=r"class\(es\) \[3\]"):
        fam.baseline(np.array([0.0, 1.0, 2.0, 1.0]))
    with pytest.raises(ValueError, match=r"below n_classes=4; 1 row\(s\) are not \(rows \[1\]"):
        fam.nll(np.array([0.0, 4.0]), np.zeros((2, 4)))
    with pytest.raises(ValueError, match="class label"):
        fam.nll(np.array([0.5, 1.0]), np.zeros((2, 4)))
    with pytest.raises(ValueError, match="n_classes must be an integer >= 2"):
        lossfam.family("multinomial", n_classes=1)


def test_multinomial_far_raw_scores_stay_finite():
    fam = lossfam.family("multinomial", n_classes=3)
    raw = np.array([[800.0, -800.0, 0.0], [-800.0, 800.0, 0.0]])
    y = np.array([1.0, 1.0])
    nll = fam.nll(y, raw)
    np.testing.assert_allclose(nll, [1600.0, 0.0], atol=1e-12)
    for curv in ("newton", "fisher", "natural"):
        g, d = fam.grad_hess(y, raw, curvature=curv)
        assert np.isfinite(g).all() and np.all(d > 0)


def test_bad_raw_shapes_and_rows_are_named():
    fam = lossfam.family("gaussian_spread")
    y = np.array([1.0, 2.0, 3.0])
    with pytest.raises(ValueError, match=r"shape \(n, 2\)"):
        fam.nll(y, np.zeros(3))
    raw = np.zeros((3, 2))
    raw[1, 1] = np.nan
    with pytest.raises(ValueError, match=r"rows \[1\]"):
        fam.nll(y, raw)
    with pytest.raises(ValueError, match="curvature"):
        fam.grad_hess(y, np.zeros((3, 2)), curvature="exact")
    with pytest.raises(ValueError, match="scale is 0"):
        fam.baseline(np.full(4, 2.0))


# ---------------------------------------------------------------------- the whole range of legal input
# Raw scores anywhere a boosting run or a user may put them (log-scale scores to +-1e4, identity-link
# locations over all of float64, softmax scores to +-1e4) and targets anywhere in the family's
# domain: nothing may come back NaN or raise a NumPy warning; +-inf only where the exact value is
# beyond float64 (each family's module docstring says where); and on rows whose parameters and
# targets lie within 1e-50 .. 1e50 in magnitude every output is finite.
FAST = settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow], derandomize=True)
LOG_EDGES = [-1e4, -1e3, -800.0, -746.0, -745.0, -710.0, -709.0, -373.0, -40.0, 0.0, 40.0, 373.0, 709.0,
             710.0, 745.0, 800.0, 1e3, 1e4]
BAND = 1e50


def _score(link):
    """One raw-score column: a log-link (or softmax) score to +-1e4, an identity-link one anywhere."""
    wide = st.one_of(st.sampled_from(LOG_EDGES), st.floats(-1e4, 1e4), st.floats(-3.0, 3.0))
    if link is lossfam.links.IDENTITY:
        return st.one_of(wide, st.floats(allow_nan=False, allow_infinity=False),
                         st.sampled_from([-1.7e308, -1e200, 1e200, 1.7e308]))
    return wide


def _targets(fam):
    if fam.raw_shift_invariant:
        return st.integers(0, fam.n_scores - 1).map(float)
    rule = (fam.nll_domain or fam.target_domain).rule
    if rule == "a non-negative integer":
        return st.one_of(st.integers(0, 50).map(float), st.floats(0, 1.7e308).map(np.floor),
                         st.sampled_from([1e15, 1e300]))
    if rule.startswith("finite and > 0"):
        return st.one_of(st.floats(5e-324, 1.7e308), st.floats(0.1, 10.0), st.sampled_from([5e-324, 1e-300, 1e300]))
    return st.one_of(st.floats(allow_nan=False, allow_infinity=False), st.floats(-10.0, 10.0),
                     st.sampled_from([0.0, -1.7e308, 1.7e308, 1e-300]))


def _fixed_params(name):
    """The family with its fixed parameters drawn within their domains (default where none)."""
    fam = lossfam.family(name)
    draws = {"quantile": st.floats(1e-3, 1 - 1e-3), "df": st.sampled_from([0.5, 1.0, 4.0, 30.0, 1e6]),
             "n_classes": st.integers(2, 5)}
    fields = [f for f in fam.params if f in draws]
    return st.fixed_dictionaries({f: draws[f] for f in fields}).map(lambda p: fam.with_params(**p) if p else fam)


@st.composite
def _wide_case(draw, name, n_max=6):
    fam = draw(_fixed_params(name))
    n = draw(st.integers(1, n_max))
    links = fam.links or (None,) * fam.n_scores
    raw = np.array([[draw(_score(link)) for link in links] for _ in range(n)])
    y = np.array([draw(_targets(fam)) for _ in range(n)])
    w = np.array([draw(st.floats(0.1, 10.0)) for _ in range(n)])
    return fam, y, raw, w


def _in_band(fam, y, raw):
    """Rows whose parameters and targets all lie within 1e-50 .. 1e50 in magnitude."""
    ok = np.ones(y.shape[0], dtype=bool)
    for j in range(fam.n_scores):
        link = fam.links[j] if fam.links else None
        bound = BAND if link is lossfam.links.IDENTITY else np.log(BAND)
        ok &= np.abs(raw[:, j]) <= bound
    if not fam.raw_shift_invariant:
        ok &= (np.abs(y) <= BAND) & ((y == 0) | (np.abs(y) >= 1 / BAND))
    return ok


def _check_wide(fam, y, raw, w):
    band = _in_band(fam, y, raw)
    outs = {}
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        outs["nll"] = fam.nll(y, raw)
        outs["gradient"] = fam.gradient(y, raw, w)
        outs["hessian"] = fam.hessian(y, raw, w)
        outs["fisher"] = fam.fisher(raw, w)
        outs["parameters"] = fam.parameters(raw)
        outs["location"] = fam.location(raw)
        for curvature in CURVATURES:
            g, d = fam.grad_hess(y, raw, w, curvature=curvature)
            outs[f"{curvature} gradient"], outs[f"{curvature} curvature"] = g, d
            assert np.all(d >= 0), (fam, curvature, y, raw, d)
            assert np.all(d[band] > 0), (fam, curvature, y, raw, d)
        for what, a in outs.items():
            assert not np.isnan(a).any(), (fam, what, y, raw, a)
            assert np.isfinite(a[band]).all(), (fam, what, y[band], raw[band], a[band])
        assert np.all(outs["nll"] > -np.inf), (fam, y, raw)
        for offset in (None, raw):
            try:
                c = fam.baseline(y, w, offset=offset)
            except ValueError:
                continue
            assert np.isfinite(c).all(), (fam, y, offset, c)


@pytest.mark.parametrize("name", SEVERAL)
def test_legal_input_anywhere_gives_no_nan(name):
    FAST(given(_wide_case(name))(lambda c: _check_wide(*c)))()
