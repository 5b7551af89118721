"""Models: exact GP regression, its hyperparameter search, limit-model guards, worker processes.

The modules, one idea each: :mod:`.gp` (the fitted model and
:func:`fit_gp`), :mod:`.hyperparameters` (their type, priors and search),
:mod:`.kernel` (Matérn 5/2 and the linear algebra), :mod:`.arrays` (input
arrays), :mod:`.checks` (leave-one-out coverage and widening),
:mod:`.limitmodel` (the short-length-scale guard), :mod:`.guards` (the
single-run check and the local one-sided widening), :mod:`.binomial` (a GP
on the logit of a rate, Laplace approximation), :mod:`.parallel` (jobs
on worker processes) and :mod:`.blas` (BLAS held to one thread).
Other packages import the names below from here.
"""

from guardband.planner.models.binomial import BinomialGP, fit_binomial_gp
from guardband.planner.models.blas import blas_limit, hold_blas_limit, limited_blas
from guardband.planner.models.gp import GaussianProcess, LeaveOneOut, PosteriorAt, fit_gp
from guardband.planner.models.hyperparameters import Hyperparameters, log_marginal_likelihood
from guardband.planner.models.kernel import matern52
from guardband.planner.models.limitmodel import PessimisticLimitModel
from guardband.planner.models.parallel import default_workers, map_jobs

__all__ = [
    "fit_gp",
    "fit_binomial_gp",
    "BinomialGP",
    "GaussianProcess",
    "Hyperparameters",
    "LeaveOneOut",
    "PosteriorAt",
    "log_marginal_likelihood",
    "matern52",
    "PessimisticLimitModel",
    "map_jobs",
    "default_workers",
    "blas_limit",
    "limited_blas",
    "hold_blas_limit",
]
