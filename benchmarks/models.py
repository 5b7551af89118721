"""Benchmark: our GP core against scikit-learn on one planning workload.

Workload W1 (invented, seeded): ``--runs`` runs (default 300) in 8 factors
on the unit cube, 4 responses (one objective, three limited responses, each a
smooth test function plus noise), ``--candidates`` candidates (default
50,000). Each library fits one model per response and predicts the mean and
sd at every candidate. Ours runs twice: as the planner uses it (MAP with the
weak priors, the default) and with ``use_priors=False`` (maximum likelihood,
the same objective as scikit-learn's). The tables show the time per phase,
the ratios, and each model's log marginal likelihood (LML).

Comparing LML like with like: scikit-learn with ``normalize_y=True`` reports
the LML of ``(y - mean(y)) / std(y)``. Both are turned into the LML of ``y``
in response units by subtracting ``n log std(y)`` (our scale is the same
``std(y)``); a difference of two log densities of the same ``y`` does not
depend on the units. Our limit models put the prior mean at the limit, which
scikit-learn cannot do, so for those the reference is our model evaluated at
scikit-learn's hyperparameters (column ours@skl): same model, two searches.
The MAP fit maximises the posterior, not the likelihood, so a lower LML is
by design; the ML run shows what the search itself reaches. Percentages are
of the magnitude of scikit-learn's LML in its own (standardised) units.

Ours holds BLAS at ``planner.gp.BLAS_THREADS`` threads; scikit-learn runs
as configured unless ``--sklearn-blas-threads`` is given.

``--small-data`` runs a different study instead: MAP against maximum
likelihood with 8 to 60 runs, where the priors matter (calibration of the
95% predictive band), which is why MAP is the default.

Run: ``python benchmarks/models.py`` (a few minutes, most of it
scikit-learn), ``python benchmarks/models.py --runs 1000 [--skip-sklearn]``,
or ``python benchmarks/models.py --small-data``.
"""

from __future__ import annotations

import argparse
import math
import os
import platform
import sys
import time
import warnings
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

import scipy  # noqa: E402
import sklearn  # noqa: E402
from sklearn.exceptions import ConvergenceWarning  # noqa: E402
from sklearn.gaussian_process import GaussianProcessRegressor  # noqa: E402
from sklearn.gaussian_process.kernels import ConstantKernel, Matern, WhiteKernel  # noqa: E402

from threadpoolctl import threadpool_limits  # noqa: E402

from planner import gp  # noqa: E402
from planner.gp import Hyperparameters, fit_gp  # noqa: E402

N_FACTORS = 8


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
    """Four invented smooth functions of 3 factors for the small-data study."""
    x = X.T
    return [
        np.sin(5 * x[0]) + np.cos(4 * x[1]) * x[2],
        (x[0] - 0.3) ** 2 + 0.5 * x[1],
        np.exp(-((x[0] - 0.5) ** 2 + (x[1] - 0.5) ** 2) / 0.05) + 0.2 * x[2],
        np.sin(9 * x[0] * x[1]) + x[2],
    ]


def small_data_study(seed: int, repeats: int = 5) -> None:
    """MAP (default priors) against maximum likelihood with few runs.

    For 8 to 60 runs in 3 factors, noise sd 5% of each function's sd: the
    error of the mean (RMSE / sd of f), the share of 2000 new noisy
    measurements inside the 95% predictive band (mean +/- 1.96 sd), and
    the mean negative log predictive density in units of sd(f).
    """
    print("small-data study: 3 factors, 4 functions x", repeats, "repeats, 2000 test points each")
    print(f"{'runs':>5}  {'RMSE MAP':>9}{'RMSE ML':>9}  {'95% cover MAP':>14}{'ML':>6}  {'NLPD MAP':>9}{'ML':>7}")
    for n in (8, 15, 30, 60):
        stats = {True: [], False: []}
        for rep in range(repeats):
            rng = np.random.default_rng([seed, n, rep])
            X, Xt = rng.random((n, 3)), rng.random((2000, 3))
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
        print(f"{n:>5}  {a[0]:>9.3f}{b[0]:>9.3f}  {a[1]:>14.3f}{b[1]:>6.3f}  {a[2]:>9.2f}{b[2]:>7.2f}")


def _sklearn_model(n_restarts: int, seed: int) -> GaussianProcessRegressor:
    kernel = ConstantKernel(1.0) * Matern(length_scale=np.ones(N_FACTORS), nu=2.5) + WhiteKernel()
    return GaussianProcessRegressor(kernel, normalize_y=True, n_restarts_optimizer=n_restarts, random_state=seed)


