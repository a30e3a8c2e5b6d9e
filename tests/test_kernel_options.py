"""Compile options every numba kernel shares."""

import importlib
import pkgutil

import pytest
from numba.core.registry import CPUDispatcher

import fieldfix

KERNEL_MODULES = sorted(m.name for m in pkgutil.iter_modules(fieldfix.__path__) if m.name.endswith("_kernels"))


def _dispatchers(module):
    for name, value in vars(module).items():
        if isinstance(value, CPUDispatcher) and value.py_func.__module__ == module.__name__:
            yield name, value


@pytest.mark.parametrize("name", KERNEL_MODULES)
def test_every_kernel_releases_the_gil(name):
    # The streaming unwarp reads and writes in two threads beside the kernels, and dask workers
    # may run several tasks as threads: a kernel that held the GIL would stall them all.
    # Inlined helpers take their caller's options, so only the others are checked.
    module = importlib.import_module(f"fieldfix.{name}")
    kernels = [(n, d) for n, d in _dispatchers(module) if d.targetoptions.get("inline", "never") != "always"]
    assert kernels, f"no compiled kernels found in {name}"
    holding = [n for n, d in kernels if not d.targetoptions.get("nogil")]
    assert not holding, f"{name}: compiled without nogil=True: {', '.join(holding)}"
