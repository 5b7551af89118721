"""Benchmark: our GP core against scikit-learn on one planning workload.

Workload W1 (invented, seeded): ``--runs`` runs (default 300) in 8 factors
on the unit cube, 4 responses (one objective, three limited responses, each a
smooth test function plus noise), ``--candidates`` candidates (default
50,000). Each library fits one model per response and predicts the mean and
sd at every candidate.

Ours runs in two configurations, both with BLAS held at one thread, the
default choice of priors (at 300 runs in 8 factors: maximum likelihood, see
``planner/models/hyperparameters.py``) and 1 + 4 starts with the early stop
once two agree:

* ``serial``: one model after another (prediction chunks on
  ``gp.PREDICT_WORKERS`` threads);
* ``processes``: each model's fit and prediction as one job, on
  ``FIT_WORKERS`` forked processes (``planner.models.parallel``, as the planner fits).

A third run forces the weak priors (MAP, the small-data setting) to show
what they cost in log marginal likelihood at 300 runs.

scikit-learn runs in each configuration of ``--sklearn-modes``:

* ``configured``: as installed, one model after another (OpenBLAS picks its
  own thread count);
* ``serial``: BLAS held at one thread, one model after another;
* ``threads``: BLAS at one thread, the four models on two Python threads;
* ``processes``: BLAS at one thread, the four models on two forked
  processes, as ours.

The headline ratio is taken against the fastest of these, so a poor default
does not flatter us; the like-for-like ratios (serial against serial,
processes against processes) are printed too.

Comparing LML like with like: scikit-learn with ``normalize_y=True`` reports
the LML of ``(y - mean(y)) / std(y)``. Both are turned into the LML of ``y``
in response units by subtracting ``n log std(y)`` (our scale is the same
``std(y)``); a difference of two log densities of the same ``y`` does not
depend on the units. Our limit models put the prior mean at the limit, which
scikit-learn cannot do, so for those the reference is our model evaluated at
scikit-learn's hyperparameters (column ours@skl): same model, two searches.
Percentages are of the magnitude of scikit-learn's LML in its own
(standardised) units.

``--small-data`` runs a different study instead: MAP against maximum
likelihood with 8 to 100 runs, in 3 and in 8 factors, where the priors
matter (calibration of the 95% predictive band); it is the evidence for the
threshold at which the default switches from MAP to maximum likelihood.

Run: ``python benchmarks/models.py`` (about two minutes, most of it
scikit-learn), ``python benchmarks/models.py --runs 1000 --sklearn-modes
processes``, or ``python benchmarks/models.py --small-data``.
"""

from __future__ import annotations

import argparse
import math
import os
import platform
import sys
import time
import warnings
from concurrent.futures import ThreadPoolExecutor

import numpy as np


import scipy  # noqa: E402
import sklearn  # noqa: E402
from sklearn.exceptions import ConvergenceWarning  # noqa: E402
from sklearn.gaussian_process import GaussianProcessRegressor  # noqa: E402
from sklearn.gaussian_process.kernels import ConstantKernel, Matern, WhiteKernel  # noqa: E402

from threadpoolctl import threadpool_limits  # noqa: E402

from guardband.planner.models import Hyperparameters, fit_gp, map_jobs  # noqa: E402
from guardband.planner.models import blas, gp, hyperparameters  # noqa: E402  (their settings)
from guardband.planner.step.fitting import FIT_WORKERS  # noqa: E402

N_FACTORS = 8
SKLEARN_MODES = ("configured", "serial", "threads", "processes")


