"""Shared pytest fixtures and helpers for pmap's tests."""

from __future__ import annotations

import os

import dask
import numpy as np
import pytest

os.environ.setdefault("MPLBACKEND", "Agg")


class ComputeCounter:
    """A dask scheduler that counts (and optionally forbids) computations."""

    def __init__(self, forbid: bool = True):
        self.forbid = forbid
        self.count = 0

    def __call__(self, dsk, keys, **kwargs):
        self.count += 1
        if self.forbid:
            raise AssertionError("a dask computation ran while building a graph")
        return dask.get(dsk, keys, **kwargs)


@pytest.fixture
def no_compute():
    """Within the test, any dask compute raises (proves laziness)."""
    counter = ComputeCounter(forbid=True)
    with dask.config.set(scheduler=counter):
        yield counter


@pytest.fixture
def rng():
    """A seeded random generator."""
    return np.random.default_rng(12345)
