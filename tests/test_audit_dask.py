"""``areamc audit --scheduler``: a real Dask distributed cluster on loopback, started and closed here,
gives the results of the local run to the bit (the jobs' command lines travel; results come back as
JSON rows and metadata)."""

from __future__ import annotations

import os

import pytest

from test_audit import EVERY_KIND, _run, make_county, read_results, write_plan

distributed = pytest.importorskip("distributed", reason="Dask distributed is not installed (pip install 'areamc[dask]')")


@pytest.fixture(scope="module")
def cluster():
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                                  dashboard_address=None) as running:
        yield running


def test_audit__dask_local_cluster__results_identical_to_the_local_run(tmp_path, cluster):
    make_county(str(tmp_path))
    # workers = 1: with the cluster's threads in this process, a local pool would start by spawn (slow);
    # results are the same for any number of workers (tests/test_parallel.py)
    plan = write_plan(str(tmp_path), EVERY_KIND)
    local, remote = str(tmp_path / "local"), str(tmp_path / "dask")
    rc, out, err = _run(["audit", plan, "--output-dir", local, "--quiet"])
    assert rc == 0, err
    rc, out, err = _run(["audit", plan, "--output-dir", remote, "--quiet", "--scheduler", cluster.scheduler_address])
    assert rc == 0, err
    expected, got = read_results(local), read_results(remote)
    assert got["manifest"].pop("scheduler") == cluster.scheduler_address
    assert expected["manifest"].pop("scheduler") is None
    for kind in ("csv", "json", "gpkg", "descriptions", "manifest"):
        assert got[kind] == expected[kind], kind  # the folders' names appear only in report.html
    with open(os.path.join(local, "results.csv"), "rb") as a, open(os.path.join(remote, "results.csv"), "rb") as b:
        assert a.read() == b.read()  # the CSV to the byte: every float as the local run wrote it


def test_audit__unreachable_scheduler__refused_before_any_work(capsys, tmp_path):
    from conftest import assert_refused

    make_county(str(tmp_path))
    plan = write_plan(str(tmp_path), EVERY_KIND)
    # port 1 (tcpmux) on loopback: nothing listens there on a test machine (common practice)
    assert_refused(capsys, ["audit", plan, "--scheduler", "tcp://127.0.0.1:1"],
                   r"--scheduler tcp://127\.0\.0\.1:1: cannot reach the scheduler", tmp_path)