def _responses(X: np.ndarray, rng: np.random.Generator):
    """Four invented smooth responses with noise: (name, y, prior mean or None, noise sd)."""
    x = X.T
    out = []
    f = 80 + 10 * np.sin(2.5 * x[0]) * np.cos(1.5 * x[1]) - 12 * (x[2] - 0.6) ** 2 + 6 * x[3] * x[4] - 4 * x[5]
    out.append(("objective", f + 0.5 * rng.standard_normal(f.size), None))
    f = 0.08 + 0.10 * x[2] ** 2 + 0.05 * x[0] * x[6] + 0.03 * np.sin(3 * x[7])
    out.append(("limit_a", f + 0.005 * rng.standard_normal(f.size), 0.15))
    f = 0.4 + 0.5 * np.exp(-3 * x[1]) + 0.3 * x[4] ** 2 - 0.2 * x[3]
    out.append(("limit_b", f + 0.03 * rng.standard_normal(f.size), 0.8))
    f = 2 + 1.5 * np.tanh(2 * (x[5] - 0.5)) + x[6] * x[7]
    out.append(("limit_c", f + 0.1 * rng.standard_normal(f.size), 3.0))
    return out


def _small_data_functions(X: np.ndarray):
    """Invented smooth functions for the small-data study (3 or 8 factors)."""
    x = X.T
    if X.shape[1] == 3:
        return [
            np.sin(5 * x[0]) + np.cos(4 * x[1]) * x[2],
            (x[0] - 0.3) ** 2 + 0.5 * x[1],
            np.exp(-((x[0] - 0.5) ** 2 + (x[1] - 0.5) ** 2) / 0.05) + 0.2 * x[2],
            np.sin(9 * x[0] * x[1]) + x[2],
        ]
    # 8 factors, as in formulation work: a few strong effects, some weak, some none
    return [
        np.sin(3 * x[0]) + np.cos(2 * x[1]) * x[2] + 0.3 * x[3] * x[4],
        (x[0] - 0.3) ** 2 + 0.5 * x[1] + 0.2 * np.sin(4 * x[5]),
        np.exp(-((x[0] - 0.5) ** 2 + (x[1] - 0.5) ** 2) / 0.2) + 0.2 * x[2] + 0.1 * x[6],
        np.tanh(3 * (x[0] + x[1] - 1)) + 0.2 * x[7] ** 2,
    ]


def small_data_study(seed: int, repeats: int = 5) -> None:
    """MAP (weak priors) against maximum likelihood with few runs.

    For 8 to 100 runs in 3 and in 8 factors, noise sd 5% of each function's
    sd: the error of the mean (RMSE / sd of f), the share of 2000 new noisy
    measurements inside the 95% predictive band (mean +/- 1.96 sd), and the
    mean negative log predictive density in units of sd(f). The last column
    is what the default (``use_priors=None``) picks.
    """
    for d, sizes in ((3, (8, 15, 30, 60, 100)), (8, (15, 30, 60, 100, 150))):
        print(f"small-data study: {d} factors, 4 functions x {repeats} repeats, 2000 test points each")
        print(
            f"{'runs':>5}  {'RMSE MAP':>9}{'RMSE ML':>9}  {'95% cover MAP':>14}{'ML':>6}  "
            f"{'NLPD MAP':>9}{'ML':>7}  default"
        )
        for n in sizes:
            stats = {True: [], False: []}
            for rep in range(repeats):
                rng = np.random.default_rng([seed, d, n, rep])
                X, Xt = rng.random((n, d)), rng.random((2000, d))
                for f, ft in zip(_small_data_functions(X), _small_data_functions(Xt)):
                    noise = 0.05 * np.std(ft)
                    y = f + noise * rng.standard_normal(n)
                    yt = ft + noise * rng.standard_normal(ft.size)
                    for use_priors in (True, False):
                        with warnings.catch_warnings():
                            warnings.simplefilter("ignore", RuntimeWarning)
                            model = fit_gp(X, y, rng=rep, use_priors=use_priors)
                            mean, sd = model.predict(Xt, include_noise=True)
                        u = (yt - mean) / sd
                        stats[use_priors].append(
                            (
                                np.sqrt(np.mean((mean - ft) ** 2)) / np.std(ft),
                                np.mean(np.abs(u) < 1.96),
                                np.mean(0.5 * math.log(2 * math.pi) + np.log(sd / np.std(ft)) + 0.5 * u * u),
                            )
                        )
            a, b = np.mean(stats[True], axis=0), np.mean(stats[False], axis=0)
            default = "MAP" if n < hyperparameters.ML_RUNS_PER_HYPERPARAMETER * (d + 2) else "ML"
            print(
                f"{n:>5}  {a[0]:>9.3f}{b[0]:>9.3f}  {a[1]:>14.3f}{b[1]:>6.3f}  {a[2]:>9.2f}{b[2]:>7.2f}  {default}"
            )
        print()


