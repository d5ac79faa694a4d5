"""The built-in noise models, one per module."""
from ._base import Family, FromParam
from ._several import SeveralScoreFamily
from .asymmetric_laplace import AsymmetricLaplace
from .asymmetric_laplace_spread import AsymmetricLaplaceSpread
from .bernoulli import Bernoulli
from .beta import Beta
from .gamma import Gamma
from .gamma_spread import GammaSpread
from .gaussian import Gaussian
from .gaussian_spread import GaussianSpread
from .huber import Huber, HuberLaw
from .laplace import Laplace
from .laplace_spread import LaplaceSpread
from .lognormal import Lognormal
from .multinomial import Multinomial
from .negative_binomial import NegativeBinomial
from .negative_binomial_spread import NegativeBinomialSpread
from .poisson import Poisson
from .student_t import StudentT
from .student_t_spread import StudentTSpread
from .tweedie import Tweedie, TweedieLaw, tweedie_power_profile
from .weibull import Weibull

BUILT_IN = (Gaussian, Laplace, AsymmetricLaplace, Huber, Bernoulli, Poisson, Gamma,
            Tweedie, NegativeBinomial, StudentT, Lognormal, Beta, Weibull)
#: the built-in families with several raw scores per row (lossfam.families._several)
BUILT_IN_SEVERAL = (GaussianSpread, LaplaceSpread, AsymmetricLaplaceSpread, GammaSpread,
                    NegativeBinomialSpread, StudentTSpread, Multinomial)

__all__ = ["Family", "FromParam", "SeveralScoreFamily", "BUILT_IN_SEVERAL", "HuberLaw", "TweedieLaw", "tweedie_power_profile", "BUILT_IN"] + [c.__name__ for c in BUILT_IN + BUILT_IN_SEVERAL]
