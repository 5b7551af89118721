"""Run a benchmark against another checkout of Guardband in the same run (side by side).

The speed benchmarks take ``--reference DIR``: a checkout of the code to
compare with, for example the main branch in a second worktree::

    git worktree add ../guardband-main main
    python benchmarks/step_time.py --reference ../guardband-main

The installed package maps the repository's folders onto one import name
(``guardband``, ``guardband.planner`` = planner/, ...; see pyproject.toml).
:func:`import_root` builds the same mapping for DIR out of symbolic links in
a temporary folder; a process started with that folder first on
``PYTHONPATH`` (and not started in a repository root) imports DIR's code
with the libraries of the current environment.
"""

from __future__ import annotations

import atexit
import os
import shutil
import tempfile
from pathlib import Path

__all__ = ["import_root", "environment"]

#: import name -> the checkout's folder (pyproject.toml, [tool.setuptools] package-dir)
_FOLDERS = {"planner": "planner", "safety": "safety", "protocols": "protocols"}


def import_root(checkout: Path) -> Path:
    """A temporary folder whose ``guardband`` package is the checkout's code (removed at exit)."""
    checkout = Path(checkout).resolve()
    if not (checkout / "guardband" / "__init__.py").is_file() or not (checkout / "planner").is_dir():
        raise SystemExit(f"{checkout} is not a Guardband checkout (no guardband/__init__.py or planner/)")
    root = Path(tempfile.mkdtemp(prefix="guardband-reference-"))
    atexit.register(shutil.rmtree, root, ignore_errors=True)  # links only: rmtree does not follow them
    pkg = root / "guardband"
    pkg.mkdir()
    for item in (checkout / "guardband").iterdir():
        if item.name != "__pycache__":
            (pkg / item.name).symlink_to(item)
    for name, folder in _FOLDERS.items():
        (pkg / name).symlink_to(checkout / folder, target_is_directory=True)
    return root


def environment(root: Path | None) -> dict:
    """The environment of a process that imports the code under ``root`` (None: the installed code)."""
    env = dict(os.environ)
    if root is not None:
        env["PYTHONPATH"] = os.pathsep.join([str(root), *filter(None, [env.get("PYTHONPATH")])])
    return env
