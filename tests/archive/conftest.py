"""Shared fixtures for the archive tests."""

from __future__ import annotations

import multiprocessing
from concurrent.futures import ProcessPoolExecutor

import pytest


@pytest.fixture(scope="session")
def spawn_pool():
    """One spawned worker process shared by the pickling tests (spawn: no inherited state)."""
    pool = ProcessPoolExecutor(max_workers=1, mp_context=multiprocessing.get_context("spawn"))
    yield pool
    pool.shutdown(wait=True, cancel_futures=True)
