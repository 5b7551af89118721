"""What the command line imports: the heavy libraries only where they are used."""

from __future__ import annotations

import ast
import subprocess
import sys

import pytest
from scipy import stats

from conftest import PROTOCOLS
from guardband.planner.models.limitmodel import PLAUSIBLE_NATS


def test_plausible_nats_is_half_the_chi_square_95_point():
    # reference: scipy.stats.chi2 (the 1.92 log-likelihood units of a profile-likelihood 95% interval)
    assert PLAUSIBLE_NATS == 0.5 * float(stats.chi2.ppf(0.95, 1))  # exactly the value used before


def test_check_and_plan_imports_leave_out_scipy_stats_and_the_sweep():
    # the step's own modules too: a batch's sampled draws import scipy.stats only when they run
    code = ("import sys, guardband.planner.cli, guardband.planner.app.workflow, guardband.planner.step, "
            "guardband.planner.step.plan, guardband.planner.step.batch; "
            "print(sorted(m for m in ('scipy.stats', 'joblib', 'dask', 'distributed') if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], check=True, capture_output=True, text=True).stdout
    assert out.strip() == "[]"


#: Libraries the command line must not import before a command needs them: each
#: takes from a tenth of a second to a second to import on the project's machine.
HEAVY = ("cvxpy", "scipy.optimize", "scipy.stats", "scipy.special", "scipy.linalg", "sklearn", "pandas",
         "matplotlib", "jinja2", "dask", "distributed", "joblib", "openpyxl", "pint", "pydantic")


def _imported_after(code: str) -> list[str]:
    """The HEAVY libraries in sys.modules after running ``code`` in a fresh interpreter."""
    probe = f"{code}\nimport sys\nprint(sorted(m for m in {HEAVY!r} if m in sys.modules))"
    out = subprocess.run([sys.executable, "-c", probe], check=True, capture_output=True, text=True).stdout
    return ast.literal_eval(out.strip().splitlines()[-1])


def test_the_command_line_imports_no_heavy_library():
    assert _imported_after("import guardband.planner.cli") == []


def test_packages_load_their_modules_on_first_use():
    code = ("import guardband, guardband.planner.step, guardband.planner.models, guardband.planner.inputs, "
            "guardband.planner.space, guardband.planner.app.workflow, guardband.planner.app.textable")
    assert _imported_after(code) == ["pydantic"]  # the protocol's models, which every command reads


@pytest.mark.parametrize("example", ["tablet_blend", "dose_combination"])
def test_check_imports_only_what_it_uses(example):
    # the design space needs scipy's LP solver (and its milp, for discrete doses) and linear algebra
    code = ("import sys\nfrom guardband.planner.cli import main\n"
            f"sys.argv = ['guardband', 'check', {str(PROTOCOLS / (example + '.toml'))!r}]\n"
            "try:\n    main()\nexcept SystemExit:\n    pass")
    assert _imported_after(code) == ["pydantic", "scipy.linalg", "scipy.optimize", "scipy.special"]


def test_the_command_does_not_search_installed_distributions_for_pydantic_plugins():
    # pydantic scans every installed distribution's entry points for plugins when it builds its
    # first model (its cache stays None when it did not); the command line uses none
    code = ("import os, sys\nfrom guardband.planner.cli import main\n"
            f"sys.argv = ['guardband', 'check', {str(PROTOCOLS / 'tablet_blend.toml')!r}]\n"
            "try:\n    main()\nexcept SystemExit:\n    pass\n"
            "from pydantic.plugin import _loader\n"
            "print(os.environ.get('PYDANTIC_DISABLE_PLUGINS'), _loader._plugins is not None)")

    def run(env_value):
        env = {k: v for k, v in __import__("os").environ.items() if k != "PYDANTIC_DISABLE_PLUGINS"}
        if env_value is not None:
            env["PYDANTIC_DISABLE_PLUGINS"] = env_value
        out = subprocess.run([sys.executable, "-c", code], check=True, capture_output=True, text=True, env=env)
        return out.stdout.strip().splitlines()[-1]

    assert run(None) == "__all__ False"
    assert run("some_plugin") == "some_plugin True"  # a value the user set is kept (and plugins searched)
