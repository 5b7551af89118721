"""Guards on a limit model where the fit cannot vouch for itself.

Two checks the fitted hyperparameters cannot make, applied at prediction
time; both can only lower the probability that a limit is met.

**No claim rests on a single run.** With few runs that met a limit, a
stationary GP carries the value of one safe run a whole length scale
away; without that run the claim would collapse. The screen therefore also
asks what the model would say with each run left out, and takes the worst
of these and the full model, point by point. Deleting run i has a closed
form (block inverse of ``K = K_f + sn2 I``; the same algebra as the
leave-one-out residuals, Rasmussen & Williams 2006, sec. 5.4.2):

    mu_-i(x)  = mu(x)  - g_i(x) alpha_i / C_ii,
    var_-i(x) = var(x) + g_i(x)^2 / C_ii,
    C = K^-1,  alpha = C (y - m),  g(x) = C k(x),

with the hyperparameters held fixed. It is an influence check in the sense
of Cook (1977, Technometrics 19, 15-18; from memory): where many runs
support a prediction, deleting one changes little and the guard costs
nothing; where one run carries it, the candidate is excluded until another
run confirms the region.

**Optimistic errors nearby (local leave-one-out).** The global leave-one-out
widening (:mod:`.checks`) uses all runs; a limit that rises sharply outside
a curved region is predicted well at most runs and badly at the few near
its edge. Here only the *optimistic* standardised leave-one-out errors count
(for an upper limit, ``u_i = (y_i - mu_-i) / sd_-i > 0``: the run came out
higher than the model expected without it), scaled so that
``E[e_i] = 1`` under a calibrated Gaussian model (``e_i = 2 max(u_i, 0)^2``),
and are averaged with kernel weights at the model's shortest plausible
length scales and one unit of prior weight:

    c2(x) = (1 + sum_i rho(x, x_i) e_i) / (1 + sum_i rho(x, x_i)),

the sd being multiplied by ``sqrt(max(1, c2(x)))`` (a localised
cross-validation variance, after Bachoc 2013 and localised conformal
prediction, Guan 2023, Biometrika 110, 33-50; from memory).
"""

from __future__ import annotations

import numpy as np
from scipy import linalg

from guardband.safety.screen import limit_probability, met_probability

__all__ = ["GuardedLimitModel", "optimistic_errors", "deletion_predictions", "predict_parts_together"]

#: A guarded model keeps its answers at the last RECENT_SETS point sets of at
#: most RECENT_POINTS points (a local refinement's batches of k + 1 points),
#: and at the last larger one (a candidate pool).
RECENT_POINTS = 64
RECENT_SETS = 64
#: A guard widens a one-sided limit's sd up to this many times; past it the mean moves towards the
#: limit instead (the same probability; see :class:`_Widening`).
WIDEN_CAP = 4.0


def optimistic_errors(u: np.ndarray, lower, upper) -> np.ndarray:
    """``e_i``: the squared standardised errors that made the model too hopeful, scaled to mean 1."""
    u = np.asarray(u, dtype=float)
    if lower is not None and upper is not None:
        return u**2
    side = u if upper is not None else -u
    return 2.0 * np.maximum(side, 0.0) ** 2


class _Deletion:
    """The effect of deleting each run on a fitted GP's prediction (closed form).

    ``near`` is the GP whose correlation ``rho`` measures how near a point
    is to each run.
    """

    def __init__(self, gp, near=None):
        self.near = near
        if near is not None:
            self.var0 = float(near.scale**2 * near.hyperparameters.signal_variance)
        n = gp.X.shape[0]
        noise = gp.scale**2 * gp.hyperparameters.noise_variance
        K = gp.kernel(gp.X) + (noise + max(float(getattr(gp, "jitter", 0.0)), 0.0) * gp.scale**2) * np.eye(n)
        factor = linalg.cho_factor(K, lower=True)
        C = linalg.cho_solve(factor, np.eye(n))
        self.diag = np.diag(C).copy()
        self.alpha = linalg.cho_solve(factor, gp.y - gp.prior_mean)
        self.C = C
        self.gp = gp

    def shifts(self, Xs) -> tuple[np.ndarray, np.ndarray]:
        """(mean shift, variance increase) of deleting each run, each of shape (n_points, n_runs)."""
        g = self.gp.kernel(Xs, self.gp.X) @ self.C
        return g * (self.alpha / self.diag), g**2 / self.diag

    def rho(self, Xs) -> np.ndarray:
        """rho(x, x_i) at the short length scales, shape (n_points, n_runs)."""
        return self.near.kernel(Xs, self.gp.X) / self.var0

    def nearness(self, Xs, rho=None) -> np.ndarray:
        """rho(x, x_i)^2 at the short length scales (from ``rho`` when given), shape (n_points, n_runs)."""
        return np.clip(self.rho(Xs) if rho is None else rho, 0.0, 1.0) ** 2