def _sklearn_model(n_restarts: int, seed: int) -> GaussianProcessRegressor:
    kernel = ConstantKernel(1.0) * Matern(length_scale=np.ones(N_FACTORS), nu=2.5) + WhiteKernel()
    return GaussianProcessRegressor(kernel, normalize_y=True, n_restarts_optimizer=n_restarts, random_state=seed)


def _sklearn_hyperparameters(gpr: GaussianProcessRegressor) -> Hyperparameters:
    k = gpr.kernel_
    return Hyperparameters(np.atleast_1d(k.k1.k2.length_scale), k.k1.k1.constant_value, k.k2.noise_level)


def _ours_job(job):
    """Fit one of our models and predict at the candidates (module level: runs in a worker)."""
    X, C, y, prior_mean, restarts, seed, use_priors, in_worker = job
    if in_worker:
        gp.PREDICT_WORKERS = 1  # the worker processes already share the cores
    t0 = time.perf_counter()
    model = fit_gp(X, y, prior_mean=prior_mean, n_restarts=restarts, rng=seed, use_priors=use_priors)
    t1 = time.perf_counter()
    prediction = model.predict(C, include_noise=True)  # sklearn's sd includes the WhiteKernel noise
    return model, prediction, {"fit": t1 - t0, "predict": time.perf_counter() - t1}


def _sklearn_job(job):
    """Fit one scikit-learn model and predict (module level: runs in a worker)."""
    X, C, y, restarts, seed = job
    gpr = _sklearn_model(restarts, seed)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", ConvergenceWarning)
        t0 = time.perf_counter()
        gpr.fit(X, y)
        t1 = time.perf_counter()
    prediction = gpr.predict(C, return_std=True)
    n_warn = sum(issubclass(w.category, ConvergenceWarning) for w in caught)
    return gpr, prediction, {"fit": t1 - t0, "predict": time.perf_counter() - t1}, n_warn


def _run_ours(X, C, responses, restarts, seed, use_priors, mode):
    """``serial``: in turn (prediction chunks on threads); ``processes``: one job per model on two processes."""
    in_worker = mode == "processes"
    jobs = [(X, C, y, pm, restarts, seed, use_priors, in_worker) for _, y, pm in responses]
    t0 = time.perf_counter()
    out = map_jobs(_ours_job, jobs, FIT_WORKERS if in_worker else 1)
    wall = time.perf_counter() - t0
    return [o[0] for o in out], [o[1] for o in out], wall, [o[2] for o in out]


