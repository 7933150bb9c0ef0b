"""Shared fixtures: a reproducible random sample of European options over the ranges the kernel must cover."""

from __future__ import annotations

from collections.abc import Callable

import pytest
from option_sample import OptionSample, random_options


@pytest.fixture(scope="session")
def make_options() -> Callable[[int, int], OptionSample]:
    """Factory of reproducible random option samples: make_options(n, seed)."""
    return random_options