def deletion_predictions(gp, Xs) -> tuple[np.ndarray, np.ndarray]:
    """Posterior mean and latent sd at Xs with each run left out, shape (n_points, n_runs) each."""
    Xs = np.atleast_2d(np.asarray(Xs, dtype=float))
    mean, sd = gp.predict(Xs)
    dmu, dvar = _Deletion(gp).shifts(Xs)
    return mean[:, None] - dmu, np.sqrt(sd[:, None] ** 2 + dvar)


class GuardedLimitModel:
    """A limit model judged also with each run left out, and widened where it was too hopeful.

    Parameters
    ----------
    model : fitted limit model
        A :class:`~guardband.planner.models.gp.GaussianProcess` or a
        :class:`~guardband.planner.models.limitmodel.PessimisticLimitModel`;
        everything but prediction is its own.
    lower, upper : float or None
        The limit, which decides which prediction is the worst.
    deletion, local : bool
        Which guards apply.
    labels : sequence of str, optional
        The run ids of the model's rows, to name the run a claim rests on.
    """

    def __init__(self, model, *, lower, upper, deletion: bool = True, local: bool = True, labels=None):
        self.model = model
        self.lower, self.upper = lower, upper
        self.labels = tuple(str(v) for v in labels) if labels is not None else None
        self._recent: dict = {}  # see predict_parts
        self._last_guards = (None, None)
        base = getattr(model, "fitted", model)
        self._base = base
        # the noise variance of a new measurement, in response units (the
        # short model shares it): added, not predicted a second time
        self._noise_var = float(base.scale**2 * base.hyperparameters.noise_variance)
        self._deletion = _Deletion(base, getattr(model, "short", base)) if deletion else None
        self._weights = getattr(model, "short", base) if local else None
        if local:
            loo = base.loo()
            u = loo.residual / np.sqrt(np.maximum(loo.variance, 1e-300))
            self._errors = optimistic_errors(u, lower, upper)
            self._var0 = float(self._weights.scale**2 * self._weights.hyperparameters.signal_variance)

    def __getattr__(self, name):  # everything but prediction is the wrapped model's
        if name.startswith("_") or name in ("model", "lower", "upper", "labels"):
            raise AttributeError(name)
        return getattr(self.model, name)

    #: several such models at the same points in one go (:func:`limit_predictions` of the screen)
    @staticmethod
    def predict_parts_together(models, Xs, include_noise) -> list[tuple]:
        return predict_parts_together(models, Xs, include_noise)

    def __getstate__(self) -> dict:  # the kept answers stay in this process
        return {k: v for k, v in self.__dict__.items() if k not in ("_recent", "_last_guards")}

    def __setstate__(self, state: dict) -> None:
        self.__dict__.update(state, _recent={}, _last_guards=(None, None))

    def local_factor(self, Xs, rho=None) -> np.ndarray:
        """The local sd multiplier at points Xs (unit-scaled), shape (n,).

        ``rho``: the correlations with the runs at the short length scales,
        when the caller has them already (the single-run check weighs by the same).
        """
        Xs = np.atleast_2d(np.asarray(Xs, dtype=float))
        if self._weights is None:
            return np.ones(Xs.shape[0])
        if rho is None:
            rho = self._weights.kernel(Xs, self._base.X) / self._var0
        c2 = (1.0 + rho @ self._errors) / (1.0 + rho.sum(axis=1))
        return np.sqrt(np.maximum(c2, 1.0))

    def _guards(self, Xs):
        Xs = np.atleast_2d(np.asarray(Xs, dtype=float))
        key = (Xs.shape, Xs.tobytes())
        if self._last_guards[0] == key:  # the pool's, again: for the batch's posterior
            return self._last_guards[1]
        if self._deletion is None:
            out = None, self.local_factor(Xs)
        else:
            # both guards weigh by the same correlations (the short model's, with the runs): once
            rho = self._deletion.rho(Xs)
            shared = rho if self._weights is self._deletion.near else None
            out = (*self._deletion.shifts(Xs), self._deletion.nearness(Xs, rho)), self.local_factor(Xs, shared)
        for a in (out[0] or ()) + (out[1],):
            a.setflags(write=False)  # kept, and shared with the posterior
        if Xs.shape[0] > RECENT_POINTS:
            self._last_guards = (key, out)
        return out

    def summary_factors(self) -> float:
        """The largest local multiplier at the runs, for the model summary."""
        return float(np.max(self.local_factor(self._base.X)))

    def predict(self, Xs, *, include_noise: bool = False, **kwargs):
        return self.predict_parts(Xs, include_noise=include_noise, **kwargs)[:2]

    def predict_parts(self, Xs, *, include_noise: bool = False, **kwargs):
        """(mean, sd, mean and sd with every run counted, the run each claim leans on): see :meth:`_worst`.

        A prediction is a pure function of the points, so the answers at the
        last few small point sets and at the last large one are kept: a local
        refinement asks again at points it has seen, the price of the
        threshold retraces the same refinement at every threshold where the
        joint figure does not bind, and it screens the pool the plan screened.
        """
        if kwargs:
            mean, sd_f = self.model.predict(Xs, include_noise=False, **kwargs)
            return self._worst(mean, sd_f, self._noise_var if include_noise else 0.0, *self._guards(Xs))
        return predict_parts_together([self], Xs, [include_noise])[0]

    def _kept(self, Xs: np.ndarray, include_noise: bool):
        """The kept answer at these points, or None; and its key."""
        key = (Xs.shape, Xs.tobytes(), bool(include_noise))
        kept = self._recent.get(key)
        return (None if kept is None else tuple(a.copy() for a in kept)), key

    def _keep(self, key, answer) -> None:
        if key[0][0] > RECENT_POINTS:  # one large set: forget the last one
            self._recent = {k: v for k, v in self._recent.items() if k[0][0] <= RECENT_POINTS}
        elif len(self._recent) >= RECENT_SETS:
            self._recent.pop(next(k for k in self._recent if k[0][0] <= RECENT_POINTS))
        self._recent[key] = tuple(a.copy() for a in answer)

    def posterior_at(self, Xs) -> _GuardedPosterior:
        return _GuardedPosterior(self, self.model.posterior_at(Xs), *self._guards(Xs))

    def _unwidened(self, mean, sd_f, noise_var, shifts, factor):
        """Per point, the (mean, sd) whose probability is the guarded one, and why,
        the sd's widening still to be made (a :class:`_Widening`; see :func:`_bisect`).

        For each run i the probability without it, ``p_-i``, is blended with
        the full model's ``p`` by how near the point is to run i:
        ``rho_i^2 p + (1 - rho_i^2) p_-i`` (at the run itself the run measured
        the answer; far from it the claim must stand without it), and the
        lowest blend over i is kept. The (mean, sd) are then made to give
        that probability (:class:`_Widening`: the sd widened, up to a cap,
        then the mean moved towards the limit).

        Returns ``(mean, widening, sd_all, leaning)``: ``mean`` is the
        model's own and ``sd_all`` the sd with every run counted (the local
        widening only), the pair the screen judges "with every run";
        ``leaning`` the run id (or row number) whose deletion lowered the
        figure, "" where none did.
        """
        sd = factor * np.sqrt(sd_f**2 + noise_var)
        leaning = np.full(mean.shape[0], "", dtype=object)
        if shifts is None or shifts[0].shape[1] == 0:
            return mean, _Widening(mean, sd), sd, leaning
        dmu, dvar, near = shifts
        p_full = limit_probability(mean, sd, lower=self.lower, upper=self.upper)
        sd_del = factor[:, None] * np.sqrt(sd_f[:, None] ** 2 + dvar + np.reshape(noise_var, (-1, 1)))
        p_del = limit_probability(mean[:, None] - dmu, sd_del, lower=self.lower, upper=self.upper)
        blend = near * p_full[:, None] + (1.0 - near) * p_del
        worst = np.argmin(blend, axis=1)
        p_worst = blend[np.arange(blend.shape[0]), worst]
        lowered = p_worst < p_full
        names = self.labels if self.labels is not None else tuple(f"row {i + 1}" for i in range(blend.shape[1]))
        leaning[lowered] = [names[i] for i in worst[lowered]]
        p_guard = np.minimum(p_full, p_worst)
        return mean, _Widening(mean, sd, p_guard, self.lower, self.upper, p_full), sd, leaning

    def _worst(self, mean, sd_f, noise_var, shifts, factor):
        """Per point, the (mean, sd) whose probability is the guarded one, and why: see :meth:`_unwidened`."""
        own, widening, sd_all, leaning = self._unwidened(mean, sd_f, noise_var, shifts, factor)
        return widening.mean, _bisect([widening])[0], own, sd_all, leaning


