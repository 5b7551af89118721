"""What the command line imports: the heavy libraries only where they are used."""

from __future__ import annotations

import subprocess
import sys

from scipy import stats

from guardband.planner.models.limitmodel import PLAUSIBLE_NATS


def test_plausible_nats_is_half_the_chi_square_95_point():
    # reference: scipy.stats.chi2 (the 1.92 log-likelihood units of a profile-likelihood 95% interval)
    assert PLAUSIBLE_NATS == 0.5 * float(stats.chi2.ppf(0.95, 1))  # exactly the value used before


def test_check_and_plan_imports_leave_out_scipy_stats_and_the_sweep():
    code = ("import sys, guardband.planner.cli, guardband.planner.app.workflow, guardband.planner.step; "
            "print(sorted(m for m in ('scipy.stats', 'joblib', 'dask', 'distributed') if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], check=True, capture_output=True, text=True).stdout
    assert out.strip() == "[]"
