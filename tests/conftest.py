"""Shared fixtures."""

from __future__ import annotations

import logging

import pytest


@pytest.fixture(scope="session")
def dask_scheduler():
    """Address of a dask.distributed LocalCluster on 127.0.0.1: two worker processes, one thread each."""
    distributed = pytest.importorskip("distributed")
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                                  dashboard_address=None, silence_logs=logging.ERROR) as cluster:
        yield cluster.scheduler_address