def predict_parts_together(models, Xs, include_noise) -> list[tuple]:
    """:meth:`GuardedLimitModel.predict_parts` of several guarded models at the same points.

    The widenings' bisections run as one (:func:`_bisect`): each point's
    steps are its own, so every number is the one the models give apart,
    with a fraction of the numpy calls (a local refinement predicts a few
    points thousands of times). Kept answers are used and kept as by each model.
    """
    Xs = np.asarray(Xs, dtype=float)
    out, pending = [None] * len(models), []
    for k, (model, noise) in enumerate(zip(models, include_noise)):
        kept, key = model._kept(Xs, noise)
        if kept is not None:
            out[k] = kept
            continue
        mean, sd_f = model.model.predict(Xs, include_noise=False)
        noise_var = model._noise_var if noise else 0.0
        pending.append((k, key, *model._unwidened(mean, sd_f, noise_var, *model._guards(Xs))))
    widened = _bisect([p[3] for p in pending])
    for (k, key, own, widening, sd_all, leaning), sd in zip(pending, widened):
        out[k] = (widening.mean, sd, own, sd_all, leaning)
        models[k]._keep(key, out[k])
    return out


class _Widening:
    """What :func:`_widen_to` does for one set of points, ready for :func:`_bisect`.

    Per point, a (mean, sd) whose P(lower <= N(mean, sd^2) <= upper) is the
    ``target``, where the target is below the current probability ``p`` (the
    caller's own ``limit_probability(mean, sd)``) and the mean lies inside
    the limit; elsewhere the model's (mean, sd) stay (outside the limit the
    probability is already at most 1/2). ``target`` holds probabilities in
    [0, 1]; None: nothing to widen.

    A one-sided limit has a closed form: the sd that gives the target with
    the mean kept is ``d / z`` (``d`` the distance to the limit, ``z`` the
    target's normal quantile). The sd is widened so up to :data:`WIDEN_CAP`
    times; beyond that (and always for a target below 1/2, which no sd can
    give with the mean inside the limit, the probability only falling
    towards 1/2 as the sd grows) the sd stays at the cap and the mean moves
    towards the limit, or beyond it, to where that sd gives the target
    exactly. The mean is continuous in the target across both switches, so
    a plotted band neither shoots off nor jumps. A two-sided limit is
    widened by bisection on log sd (the probability falls to 0 as the sd
    grows; capped at a million times the sd).
    """

    def __init__(self, mean, sd, target=None, lower=None, upper=None, p=None):
        self.sd, self.lower, self.upper, self.mean = sd, lower, upper, mean
        self.todo = np.zeros(sd.shape, dtype=bool)
        if target is None:
            return
        if p is None:
            p = limit_probability(mean, sd, lower=lower, upper=upper)
        inside = np.ones_like(mean, dtype=bool)
        if upper is not None:
            inside &= mean < upper
        if lower is not None:
            inside &= mean > lower
        self.todo = inside & (target < p) & (sd > 0)
        if (lower is None) != (upper is None):
            self._settle_one_sided(target)
        if not np.any(self.todo):
            return
        self.lo = np.log(sd[self.todo])
        self.m, self.tg = mean[self.todo], target[self.todo]
        # the distances to the limits do not change with the sd: computed once (the same
        # numbers limit_probability computes). Every sd tried lies in [sd, 1e6 sd], so with
        # sd between the smallest normal double and 1e290 each is positive and finite, and
        # met_probability gives limit_probability's numbers; unclipped, as the figure is only
        # compared with a target in [0, 1) (a clip to [0, 1] changes no such comparison)
        self.du = None if upper is None else upper - self.m
        self.dl = None if lower is None else lower - self.m
        sd_todo = sd[self.todo]
        self.fast = float(np.min(sd_todo)) > 1e-300 and float(np.max(sd_todo)) < 1e290

    def _settle_one_sided(self, target) -> None:
        """The closed form of the class docstring for every point to widen; none is left to bisect."""
        todo = self.todo
        if not np.any(todo):
            return
        from scipy.special import ndtri  # on use: scipy.special is heavy to import

        z = ndtri(np.clip(target[todo], 1e-300, None))  # target < p <= 1: finite; about -37 at the clip
        m, sd = self.mean[todo], self.sd[todo]
        d = self.upper - m if self.upper is not None else m - self.lower  # > 0: the mean is inside
        cap = WIDEN_CAP * sd
        widen = d < cap * z  # d / z within the cap (so z > 0)
        self.mean, self.sd = np.array(self.mean, dtype=float, copy=True), np.array(self.sd, dtype=float, copy=True)
        self.sd[todo] = np.where(widen, d / np.where(widen, z, 1.0), cap)
        moved = self.upper - cap * z if self.upper is not None else self.lower + cap * z
        self.mean[todo] = np.where(widen, m, moved)
        self.todo = np.zeros_like(todo)

    def result(self, hi) -> np.ndarray:
        out = self.sd.copy()
        if hi is not None:
            out[self.todo] = np.exp(hi)
        return out


