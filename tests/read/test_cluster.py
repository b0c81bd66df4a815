"""The page work on a real Dask cluster (distributed.LocalCluster, two worker processes)."""

import os
import signal
import sqlite3
import threading
import time

import distributed  # noqa: E402  (the dask extra is a test dependency: never skipped)
import pytest
from readkit import demo_layout, readings, write_copies

from formread.errors import ClusterError
from formread.read.batch import read_batch

# distributed's own sockets and dashboard may warn while clusters start and stop; they are not formread's
pytestmark = [pytest.mark.filterwarnings("ignore::ResourceWarning"),
              pytest.mark.filterwarnings("ignore::pytest.PytestUnraisableExceptionWarning"),
              pytest.mark.filterwarnings("ignore::UserWarning:distributed.*"),
              pytest.mark.filterwarnings("ignore::DeprecationWarning")]


def _cluster():
    return distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=":0")


@pytest.fixture(scope="module")
def cluster():
    with _cluster() as c:
        yield c


def _rows(out):
    conn = sqlite3.connect(out / "ledger.sqlite")
    try:
        return conn.execute("SELECT content_hash, count(*) FROM pages GROUP BY content_hash").fetchall()
    except sqlite3.OperationalError:        # the ledger is being made
        return []
    finally:
        conn.close()


def test_readings_on_the_cluster_equal_a_local_run(tmp_path, cluster):
    scans = write_copies(tmp_path / "scans", 6)
    local, remote = tmp_path / "local", tmp_path / "remote"
    read_batch(scans, demo_layout(), local, workers=1)
    rep = read_batch(scans, demo_layout(), remote, scheduler=cluster.scheduler_address)
    assert rep.read == 6 and readings(remote) == readings(local)
    # and with the scans' bytes sent instead of their paths
    sent = tmp_path / "sent"
    read_batch(scans, demo_layout(), sent, scheduler=cluster.scheduler_address, send_bytes=True)
    assert readings(sent) == readings(local)
    # a second run skips every page already in the ledger
    again = read_batch(scans, demo_layout(), remote, scheduler=cluster.scheduler_address)
    assert (again.read, again.skipped) == (0, 6)


def test_a_worker_killed_mid_batch_loses_nothing_and_writes_nothing_twice(tmp_path):
    scans = write_copies(tmp_path / "scans", 12)
    out = tmp_path / "out"
    with _cluster() as c:
        with distributed.Client(c) as client:
            pids = list(client.run(os.getpid).values())
        result = {}
        t = threading.Thread(target=lambda: result.setdefault(
            "rep", read_batch(scans, demo_layout(), out, scheduler=c.scheduler_address)))
        t.start()
        deadline = time.monotonic() + 120
        while time.monotonic() < deadline and not ((out / "ledger.sqlite").exists() and _rows(out)):
            time.sleep(0.2)
        os.kill(pids[0], signal.SIGKILL)                    # a worker dies with tasks in hand
        t.join(timeout=300)
        assert not t.is_alive()
    rows = _rows(out)
    assert len(rows) == 12 and all(n == 1 for _, n in rows)
    assert result["rep"].read == 12


def test_an_unreachable_scheduler_is_one_line_before_any_page(tmp_path):
    scans = write_copies(tmp_path / "scans", 1)
    with pytest.raises(ClusterError, match="cannot reach the Dask scheduler") as e:
        read_batch(scans, demo_layout(), tmp_path / "out", scheduler="tcp://127.0.0.1:9")
    assert "\n" not in str(e.value)
    assert not (tmp_path / "out").exists()
