"""Package exports resolved on first use (PEP 562).

A package ``__init__`` that re-exports from its submodules would import all of them, and with
them xarray, dask, pandas, rasterio and pystac, although ``scanshelf migrate``, ``scanshelf
--help`` and every dask worker need only a few. ``exports`` gives a package a module
``__getattr__`` that imports the defining submodule when a name is first asked for.
"""

from __future__ import annotations

import importlib
from collections.abc import Callable, Mapping
from typing import Any


def exports(package: str, homes: Mapping[str, str]) -> tuple[Callable[[str], Any], Callable[[], list[str]]]:
    """``__getattr__`` and ``__dir__`` for ``package``; ``homes`` maps each public name to its module."""

    def __getattr__(name: str) -> Any:
        home = homes.get(name)
        if home is None:
            raise AttributeError(f"module {package!r} has no attribute {name!r}")
        value = getattr(importlib.import_module(home), name)
        setattr(importlib.import_module(package), name, value)
        return value

    def __dir__() -> list[str]:
        return sorted(set(vars(importlib.import_module(package))) | set(homes))

    return __getattr__, __dir__
