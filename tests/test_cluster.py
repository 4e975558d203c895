"""PSA on a Dask cluster gives exactly the serial results for the same seed."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from caredecide.errors import RunOptionError
from caredecide.uncertainty.cluster import ClusterError, dask_client, dask_map
from caredecide.uncertainty.psa import analyse_uncertainty
from tests.conftest import load_dict
from tests.test_psa import uncertain_model_dict

distributed = pytest.importorskip("distributed")


@pytest.fixture(scope="module")
def client():
    with (
        distributed.LocalCluster(
            processes=False, n_workers=1, threads_per_worker=2, dashboard_address=None
        ) as cluster,
        distributed.Client(cluster) as dask,
    ):
        yield dask


def test_dask_run_equals_serial_run(client):
    model = load_dict(uncertain_model_dict())
    serial = analyse_uncertainty(model, 300, seed=77, chunk_size=300, n_frequent=0)
    done = []
    on_dask = analyse_uncertainty(
        model,
        300,
        seed=77,
        chunk_size=45,
        n_frequent=0,
        map_chunks=dask_map(client, max_in_flight=3),
        progress=lambda d, n: done.append(d),
    )
    for name in (
        "parameters",
        "optimal",
        "candidate_totals",
        "action_counts",
        "distinct_policies",
        "distinct_counts",
    ):
        np.testing.assert_array_equal(getattr(on_dask, name), getattr(serial, name), err_msg=name)
    pd.testing.assert_frame_equal(on_dask.evppi(), serial.evppi())
    assert done == [45, 90, 135, 180, 225, 270, 300]  # in draw order


def test_dask_client_needs_exactly_one_of_scheduler_or_workers():
    with pytest.raises(ClusterError, match=r"exactly one of a scheduler address or a number"):
        with dask_client():
            pass
    with pytest.raises(ClusterError, match=r"exactly one of"):
        with dask_client("tcp://127.0.0.1:1", 2):
            pass


def test_dask_client_refuses_zero_workers():
    with pytest.raises(
        RunOptionError, match=r"workers = 0 is not allowed; expected a whole number >= 1"
    ):
        with dask_client(workers=0):
            pass


def test_dask_client_names_an_unreachable_scheduler():
    # Port 1 on loopback: nothing listens there.
    with pytest.raises(
        ClusterError,
        match=r"could not reach the Dask scheduler at "
        r"'tcp://127\.0\.0\.1:1'",
    ):
        with dask_client("tcp://127.0.0.1:1", connect_timeout="1s"):
            pass


@pytest.mark.parametrize("timeout", ["soon", "0s", "-1s"])
def test_dask_client_refuses_a_bad_connect_timeout(timeout):
    with pytest.raises(ClusterError, match=r"connect timeout .*; expected a positive duration"):
        with dask_client("tcp://127.0.0.1:1", connect_timeout=timeout):
            pass