def _bisect(widenings, *, steps: int = 40) -> list[np.ndarray]:
    """The widened sds of several :class:`_Widening`, the fast ones in one bisection.

    The points are laid end to end; a side without a limit becomes an
    infinite distance (``ndtr(inf) = 1``, ``ndtr(-inf) = 0``, so ``p - 0``
    and ``1 - p`` come out as before, exactly). Numpy's elementwise
    functions give each element the same number wherever it lies in an
    array (a test compares with the models one at a time).
    """
    live = [w for w in widenings if w.todo.any()]
    fast = [w for w in live if w.fast]
    his = {}
    if fast:
        lo = np.concatenate([w.lo for w in fast]) if len(fast) > 1 else fast[0].lo
        tg = np.concatenate([w.tg for w in fast]) if len(fast) > 1 else fast[0].tg
        if len(fast) == 1:
            du, dl = fast[0].du, fast[0].dl
        else:
            fill = lambda d, w, v: d if d is not None else np.full(w.lo.shape, v)
            du = (np.concatenate([fill(w.du, w, np.inf) for w in fast])
                  if any(w.du is not None for w in fast) else None)
            dl = (np.concatenate([fill(w.dl, w, -np.inf) for w in fast])
                  if any(w.dl is not None for w in fast) else None)
        hi = lo + np.log(1e6)
        for _ in range(steps):
            mid = 0.5 * (lo + hi)
            too_high = met_probability(du, dl, np.exp(mid), clip=False) > tg
            lo = np.where(too_high, mid, lo)
            hi = np.where(too_high, hi, mid)
        for w, part in zip(fast, np.split(hi, np.cumsum([w.lo.size for w in fast])[:-1])):
            his[id(w)] = part
    for w in live:
        if not w.fast:  # pragma: no cover - an sd beyond the doubles' normal range
            lo = w.lo
            hi = lo + np.log(1e6)
            for _ in range(steps):
                mid = 0.5 * (lo + hi)
                too_high = limit_probability(w.m, np.exp(mid), lower=w.lower, upper=w.upper) > w.tg
                lo = np.where(too_high, mid, lo)
                hi = np.where(too_high, hi, mid)
            his[id(w)] = hi
    return [w.result(his.get(id(w))) for w in widenings]


