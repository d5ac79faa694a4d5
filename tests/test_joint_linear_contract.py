"""JointLikelihoodRegressor for every registered several-score family and a user-registered one.

Parametrised over ``lossfam.available(scores="several")`` (the multinomial family, whose raw
scores are identified only up to a shift, has its own classifier): targets drawn from the
family's law with raw scores linear in two features; the fit must converge without a warning, be
stationary (the gradient of the mean nll through the design vanishes; for a kinked location, in
the scale's coefficients) and recover the coefficients."""
import dataclasses
import warnings

import numpy as np
import pytest
from scipy import integrate, stats
from scipy.special import expit, log_expit

import lossfam
from lossfam._checks import REAL
from lossfam.links import IDENTITY, LOG
from lossfam.sklearn import JointLikelihoodRegressor

# E[q z^2 + t z] under the standard logistic law (q = 2 expit(z) expit(-z), t = tanh(z / 2)): the
# Fisher information of the log scale, by numerical integration (not recalled)
_F11 = integrate.quad(lambda z: stats.logistic.pdf(z) * (2 * expit(z) * expit(-z) * z * z + np.tanh(z / 2) * z),
                      -60, 60, epsabs=1e-13)[0]


@dataclasses.dataclass(frozen=True)
class LogisticSpread(lossfam.SeveralScoreFamily):
    """A user family: logistic errors with a log scale per row, z = (y - r0) e^{-r1},
    nll = -log_expit(z) - log_expit(-z) + r1; with t = tanh(z / 2) = d nll / dz and
    q = dt/dz = 2 expit(z) expit(-z): gradient (-t e^{-r1}, 1 - t z); Hessian
    [[q e^{-2 r1}, (q z + t) e^{-r1}], [., q z^2 + t z]]; Fisher diag(e^{-2 r1} / 3, F11)
    (E q = 1/3; the off-diagonal term is odd in z)."""

    name = "logistic_spread_test"
    score_names = ("location", "log_scale")
    links = (IDENTITY, LOG)
    target_domain = REAL

    def _z(self, y, raw):
        return (y - raw[:, 0]) * np.exp(-raw[:, 1])

    def _nll(self, y, raw):
        z = self._z(y, raw)
        return -log_expit(z) - log_expit(-z) + raw[:, 1]

    def _gradient(self, y, raw):
        z, e = self._z(y, raw), np.exp(-raw[:, 1])
        t = np.tanh(z / 2)
        return np.column_stack([-t * e, 1.0 - t * z])

    def _hessian(self, y, raw):
        z, e = self._z(y, raw), np.exp(-raw[:, 1])
        t, q = np.tanh(z / 2), 2 * expit(z) * expit(-z)
        h = np.empty((y.shape[0], 2, 2))
        h[:, 0, 0] = q * e * e
        h[:, 0, 1] = h[:, 1, 0] = (q * z + t) * e
        h[:, 1, 1] = q * z * z + t * z
        return h

    def _fisher(self, raw):
        e = np.exp(-raw[:, 1])
        f = np.zeros((raw.shape[0], 2, 2))
        f[:, 0, 0] = e * e / 3.0
        f[:, 1, 1] = _F11
        return f

    def _distribution(self, raw):
        return stats.logistic(loc=raw[:, 0], scale=np.exp(raw[:, 1]))


@pytest.fixture(scope="module")
def user_family():
    lossfam.register(LogisticSpread)
    yield LogisticSpread.name
    lossfam.unregister(LogisticSpread.name)


NAMES = [n for n in lossfam.available(scores="several")
         if not getattr(lossfam.family(n), "raw_shift_invariant", False)] + ["user"]


def test_the_user_family_derivatives(user_family, rng):
    fam = lossfam.family(user_family)
    raw = rng.normal(0.0, 0.5, size=(30, 2))
    y = fam.sample(raw, 1)
    eps = 1e-6
    for j in range(2):
        step = np.zeros(2)
        step[j] = eps
        np.testing.assert_allclose(fam.gradient(y, raw)[:, j],
                                   (fam.nll(y, raw + step) - fam.nll(y, raw - step)) / (2 * eps), rtol=1e-6, atol=1e-7)
        np.testing.assert_allclose(fam.hessian(y, raw)[:, :, j],
                                   (fam.gradient(y, raw + step) - fam.gradient(y, raw - step)) / (2 * eps),
                                   rtol=1e-5, atol=1e-6)
    np.testing.assert_allclose(fam.nll(y, raw), -fam.distribution(raw).logpdf(y), rtol=1e-12)


@pytest.mark.parametrize("name", NAMES)
def test_fit_is_stationary_and_recovers_the_coefficients(name, request, rng):
    if name == "user":
        name = request.getfixturevalue("user_family")
    fam = lossfam.family(name)
    n = 4000
    X = rng.uniform(-1.0, 1.0, size=(n, 2))
    true = np.array([[0.5, -0.4], [0.6, 0.0]])  # location: both features; scale: the first only
    icpt = np.array([1.0, -0.5])
    raw = X @ true.T + icpt
    y = fam.sample(raw, 7)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        m = JointLikelihoodRegressor(fam).fit(X, y)
    g = fam.gradient(y, m.predict_raw(X)) / n
    Z = np.column_stack([X, np.ones(n)])
    scores = range(1, fam.n_scores) if fam.kinked_scores else range(fam.n_scores)
    for j in scores:
        np.testing.assert_allclose(Z.T @ g[:, j], 0.0, atol=1e-7, err_msg=f"{name}: raw score {j}")
    # recovery within 5 standard errors of maximum likelihood (the inverse expected information
    # at the fit: a sampling bound, not a fixed number, since a dispersion's coefficient is far
    # noisier than a mean's); the standard errors themselves must be small at n = 4000
    F = fam.fisher(m.predict_raw(X))
    info = np.einsum("ijl,ia,ib->jalb", F, Z, Z).reshape(fam.n_scores * 3, fam.n_scores * 3)
    se = np.sqrt(np.diag(np.linalg.inv(info))).reshape(fam.n_scores, 3)
    assert se.max() < 0.1, (name, se)
    est = np.column_stack([m.coef_, m.intercept_])
    want = np.column_stack([true, icpt])
    assert np.all(np.abs(est - want) <= 5 * se), (name, est, want, se)


def test_user_family_in_the_ranking(user_family, rng):
    n = 2000
    X = rng.uniform(0.0, 1.0, size=(n, 1))
    y = stats.logistic.rvs(loc=1.0 + X[:, 0], scale=np.exp(-1.0 + 2.0 * X[:, 0]), random_state=rng)
    rows = lossfam.rank_families(X, y, families=["gaussian", user_family, "gaussian_spread"], folds=3,
                                 as_frame=False)
    assert rows[0]["family"] == user_family and all(r["status"] == "ok" for r in rows)
