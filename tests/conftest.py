"""Shared pytest configuration: the ``--runslow`` flag and common fixtures."""

import os

import numpy as np
import pytest

os.environ.setdefault("MPLBACKEND", "agg")


def pytest_addoption(parser):
    parser.addoption("--runslow", action="store_true", default=False,
                     help="also run tests marked slow")


def pytest_collection_modifyitems(config, items):
    if config.getoption("--runslow"):
        return
    skip = pytest.mark.skip(reason="slow: use --runslow")
    for item in items:
        if "slow" in item.keywords:
            item.add_marker(skip)


@pytest.fixture
def rng():
    return np.random.default_rng(20261201)


@pytest.fixture(autouse=True)
def _isolated_cache(tmp_path_factory, monkeypatch):
    """Each test session uses one private table cache, never the user's."""
    cache = tmp_path_factory.getbasetemp() / "kinkfit-cache"
    monkeypatch.setenv("KINKFIT_CACHE_DIR", str(cache))
