"""The built-in noise models, one per module."""
from ._base import Family, FromParam
from .asymmetric_laplace import AsymmetricLaplace
from .bernoulli import Bernoulli
from .gamma import Gamma
from .gaussian import Gaussian
from .huber import Huber, HuberLaw
from .laplace import Laplace
from .poisson import Poisson

BUILT_IN = (Gaussian, Laplace, AsymmetricLaplace, Huber, Bernoulli, Poisson, Gamma)

__all__ = ["Family", "FromParam", "HuberLaw", "BUILT_IN"] + [c.__name__ for c in BUILT_IN]