def _widen_to(mean, sd, target, lower, upper, *, steps: int = 40, p=None) -> tuple[np.ndarray, np.ndarray]:
    """(mean', sd') with P(lower <= N(mean', sd'^2) <= upper) at the target: see :class:`_Widening`."""
    widening = _Widening(mean, sd, target, lower, upper, p)
    return widening.mean, _bisect([widening], steps=steps)[0]


class _GuardedPosterior:
    """A posterior over fixed points with the guards of the real-data model applied."""

    def __init__(self, owner: GuardedLimitModel, posterior, shifts, factor):
        self._owner, self._posterior, self._shifts, self._factor = owner, posterior, shifts, factor

    @property
    def n_points(self) -> int:
        return self._posterior.n_points

    def mean_sd(self, *, include_noise: bool = False):
        return self.mean_sd_parts(include_noise=include_noise)[:2]

    def mean_sd_parts(self, *, include_noise: bool = False):
        """As :meth:`GuardedLimitModel.predict_parts`, at the posterior's points."""
        mean, sd_f = self._posterior.mean_sd(include_noise=False)
        noise_var = self._owner._noise_var if include_noise else 0.0
        return self._owner._worst(mean, sd_f, noise_var, self._shifts, self._factor)

    def condition(self, j: int, y_j: float) -> None:
        self._posterior.condition(j, y_j)
