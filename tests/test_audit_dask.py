"""``areamc audit --scheduler``: a real Dask distributed cluster on loopback, started and closed here,
gives the results of the local run to the bit (the jobs' command lines travel; results come back as
JSON rows and metadata)."""

from __future__ import annotations

import os
import subprocess
import sys

import pytest

from test_audit import EVERY_KIND, _run, make_county, read_results, write_plan

distributed = pytest.importorskip("distributed", reason="Dask distributed is not installed (pip install 'areamc[dask]')")


#: The cluster runs in a process of its own, and so does every audit that talks to it: a Dask client or
#: cluster leaves threads behind in the process that made it, and areamc's worker pools then start by
#: "spawn" instead of "fork" (areamc.parallel), which would slow every later test of this session.
CLUSTER = """
import sys
import distributed
with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                              dashboard_address=None) as cluster:
    print(cluster.scheduler_address, flush=True)
    sys.stdin.read()
"""


def _areamc(argv):
    proc = subprocess.run([sys.executable, "-m", "areamc", *map(str, argv)], capture_output=True, text=True,
                          timeout=600)
    return proc.returncode, proc.stdout, proc.stderr


@pytest.fixture(scope="module")
def cluster():
    proc = subprocess.Popen([sys.executable, "-c", CLUSTER], stdin=subprocess.PIPE, stdout=subprocess.PIPE,
                            text=True)
    try:
        address = proc.stdout.readline().strip()
        assert address.startswith("tcp://127.0.0.1:"), address
        yield address
    finally:
        proc.stdin.close()
        try:
            proc.wait(timeout=60)
        except subprocess.TimeoutExpired:
            proc.kill()


def test_audit__dask_local_cluster__results_identical_to_the_local_run(tmp_path, cluster):
    make_county(str(tmp_path))
    plan = write_plan(str(tmp_path), EVERY_KIND)
    local, remote = str(tmp_path / "local"), str(tmp_path / "dask")
    rc, out, err = _run(["audit", plan, "--output-dir", local, "--quiet"])
    assert rc == 0, err
    rc, out, err = _areamc(["audit", plan, "--output-dir", remote, "--quiet", "--scheduler", cluster])
    assert rc == 0, err
    expected, got = read_results(local), read_results(remote)
    assert got["manifest"].pop("scheduler") == cluster
    assert expected["manifest"].pop("scheduler") is None
    for kind in ("csv", "json", "gpkg", "descriptions", "manifest"):
        assert got[kind] == expected[kind], kind  # the folders' names appear only in report.html
    with open(os.path.join(local, "results.csv"), "rb") as a, open(os.path.join(remote, "results.csv"), "rb") as b:
        assert a.read() == b.read()  # the CSV to the byte: every float as the local run wrote it


def test_audit__unreachable_scheduler__refused_before_any_work(tmp_path):
    make_county(str(tmp_path))
    plan = write_plan(str(tmp_path), EVERY_KIND)
    before = sorted(os.listdir(tmp_path))
    # port 1 (tcpmux) on loopback: nothing listens there on a test machine (common practice)
    rc, out, err = _areamc(["audit", plan, "--scheduler", "tcp://127.0.0.1:1"])
    lines = [line for line in err.splitlines() if not line.startswith(("areamc: warning:", "areamc: note:"))]
    assert rc == 2 and out == "" and "Traceback" not in err, err
    assert len(lines) == 1 and "--scheduler tcp://127.0.0.1:1: cannot reach the scheduler" in lines[0], err
    assert sorted(os.listdir(tmp_path)) == before  # no results folder, nothing written
