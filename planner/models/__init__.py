"""Models: exact GP regression, its hyperparameter search, limit-model guards, worker processes.

The modules, one idea each: :mod:`.gp` (the fitted model and
:func:`fit_gp`), :mod:`.hyperparameters` (their type, priors and search),
:mod:`.kernel` (Matérn 5/2 and the linear algebra), :mod:`.arrays` (input
arrays), :mod:`.checks` (leave-one-out coverage and widening),
:mod:`.limitmodel` (the short-length-scale guard), :mod:`.guards` (the
single-run check and the local one-sided widening), :mod:`.binomial` (a GP
on the logit of a rate, Laplace approximation), :mod:`.parallel` (jobs
on worker processes) and :mod:`.blas` (BLAS held to one thread).
Other packages import the names below from here; each loads its module
on first use (the model modules import scipy's optimisers).
"""

from guardband.planner.lazy import lazy_names

#: public name -> the module that defines it (loaded on first use)
_NAMES = {
    "fit_gp": "guardband.planner.models.gp",
    "fit_binomial_gp": "guardband.planner.models.binomial",
    "BinomialGP": "guardband.planner.models.binomial",
    "GaussianProcess": "guardband.planner.models.gp",
    "Hyperparameters": "guardband.planner.models.hyperparameters",
    "LeaveOneOut": "guardband.planner.models.gp",
    "PosteriorAt": "guardband.planner.models.gp",
    "log_marginal_likelihood": "guardband.planner.models.hyperparameters",
    "matern52": "guardband.planner.models.kernel",
    "PessimisticLimitModel": "guardband.planner.models.limitmodel",
    "map_jobs": "guardband.planner.models.parallel",
    "default_workers": "guardband.planner.models.parallel",
    "blas_limit": "guardband.planner.models.blas",
    "limited_blas": "guardband.planner.models.blas",
    "hold_blas_limit": "guardband.planner.models.blas",
}

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

__getattr__, __dir__ = lazy_names(__name__, _NAMES)