def _run_sklearn(X, C, responses, restarts, seed, mode):
    """scikit-learn in one configuration (see the module docstring)."""
    jobs = [(X, C, y, restarts, seed) for _, y, _ in responses]
    limit = None if mode == "configured" else 1
    with threadpool_limits(limit, "blas"):
        t0 = time.perf_counter()
        if mode == "threads":
            with ThreadPoolExecutor(max_workers=2) as pool:
                out = list(pool.map(_sklearn_job, jobs))
        elif mode == "processes":
            out = map_jobs(_sklearn_job, jobs, 2)
        else:
            out = [_sklearn_job(job) for job in jobs]
        wall = time.perf_counter() - t0
    return [o[0] for o in out], [o[1] for o in out], wall, [o[2] for o in out], sum(o[3] for o in out)


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--runs", type=int, default=300, help="runs in the workload (default 300)")
    parser.add_argument("--candidates", type=int, default=50_000, help="candidates to predict (default 50000)")
    parser.add_argument("--restarts", type=int, default=4, help="our restarts after the first start (default 4)")
    parser.add_argument(
        "--sklearn-restarts",
        type=int,
        default=None,
        help="scikit-learn n_restarts_optimizer (default 4, or 2 from 1000 runs)",
    )
    parser.add_argument(
        "--sklearn-modes",
        default=",".join(SKLEARN_MODES),
        help=f"comma-separated scikit-learn configurations among {', '.join(SKLEARN_MODES)} "
        "(default all); 'none' times ours only",
    )
    parser.add_argument("--seed", type=int, default=20240601, help="seed of the workload and the restarts")
    parser.add_argument(
        "--small-data",
        action="store_true",
        help="instead: compare MAP and maximum likelihood with 8 to 150 runs (calibration, a few minutes)",
    )
    args = parser.parse_args(argv)
    if args.small_data:
        small_data_study(args.seed)
        return 0
    modes = [] if args.sklearn_modes == "none" else [m.strip() for m in args.sklearn_modes.split(",") if m.strip()]
    unknown = [m for m in modes if m not in SKLEARN_MODES]
    if unknown:
        parser.error(f"--sklearn-modes: unknown {unknown}; choose among {', '.join(SKLEARN_MODES)} or 'none'")
    sk_restarts = args.sklearn_restarts if args.sklearn_restarts is not None else (4 if args.runs < 1000 else 2)

    rng = np.random.default_rng(args.seed)
    X = rng.random((args.runs, N_FACTORS))
    C = rng.random((args.candidates, N_FACTORS))
    responses = _responses(X, rng)

    print(
        f"W1: {args.runs} runs, {N_FACTORS} factors, {len(responses)} responses, {args.candidates} candidates; "
        f"ours: 1 + {args.restarts} starts (stop when two agree, maximum-likelihood regime), "
        f"scikit-learn: 1 + {sk_restarts} starts"
    )
    print(
        f"python {platform.python_version()}, numpy {np.__version__}, scipy {scipy.__version__}, "
        f"scikit-learn {sklearn.__version__}, {os.cpu_count()} CPUs; ours: {FIT_WORKERS} fit processes, "
        f"{gp.PREDICT_WORKERS} prediction threads, BLAS {blas.BLAS_THREADS} thread"
    )

    ours = {}
    for key, use_priors, mode in (("serial", None, "serial"), ("processes", None, "processes"),
                                  ("MAP processes", True, "processes")):
        models, predictions, wall, per_model = _run_ours(X, C, responses, args.restarts, args.seed, use_priors, mode)
        ours[key] = dict(models=models, predictions=predictions, wall=wall, per_model=per_model)
        print(f"  ours {key}: {wall:.2f} s", file=sys.stderr, flush=True)
    theirs = {}
    for mode in modes:
        models, predictions, wall, per_model, n_warn = _run_sklearn(X, C, responses, sk_restarts, args.seed, mode)
        theirs[mode] = dict(models=models, predictions=predictions, wall=wall, per_model=per_model, warnings=n_warn)
        print(f"  scikit-learn {mode}: {wall:.2f} s", file=sys.stderr, flush=True)

    total = {f"ours {k}": v["wall"] for k, v in ours.items()}
    total.update({f"scikit-learn {k}": v["wall"] for k, v in theirs.items()})
    print()
    print(f"{'wall time (s)':<30}{'total':>8}   {'fit + predict per model (s), as each job timed itself':<20}")
    for label, v in [(f"ours {k}", v) for k, v in ours.items()] + [(f"scikit-learn {k}", v) for k, v in theirs.items()]:
        parts = "  ".join(f"{t['fit']:.2f}+{t['predict']:.2f}" for t in v["per_model"])
        print(f"{label:<30}{v['wall']:>8.2f}   {parts}")
    print()
    print("LML of y in response units (log density); ours@skl = our model at scikit-learn's hyperparameters")
    head = f"{'model':<10}{'prior mean':>11}{'ours':>10}{'MAP':>10}"
    if not theirs:
        print(head)
        for i, (name, _, prior_mean) in enumerate(responses):
            d, m = ours["processes"]["models"][i], ours["MAP processes"]["models"][i]
            print(f"{name:<10}{_pm(prior_mean):>11}{d.log_marginal_likelihood:>10.2f}{m.log_marginal_likelihood:>10.2f}")
        _print_messages(responses, ours)
        return 0
    fastest = min(theirs, key=lambda k: total[f"scikit-learn {k}"])
    ref_models = theirs[fastest]["models"]
    print(head + f"{'skl':>10}{'ours@skl':>10}{'dflt-skl':>9}{'dflt %':>8}{'MAP-skl':>9}{'MAP %':>8}{'|dmean|/sd':>11}")
    worst = {"processes": 0.0, "MAP processes": 0.0}
    for i, (name, y, prior_mean) in enumerate(responses):
        gpr = ref_models[i]
        lml_sk_std = gpr.log_marginal_likelihood_value_
        lml_sk = lml_sk_std - y.size * math.log(np.std(y))
        at_theirs = fit_gp(X, y, prior_mean=prior_mean, hyperparameters=_sklearn_hyperparameters(gpr))
        # like for like: the mean-centred objective against scikit-learn directly; a limit
        # model (prior mean at the limit) against scikit-learn's hyperparameters in our model
        ref = lml_sk if prior_mean is None else at_theirs.log_marginal_likelihood
        gaps, pct = {}, {}
        for key in worst:
            gaps[key] = ours[key]["models"][i].log_marginal_likelihood - ref
            pct[key] = 100 * gaps[key] / abs(lml_sk_std)
            worst[key] = min(worst[key], pct[key])
        mean, _ = ours["processes"]["predictions"][i]
        mean_sk, sd_sk = theirs[fastest]["predictions"][i]
        mean_gap = float(np.median(np.abs(mean - mean_sk) / sd_sk))
        print(
            f"{name:<10}{_pm(prior_mean):>11}{ours['processes']['models'][i].log_marginal_likelihood:>10.2f}"
            f"{ours['MAP processes']['models'][i].log_marginal_likelihood:>10.2f}{lml_sk:>10.2f}"
            f"{at_theirs.log_marginal_likelihood:>10.2f}{gaps['processes']:>9.2f}{pct['processes']:>8.2f}"
            f"{gaps['MAP processes']:>9.2f}{pct['MAP processes']:>8.2f}{mean_gap:>11.3g}"
        )
    print(
        "dflt-skl, MAP-skl: ours minus the like-for-like reference (scikit-learn's LML for the mean-centred\n"
        "model, ours@skl for a limit model), in nats; % of |scikit-learn's LML of the standardised y|.\n"
        f"|dmean|/sd: median over candidates of |mean ours - mean scikit-learn| / sd scikit-learn ({fastest})."
    )
    _print_messages(responses, ours)
    for mode, v in theirs.items():
        if v["warnings"]:
            print(f"  scikit-learn {mode}: {v['warnings']} ConvergenceWarning(s)")
    print()
    ref_time = total[f"scikit-learn {fastest}"]
    for key, label in (("processes", "ours (default)"), ("MAP processes", "ours, weak priors forced (MAP)")):
        ratio = ref_time / total[f"ours {key}"]
        print(
            f"{label}: fastest scikit-learn ({fastest}, {ref_time:.1f} s) / ours ({total[f'ours {key}']:.1f} s) = "
            f"{ratio:.1f}x (target >= 8x: {'met' if ratio >= 8 else 'NOT met'}); "
            f"worst LML gap {worst[key]:+.2f}% (target >= -1%: {'met' if worst[key] >= -1 else 'NOT met'})"
        )
    if "serial" in theirs:
        print(f"  in turn, one BLAS thread each: {total['scikit-learn serial'] / total['ours serial']:.1f}x")
    if "processes" in theirs:
        print(f"  two processes each: {total['scikit-learn processes'] / total['ours processes']:.1f}x")
    for mode in theirs:
        print(f"  ours (default) against scikit-learn {mode}: {total[f'scikit-learn {mode}'] / total['ours processes']:.1f}x")
    return 0


def _print_messages(responses, ours):
    for i, (name, _, _) in enumerate(responses):
        for key, v in ours.items():
            m = v["models"][i]
            print(f"  {name} {key}: {m.status}: {m.message}")


def _pm(prior_mean):
    return "mean(y)" if prior_mean is None else f"{prior_mean:g}"


if __name__ == "__main__":
    raise SystemExit(main())
