"""Shared test set-up: the same random draws in every test, whichever ran before it."""

import numpy as np
import pytest


@pytest.fixture(autouse=True)
def _fresh_module_rng(request):
    """A test module that sets ``RNG_SEED`` gets a new ``RNG`` from it before each test, so a
    test's draws do not depend on which tests ran earlier in its process (pytest-xdist splits
    modules between workers differently from run to run)."""
    seed = getattr(request.module, "RNG_SEED", None)
    if seed is not None:
        request.module.RNG = np.random.default_rng(seed)