def _sklearn_hyperparameters(gpr: GaussianProcessRegressor) -> Hyperparameters:
    k = gpr.kernel_
    return Hyperparameters(np.atleast_1d(k.k1.k2.length_scale), k.k1.k1.constant_value, k.k2.noise_level)


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
    parser.add_argument("--skip-sklearn", action="store_true", help="time our models only")
    parser.add_argument(
        "--sklearn-blas-threads",
        type=int,
        default=None,
        help="hold BLAS at this many threads while scikit-learn runs (default: leave it alone); "
        "ours uses planner.gp.BLAS_THREADS",
    )
    parser.add_argument("--seed", type=int, default=20240601, help="seed of the workload and the restarts")
    parser.add_argument(
        "--small-data",
        action="store_true",
        help="instead: compare MAP and maximum likelihood with 8 to 60 runs (calibration, about a minute)",
    )
    args = parser.parse_args(argv)
    if args.small_data:
        small_data_study(args.seed)
        return 0
    sk_restarts = args.sklearn_restarts if args.sklearn_restarts is not None else (4 if args.runs < 1000 else 2)

    rng = np.random.default_rng(args.seed)
    X = rng.random((args.runs, N_FACTORS))
    C = rng.random((args.candidates, N_FACTORS))
    responses = _responses(X, rng)

    print(
        f"W1: {args.runs} runs, {N_FACTORS} factors, {len(responses)} responses, {args.candidates} candidates; "
        f"ours: 1 + {args.restarts} starts, scikit-learn: 1 + {sk_restarts} starts"
        + (" (skipped)" if args.skip_sklearn else "")
    )
    print(
        f"python {platform.python_version()}, numpy {np.__version__}, scipy {scipy.__version__}, "
        f"scikit-learn {sklearn.__version__}, {os.cpu_count()} CPUs; BLAS threads: ours {gp.BLAS_THREADS}, "
        f"scikit-learn {args.sklearn_blas_threads or 'as configured'}"
    )

    variants = {"map": {}, "ml": {}}  # ours with the weak priors (the default), and without
    timing = {key: {"fit": 0.0, "predict": 0.0} for key in ("map", "ml", "sklearn")}
    rows = []
    for name, y, prior_mean in responses:
        row = {"name": name, "prior_mean": prior_mean}
        for key, use_priors in (("map", True), ("ml", False)):
            t0 = time.perf_counter()
            model = fit_gp(X, y, prior_mean=prior_mean, n_restarts=args.restarts, rng=args.seed, use_priors=use_priors)
            t1 = time.perf_counter()
            mean, sd = model.predict(C, include_noise=True)  # sklearn's sd includes the WhiteKernel noise
            t2 = time.perf_counter()
            timing[key]["fit"] += t1 - t0
            timing[key]["predict"] += t2 - t1
            row[key] = model
            row[f"fit_{key}"] = t1 - t0
            print(f"  {name}: ours {key.upper()} fit {t1 - t0:.2f} s, predict {t2 - t1:.2f} s", file=sys.stderr, flush=True)
            variants[key][name] = (mean, sd)
        if not args.skip_sklearn:
            gpr = _sklearn_model(sk_restarts, args.seed)
            with threadpool_limits(args.sklearn_blas_threads, "blas"), warnings.catch_warnings(record=True) as caught:
                warnings.simplefilter("always", ConvergenceWarning)
                t0 = time.perf_counter()
                gpr.fit(X, y)
                t1 = time.perf_counter()
                mean_sk, sd_sk = gpr.predict(C, return_std=True)
                t2 = time.perf_counter()
            print(f"  {name}: scikit-learn fit {t1 - t0:.2f} s, predict {t2 - t1:.2f} s", file=sys.stderr, flush=True)
            timing["sklearn"]["fit"] += t1 - t0
            timing["sklearn"]["predict"] += t2 - t1
            n_log_s = y.size * math.log(np.std(y))
            at_theirs = fit_gp(X, y, prior_mean=prior_mean, hyperparameters=_sklearn_hyperparameters(gpr))
            mean, _ = variants["map"][name]
            row.update(
                fit_sklearn=t1 - t0,
                lml_sk_std=gpr.log_marginal_likelihood_value_,
                lml_sk=gpr.log_marginal_likelihood_value_ - n_log_s,
                lml_ours_at_sk=at_theirs.log_marginal_likelihood,
                mean_gap=float(np.median(np.abs(mean - mean_sk) / sd_sk)),
                sk_warnings=sum(issubclass(w.category, ConvergenceWarning) for w in caught),
            )
        rows.append(row)

    total = {key: t["fit"] + t["predict"] for key, t in timing.items()}
    print()
    print("time (s)   ours MAP  ours ML   sklearn  sklearn/MAP  sklearn/ML")
    for phase in ("fit", "predict"):
        print(_time_row(phase, timing["map"][phase], timing["ml"][phase], timing["sklearn"][phase], args.skip_sklearn))
    print(_time_row("total", total["map"], total["ml"], total["sklearn"], args.skip_sklearn))

    print()
    print("LML of y in response units (log density); ours@skl = our model at scikit-learn's hyperparameters")
    head = f"{'model':<10}{'prior mean':>11}{'fit MAP':>9}{'fit ML':>8}{'LML MAP':>10}{'LML ML':>10}"
    if args.skip_sklearn:
        print(head)
        for r in rows:
            print(
                f"{r['name']:<10}{_pm(r['prior_mean']):>11}{r['fit_map']:>8.2f}s{r['fit_ml']:>7.2f}s"
                f"{r['map'].log_marginal_likelihood:>10.2f}{r['ml'].log_marginal_likelihood:>10.2f}"
            )
        _print_messages(rows)
        return 0
    print(
        head + f"{'fit skl':>9}{'LML skl':>10}{'ours@skl':>10}{'MAP-skl':>9}{'MAP %':>8}{'ML-skl':>8}{'ML %':>7}"
        f"{'|dmean|/sd':>11}"
    )
    worst = {"map": 0.0, "ml": 0.0}
    for r in rows:
        # like for like: the mean-centred objective against scikit-learn directly; a limit
        # model (prior mean at the limit) against scikit-learn's hyperparameters in our model
        ref = r["lml_sk"] if r["prior_mean"] is None else r["lml_ours_at_sk"]
        gaps = {key: r[key].log_marginal_likelihood - ref for key in ("map", "ml")}
        pct = {key: 100 * g / abs(r["lml_sk_std"]) for key, g in gaps.items()}
        for key in worst:
            worst[key] = min(worst[key], pct[key])
        print(
            f"{r['name']:<10}{_pm(r['prior_mean']):>11}{r['fit_map']:>8.2f}s{r['fit_ml']:>7.2f}s"
            f"{r['map'].log_marginal_likelihood:>10.2f}{r['ml'].log_marginal_likelihood:>10.2f}"
            f"{r['fit_sklearn']:>8.2f}s{r['lml_sk']:>10.2f}{r['lml_ours_at_sk']:>10.2f}"
            f"{gaps['map']:>9.2f}{pct['map']:>8.2f}{gaps['ml']:>8.2f}{pct['ml']:>7.2f}{r['mean_gap']:>11.3g}"
        )
    print(
        "MAP-skl, ML-skl: ours minus the like-for-like reference (scikit-learn's LML for the mean-centred model,\n"
        "ours@skl for a limit model), in nats; % of |scikit-learn's LML of the standardised y|.\n"
        "|dmean|/sd: median over candidates of |mean MAP - mean sklearn| / sd sklearn."
    )
    _print_messages(rows)
    for r in rows:
        if r["sk_warnings"]:
            print(f"  {r['name']}: scikit-learn raised {r['sk_warnings']} ConvergenceWarning(s)")
    print()
    for key, label in (("map", "ours MAP (default)"), ("ml", "ours ML (use_priors=False)")):
        ratio = total["sklearn"] / total[key]
        print(
            f"{label}: scikit-learn / ours = {ratio:.1f}x in total (target >= 8x: {'met' if ratio >= 8 else 'NOT met'}); "
            f"worst LML gap {worst[key]:+.2f}% (target >= -1%: {'met' if worst[key] >= -1 else 'NOT met'})"
        )
    return 0


def _print_messages(rows):
    for r in rows:
        for key in ("map", "ml"):
            m = r[key]
            print(f"  {r['name']} {key.upper()}: {m.status}: {m.message}")


def _pm(prior_mean):
    return "mean(y)" if prior_mean is None else f"{prior_mean:g}"


def _time_row(phase, ours_map, ours_ml, theirs, skipped):
    if skipped:
        return f"{phase:<10}{ours_map:>9.2f}{ours_ml:>9.2f}{'-':>10}{'-':>13}{'-':>12}"
    return (
        f"{phase:<10}{ours_map:>9.2f}{ours_ml:>9.2f}{theirs:>10.2f}"
        f"{theirs / ours_map:>12.1f}x{theirs / ours_ml:>11.1f}x"
    )


if __name__ == "__main__":
    raise SystemExit(main())
