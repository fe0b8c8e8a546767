"""``ocrbench run`` against clusters as users meet them, and Ctrl-C, through the real command line.

* A cluster started with Dask's own command-line entry points (``python -m distributed.cli.dask_scheduler``
  and ``python -m distributed.cli.dask_worker``, what the ``dask scheduler`` / ``dask worker`` commands
  run), scheduler and workers as separate processes, reached with ``--scheduler``: every page read once.
* Scheduler addresses checked before any connection; a refused port fails at once, not after the
  connect timeout; ``--workers`` beyond what the machine's cores can use is refused with a clear line.
* Ctrl-C (SIGINT to the whole process group, as a terminal sends it) on ``run`` and ``run --workers 2``:
  exit 130, one ``ocrbench:`` line, no traceback from any process, no process left, a whole store, and
  the rerun finishes the rest with every page once.

References: POSIX process groups (a terminal's Ctrl-C signals the foreground group, kill(2) with a
negative pid does the same); exit status 128 + 2 for SIGINT is the shell convention (common practice).
"""

from __future__ import annotations

import json
import os
import signal
import socket
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import pytest

from _scaleout_support import assert_whole_pages, done_pages, group_alive, small_pages, tiny_cards
from ocrbench.run.engine import RunOptions, run_pages
from ocrbench.store import RunStore

ROOT = Path(__file__).resolve().parents[1]
ENV = {**os.environ, "PYTHONPATH": os.pathsep.join([str(ROOT), os.environ.get("PYTHONPATH", "")]).rstrip(os.pathsep)}
N_PAGES = 6


@pytest.fixture(scope="module")
def pages(tmp_path_factory) -> Path:
    return small_pages(tmp_path_factory.mktemp("pages"), N_PAGES, seed=61)


@pytest.fixture(scope="module")
def cards(tmp_path_factory):
    return tiny_cards(tmp_path_factory.mktemp("models"))


@pytest.fixture(scope="module")
def reference(pages, cards, tmp_path_factory) -> list[dict]:
    db = tmp_path_factory.mktemp("ref") / "ref.sqlite"
    s = run_pages(pages, cards[:1], store=db, options=RunOptions(prefetch=False))
    with RunStore(db) as st:
        return st.page_texts(s.recognisers[0].run_id)


def ocrbench(*args: str, timeout: float = 300) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "ocrbench", *args], env=ENV, capture_output=True, text=True,
                          timeout=timeout)


def free_port() -> int:
    """A port nothing listens on: bound and released at once (the kernel refuses connections to it)."""
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def one_line(stderr: str, *, progress: bool = False) -> str:
    """The one ``ocrbench:`` line on stderr; with ``progress`` the progress bar's last state may stand beside it."""
    lines = [ln for ln in stderr.splitlines() if ln.strip() and (not progress or ln.startswith("ocrbench"))]
    assert len(lines) == 1 and lines[0].startswith("ocrbench: ") and "Traceback" not in stderr, stderr
    return lines[0]


# --------------------------------------------------------------------------- addresses and bounds


@pytest.mark.parametrize("address,words", [("not-a-url", "no scheme"),
                                           ("tcp://127.0.0.1:notaport", "port 'notaport'"),
                                           ("http://127.0.0.1:8786", "scheme 'http'")])
def test_scheduler_address_is_checked_before_connecting(pages, cards, tmp_path, address, words):
    res = ocrbench("run", str(pages), "-r", str(cards[0].path), "--store", str(tmp_path / "s.sqlite"),
                   "--scheduler", address)
    assert res.returncode == 2
    line = one_line(res.stderr)
    assert address in line and words in line and "tcp://HOST:PORT" in line


def test_a_refused_port_fails_at_once_not_after_the_timeout(pages, cards, tmp_path):
    timeout = 60.0
    t0 = time.perf_counter()
    res = ocrbench("run", str(pages), "-r", str(cards[0].path), "--store", str(tmp_path / "s.sqlite"),
                   "--scheduler", f"tcp://127.0.0.1:{free_port()}", "--connect-timeout", str(timeout))
    took = time.perf_counter() - t0
    assert res.returncode == 2 and "connection refused" in one_line(res.stderr, progress=True)
    assert took < timeout                       # refused is known at once; the timeout is for silence
    with RunStore(tmp_path / "s.sqlite", read_only=True) as st:
        assert st.run_ids() == []


