"""Package names that load their module on first use (PEP 562), so that importing a
package does not import the heavy libraries of modules a command never uses."""

from __future__ import annotations

import importlib
import sys

__all__ = ["lazy_names"]


def lazy_names(package: str, table: dict):
    """``(__getattr__, __dir__)`` for a package whose public names load on first use.

    Parameters
    ----------
    package : str
        The package's own ``__name__``.
    table : dict
        Public name -> the module that defines it, or ``(module, attribute)``
        when the name differs there.
    """

    def __getattr__(name: str):
        target = table.get(name)
        if target is None:
            raise AttributeError(f"module {package!r} has no attribute {name!r}")
        module, attr = target if isinstance(target, tuple) else (target, name)
        value = getattr(importlib.import_module(module), attr)
        setattr(sys.modules[package], name, value)
        return value

    def __dir__() -> list[str]:
        return sorted(set(table) | set(getattr(sys.modules[package], "__all__", ())))

    return __getattr__, __dir__
