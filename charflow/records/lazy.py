"""Modules bound now and executed on first use, for start-up time (never to dodge a cycle).

A module that needs a heavy library (matplotlib) only on a rare path binds the charflow
module holding that path with ``deferred``: the common path then never loads the library.
"""

from __future__ import annotations

import importlib.util
import sys
import types


def deferred(name: str) -> types.ModuleType:
    """The module ``name``, executed when one of its attributes is first used."""
    if name in sys.modules:
        return sys.modules[name]
    spec = importlib.util.find_spec(name)
    if spec is None or spec.loader is None:
        raise ModuleNotFoundError(f"no module named {name!r}", name=name)
    spec.loader = importlib.util.LazyLoader(spec.loader)
    module = importlib.util.module_from_spec(spec)
    sys.modules[name] = module
    spec.loader.exec_module(module)
    return module