def test_too_many_local_workers_are_refused_before_any_starts(pages, cards, tmp_path):
    cores = os.cpu_count() or 1
    res = ocrbench("run", str(pages), "-r", str(cards[0].path), "--store", str(tmp_path / "s.sqlite"),
                   "--workers", "1000")
    assert res.returncode == 2
    line = one_line(res.stderr)
    assert f"{cores} cores" in line and f"--workers {2 * cores} or fewer" in line
    from ocrbench.errors import OcrbenchError
    from ocrbench.run.distributed import DaskOptions

    DaskOptions(workers=2 * cores)                                        # the cap itself is allowed
    with pytest.raises(OcrbenchError, match="more than this machine can use"):
        DaskOptions(workers=cores, threads_per_worker=3)


# --------------------------------------------------------------------------- a cluster from Dask's own commands


def test_cluster_started_with_dasks_own_commands(pages, cards, reference, tmp_path):
    sched_file = tmp_path / "scheduler.json"
    procs = [subprocess.Popen([sys.executable, "-m", "distributed.cli.dask_scheduler", "--host", "127.0.0.1",
                               "--port", "0", "--dashboard-address", "127.0.0.1:0", "--scheduler-file",
                               str(sched_file)], env=ENV, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                              start_new_session=True)]
    try:
        deadline = time.monotonic() + 120
        while not sched_file.exists() and time.monotonic() < deadline:
            time.sleep(0.2)
        address = json.loads(sched_file.read_text())["address"]
        procs.append(subprocess.Popen([sys.executable, "-m", "distributed.cli.dask_worker", address,
                                       "--nworkers", "2", "--nthreads", "1", "--no-dashboard"], env=ENV,
                                      stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, start_new_session=True))
        db = tmp_path / "s.sqlite"
        res = ocrbench("run", str(pages), "-r", str(cards[0].path), "--store", str(db), "--scheduler", address,
                       "--connect-timeout", "120", "--json")
        assert res.returncode == 0, res.stderr
        d = json.loads(res.stdout)
        assert d["pages_total"] == N_PAGES and d["pages_processed"] == N_PAGES
        con = sqlite3.connect(db)
        rows = con.execute("SELECT page_id, status FROM pages").fetchall()
        engine = con.execute("SELECT engine FROM runs").fetchall()
        con.close()
        assert sorted(rows) == [(f"page_{i:03d}.png", "done") for i in range(1, N_PAGES + 1)]   # each page once
        assert len(engine) == 1 and f"scheduler {address}" in engine[0][0] and "2 workers" in engine[0][0]
        with RunStore(db) as st:
            assert st.page_texts(1) == reference                          # the same text as the serial runner
    finally:
        for p in reversed(procs):
            os.killpg(p.pid, signal.SIGTERM)
        for p in procs:
            try:
                p.wait(timeout=30)
            except subprocess.TimeoutExpired:
                os.killpg(p.pid, signal.SIGKILL)


# --------------------------------------------------------------------------- Ctrl-C




@pytest.mark.parametrize("extra", [[], ["--workers", "2"]], ids=["serial", "workers"])
def test_ctrl_c_stops_cleanly_and_the_rerun_finishes(tmp_path, cards, extra):
    pages = small_pages(tmp_path / "pages", 30, seed=71, lines=4)
    db = tmp_path / "s.sqlite"
    cmd = [sys.executable, "-m", "ocrbench", "run", str(pages), "-r", str(cards[1].path), "--store", str(db), *extra]
    p = subprocess.Popen(cmd, env=ENV, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                         start_new_session=True)
    deadline = time.monotonic() + 240
    while done_pages(db) < 2 and p.poll() is None and time.monotonic() < deadline:
        time.sleep(0.1)
    assert p.poll() is None, p.communicate()
    os.killpg(p.pid, signal.SIGINT)                                        # what a terminal's Ctrl-C does
    out, err = p.communicate(timeout=120)
    assert p.returncode == 130, err
    assert "Traceback" not in err and "KeyboardInterrupt" not in err, err
    lines = [ln for ln in err.splitlines() if ln.startswith("ocrbench: ")]
    assert lines == ["ocrbench: interrupted; finished pages are in the store: rerun the same command to resume"]
    deadline = time.monotonic() + 30
    while group_alive(p.pid) and time.monotonic() < deadline:               # workers closed with the run
        time.sleep(0.2)
    assert not group_alive(p.pid)
    done = assert_whole_pages(db)[1]
    assert 2 <= len(done) < 30
    res = subprocess.run(cmd + ["--json"], env=ENV, capture_output=True, text=True, timeout=600)
    assert res.returncode == 0, res.stderr
    d = json.loads(res.stdout)
    assert d["pages_skipped"] == len(done) and d["pages_processed"] == 30 - len(done)
    assert len(assert_whole_pages(db)[1]) == 30
