"""A user-defined family shared by the tests: errors with a logistic distribution."""
import dataclasses

import numpy as np
from scipy import stats
from scipy.special import expit, log_expit

import lossfam
from lossfam._checks import POSITIVE, REAL
from lossfam.links import IDENTITY


@dataclasses.dataclass(frozen=True)
class LogisticErrors(lossfam.Family):
    """Logistic errors with scale s: nll = -log_expit(z) - log_expit(-z) + log s, z = (y - raw)/s;
    gradient -(2 expit(z) - 1)/s, Hessian 2 expit(z) expit(-z)/s^2 (exact)."""

    scale: float = 1.0

    name = "logistic_errors_test"
    link_function = IDENTITY
    target_domain = REAL
    param_domains = {"scale": POSITIVE}

    def _nll(self, y, raw):
        z = (y - raw) / self.scale
        return -log_expit(z) - log_expit(-z) + np.log(self.scale)

    def _grad_hess(self, y, raw):
        z = (y - raw) / self.scale
        return -(2 * expit(z) - 1) / self.scale, 2 * expit(z) * expit(-z) / self.scale**2

    def _distribution(self, raw):
        return stats.logistic(loc=raw, scale=self.scale)


@dataclasses.dataclass(frozen=True)
class LogisticMedianErrors(LogisticErrors):
    """Logistic errors whose tree leaves take the residual median (the law is symmetric: its median
    is its location).  No engine twin: the engines train it on lossfam's custom path."""

    name = "logistic_median_errors_test"
    leaf_value = "median"


@dataclasses.dataclass(frozen=True)
class LogisticLineSearchErrors(LogisticErrors):
    """Logistic errors whose tree leaves take the constant that minimises the nll in the leaf (a line
    search); no engine twin."""

    name = "logistic_line_search_errors_test"
    leaf_value = "line_search"
