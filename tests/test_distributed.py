"""The Dask engine: same pages and texts as the serial runner, recognisers opened once per worker,
a bounded number of tasks in flight, resume across engines, and the run command's cluster options.

Reference for every text check: the serial runner (ocrbench.run.engine.run_pages), which
tests/test_runner.py checks against bare onnxruntime; scale-out must not change what is read.
"""

from __future__ import annotations

import json
import sqlite3
from pathlib import Path

import pytest
from typer.testing import CliRunner

from _scaleout_support import assert_whole_pages, small_pages, tiny_cards
from ocrbench.cli.app import app
from ocrbench.run.distributed import DaskOptions, recogniser_loads, run_distributed
from ocrbench.errors import ClusterError, OcrbenchError
from ocrbench.run.engine import RunOptions, run_pages
from ocrbench.store import RunStore

N_PAGES = 6


@pytest.fixture(scope="module")
def pages(tmp_path_factory) -> Path:
    return small_pages(tmp_path_factory.mktemp("pages"), N_PAGES)


@pytest.fixture(scope="module")
def cards(tmp_path_factory):
    return tiny_cards(tmp_path_factory.mktemp("models"))


@pytest.fixture(scope="module")
def serial(pages, cards, tmp_path_factory) -> dict:
    """The serial runner's texts and layout of the same pages (the reference)."""
    db = tmp_path_factory.mktemp("serial") / "s.sqlite"
    s = run_pages(pages, cards, store=db, options=RunOptions(prefetch=False))
    with RunStore(db) as st:
        f = st.read_frames()
        return {"texts": [st.page_texts(r.run_id) for r in s.recognisers],
                "boxes": f["lines"][["page_id", "line_no", "x0", "y0", "x1", "y1", "width_px", "steps"]]
                .sort_values(["page_id", "line_no"]).drop_duplicates().reset_index(drop=True)}


@pytest.fixture(scope="module")
def cluster():
    """A LocalCluster of two worker processes, reached by address like an existing cluster (--scheduler)."""
    from distributed import Client, LocalCluster

    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address="127.0.0.1:0",
                      silence_logs=50) as c, Client(c) as client:
        yield c, client


def texts(db: Path) -> list[dict]:
    with RunStore(db) as st:
        return [st.page_texts(r) for r in st.run_ids()]


@pytest.mark.slow
def test_dask_run_reads_what_the_serial_runner_reads(pages, cards, serial, cluster, tmp_path):
    c, client = cluster
    db = tmp_path / "d.sqlite"
    events = []
    s = run_distributed(pages, cards, store=db, dask=DaskOptions(scheduler=c.scheduler_address),
                        progress=events.append)
    assert s.pages_total == N_PAGES and s.pages_processed == N_PAGES and not s.failed_pages
    assert all(r.pages_done == N_PAGES and not r.resumed for r in s.recognisers)
    assert texts(db) == serial["texts"]
    with RunStore(db) as st:
        f = st.read_frames()
        boxes = (f["lines"][["page_id", "line_no", "x0", "y0", "x1", "y1", "width_px", "steps"]]
                 .sort_values(["page_id", "line_no"]).drop_duplicates().reset_index(drop=True))
        assert boxes.equals(serial["boxes"])
        for r in s.recognisers:
            info = st.run_info(r.run_id)
            assert info.engine.startswith("dask ") and "2 workers" in info.engine
            assert info.host["dask"]["workers"] == 2 and info.host["cores"] >= 1
    assert_whole_pages(db)
    # progress: one start, then one event per page, counting up to the total
    assert events[0].kind == "start" and [e.pages_done for e in events[1:]] == list(range(1, N_PAGES + 1))
    assert sorted(e.page_id for e in events[1:]) == sorted(p.name for p in pages.glob("*.png"))


@pytest.mark.slow
def test_each_worker_opens_each_recogniser_once(pages, cards, cluster, tmp_path):
    c, client = cluster
    before = client.run(recogniser_loads)
    run_distributed(pages, cards, store=tmp_path / "a.sqlite", dask=DaskOptions(scheduler=c.scheduler_address))
    run_distributed(pages, cards, store=tmp_path / "b.sqlite", dask=DaskOptions(scheduler=c.scheduler_address))
    loads = client.run(recogniser_loads)
    hashes = {card.card_hash for card in cards}
    # 2 runs x 6 pages went through 2 workers: at most one opening per worker and card, ever
    for worker, counts in loads.items():
        assert set(counts) <= hashes
        assert all(n == 1 for n in counts.values()), (worker, counts)
    assert set().union(*[set(v) for v in loads.values()]) == hashes
    assert before == {} or all(all(n == 1 for n in v.values()) for v in before.values())


@pytest.mark.slow
def test_tasks_in_flight_stay_bounded(pages, cards, cluster, tmp_path):
    c, client = cluster
    seen = []

    def count(ev):
        n = client.run_on_scheduler(
            lambda dask_scheduler: sum(1 for k in dask_scheduler.tasks if "ocrbench-pages" in str(k)))
        seen.append(n)

    run_distributed(pages, cards, store=tmp_path / "w.sqlite", progress=count,
                    dask=DaskOptions(scheduler=c.scheduler_address, max_in_flight=2))
    assert len(seen) == N_PAGES + 1
    # Never more than the window of 2 tasks held by the scheduler (the written one is released first).
    assert 1 <= max(seen) <= 2
    assert client.run_on_scheduler(
        lambda dask_scheduler: sum(1 for k in dask_scheduler.tasks if "ocrbench-pages" in str(k))) == 0


class Stop(Exception):
    pass


def stop_after(n: int):
    def progress(ev):
        if ev.kind == "page" and not ev.skipped and ev.pages_done == n:
            raise Stop()
    return progress


@pytest.mark.slow
def test_a_run_resumes_whichever_engine_ran_it(pages, cards, serial, cluster, tmp_path):
    c, client = cluster
    dask = DaskOptions(scheduler=c.scheduler_address)
    db = tmp_path / "s.sqlite"
    # serial first, stopped after 2 pages; Dask resumes the same runs
    with pytest.raises(Stop):
        run_pages(pages, cards, store=db, progress=stop_after(2), options=RunOptions(prefetch=False))
    s = run_distributed(pages, cards, store=db, dask=dask)
    assert all(r.resumed and r.pages_new == N_PAGES - 2 for r in s.recognisers)
    assert [r.run_id for r in s.recognisers] == [1, 2] and s.pages_skipped == 2
    rows = sqlite3.connect(db).execute("SELECT engine FROM runs ORDER BY run_id").fetchall()
    assert all(e.startswith("dask ") for (e,) in rows)          # runs.engine: the engine that ran it last
    assert texts(db) == serial["texts"]

    # Dask first, stopped after 2 pages; the serial runner resumes the same runs
    db2 = tmp_path / "s2.sqlite"
    with pytest.raises(Stop):
        run_distributed(pages, cards, store=db2, dask=dask, progress=stop_after(2))
    assert all(n == 2 for n in (len(v) for v in assert_whole_pages(db2).values()))
    s = run_pages(pages, cards, store=db2)
    assert all(r.resumed and r.pages_new == N_PAGES - 2 for r in s.recognisers)
    rows = sqlite3.connect(db2).execute("SELECT engine FROM runs ORDER BY run_id").fetchall()
    assert all(e.startswith("onnxruntime ") for (e,) in rows)
    assert texts(db2) == serial["texts"]
    # Nothing of the stopped run is left on the cluster.
    assert client.run_on_scheduler(
        lambda dask_scheduler: sum(1 for k in dask_scheduler.tasks if "ocrbench-pages" in str(k))) == 0


@pytest.mark.slow
def test_run_command_starts_a_local_cluster(pages, cards, serial, tmp_path):
    db = tmp_path / "c.sqlite"
    args = ["run", str(pages), "-r", str(cards[0].path), "-r", str(cards[1].path), "--store", str(db),
            "--workers", "2", "--threads-per-worker", "1", "--pages-per-task", "2", "--json"]
    res = CliRunner().invoke(app, args)
    assert res.exit_code == 0, res.output
    d = json.loads(res.stdout)
    assert d["pages_total"] == N_PAGES and all(r["pages_done"] == N_PAGES for r in d["recognisers"])
    assert texts(db) == serial["texts"]
    assert "2 workers x 1 threads (local processes)" in sqlite3.connect(db).execute(
        "SELECT engine FROM runs WHERE run_id=1").fetchone()[0]


def test_cluster_options_are_checked():
    with pytest.raises(OcrbenchError, match="not both"):
        DaskOptions(workers=2, scheduler="tcp://127.0.0.1:1")
    with pytest.raises(OcrbenchError, match="at least 1"):
        DaskOptions(workers=0)
    with pytest.raises(OcrbenchError, match="at least 1"):
        DaskOptions(pages_per_task=0)


def test_unreachable_scheduler_is_a_clear_error(pages, cards, tmp_path):
    # Port 9 (discard) on localhost: nothing listens there in a test environment (common practice).
    with pytest.raises(ClusterError, match="cannot reach the Dask scheduler at tcp://127.0.0.1:9"):
        run_distributed(pages, cards, store=tmp_path / "u.sqlite",
                        dask=DaskOptions(scheduler="tcp://127.0.0.1:9", connect_timeout=2))
    with RunStore(tmp_path / "u.sqlite") as st:
        assert st.run_ids() == []                       # nothing started


def test_run_command_cluster_options_need_a_cluster(pages, cards, tmp_path):
    base = ["run", str(pages), "-r", str(cards[0].path), "--store", str(tmp_path / "o.sqlite")]
    for extra in (["--pages-per-task", "2"], ["--no-processes"], ["--threads-per-worker", "2"],
                  ["--workers", "2", "--scheduler", "tcp://127.0.0.1:9"]):
        res = CliRunner().invoke(app, base + extra)
        assert res.exit_code == 2 and res.stderr.startswith("ocrbench: ") and len(res.stderr.splitlines()) == 1
    assert not (tmp_path / "o.sqlite").exists()                  # refused before anything was opened


@pytest.mark.slow
def test_workers_keep_page_buffers_on_the_heap(pages, cards, cluster, tmp_path):
    """Dask starts workers with MALLOC_TRIM_THRESHOLD_=65536 (its distributed.yaml, pre-spawn-environ), which
    makes every page-sized numpy temporary an mmap/munmap: segmentation ran ~2x slower. On an existing cluster
    that sets it, each worker retunes its allocator; a cluster ocrbench starts does not set it at all."""
    import os
    import sys

    from ocrbench.run.distributed import connect, retune_allocator

    _, client = cluster
    run_distributed(pages, cards[:1], store=tmp_path / "a.sqlite", dask=DaskOptions(scheduler=client.scheduler.address))
    on_workers = client.run(lambda: (os.environ.get("MALLOC_TRIM_THRESHOLD_"), retune_allocator()))
    for env, retuned in on_workers.values():
        assert env is not None and int(env) < 16 * 1024 * 1024            # Dask's default reached the worker
        assert retuned is sys.platform.startswith("linux")                # and was undone there (glibc only)
    with connect(DaskOptions(workers=1)) as cl:
        envs = cl.client.run(lambda: os.environ.get("MALLOC_TRIM_THRESHOLD_"))
    assert set(envs.values()) == {os.environ.get("MALLOC_TRIM_THRESHOLD_")}   # nothing added by ocrbench


def test_pages_per_task_by_default():
    from ocrbench.run.distributed import auto_pages_per_task

    # one thread: as many pages a task as allowed (only a task's first page is not pipelined)
    assert [auto_pages_per_task(n, 1) for n in (1, 5, 48, 1000)] == [1, 5, 32, 32]
    # several threads: about four tasks each, so they stay evenly busy to the end
    assert [auto_pages_per_task(n, 2) for n in (1, 6, 12, 48, 200, 1000)] == [1, 1, 2, 6, 25, 32]
    assert auto_pages_per_task(48, 14) == 1


@pytest.mark.parametrize("per_task", [1, 3, None])
def test_pipelined_chunks_read_what_the_serial_runner_reads(pages, cards, serial, tmp_path, per_task):
    db = tmp_path / "p.sqlite"
    s = run_distributed(pages, cards, store=db, options=RunOptions(prefetch=True),
                        dask=DaskOptions(workers=1, processes=False, pages_per_task=per_task))
    assert s.pages_processed == N_PAGES and not s.failed_pages
    assert texts(db) == serial["texts"]
    assert all(len(d) == N_PAGES for d in assert_whole_pages(db).values())


class KillOnPage:
    """Post-processing that ends its worker process on one page (known by its recognised text)."""

    def __init__(self, texts: list[str]):
        self.texts = texts

    def __call__(self, texts, confidences):
        import os

        if list(texts) == self.texts:
            os._exit(3)                           # as a worker killed for memory would vanish
        return list(texts)


def test_a_page_that_kills_its_workers_fails_alone_not_its_whole_task(pages, cards, serial, tmp_path):
    import dask

    killer = "page_002.png"
    db = tmp_path / "k.sqlite"
    # allowed-failures 0: a task is given up after its first worker death (Dask's scheduler setting); one task in
    # flight, so no other task shares the worker when it dies; two workers, so one is up while the other restarts
    with dask.config.set({"distributed.scheduler.allowed-failures": 0}):
        s = run_distributed(pages, cards[:1], store=db, postprocess=KillOnPage(serial["texts"][0][killer]),
                            dask=DaskOptions(workers=2, pages_per_task=3, max_in_flight=1))
    assert s.failed_pages == [killer]
    err = dict(s.recognisers[0].failures)[killer]
    assert "died" in err
    with RunStore(db) as st:
        assert set(st.done_page_ids(1)) == set(serial["texts"][0]) - {killer}   # its task's other pages are done


def test_a_worker_checks_the_card_hash_without_validating_again(tmp_path):
    """The worker's cheap check (card_hash_on_disk: no second validation, no onnx import) gives the hash
    load_card gives, and a copy whose files changed is refused, naming the card."""
    import dataclasses
    import shutil

    from ocrbench.errors import CardError
    from ocrbench.recognisers.base import EngineOptions
    from ocrbench.recognisers.card import card_hash_on_disk, load_card
    from ocrbench.run.distributed import worker_recogniser

    cards = tiny_cards(tmp_path / "models")
    for card in cards:
        assert card_hash_on_disk(card) == card.card_hash
    copy = tmp_path / "copy"
    shutil.copytree(cards[0].folder, copy)
    card = load_card(copy)
    assert card.card_hash == cards[0].card_hash      # same bytes, same hash, wherever the folder is
    alphabet = card.files["alphabet"]
    alphabet.write_bytes(alphabet.read_bytes() + b"\n")   # the worker's copy now differs from the client's
    # engine options no other test uses: this process's cache of opened recognisers has no entry for them
    options = RunOptions(engine=EngineOptions(batch_size=7))
    with pytest.raises(ClusterError, match="differs from the client's") as e:
        worker_recogniser(card, options)
    assert str(card.path) in str(e.value)
    alphabet.unlink()
    with pytest.raises(CardError, match="cannot read it"):
        card_hash_on_disk(dataclasses.replace(card))


@pytest.mark.slow
def test_workers_read_pages_without_importing_onnx(pages, cards, tmp_path):
    """Workers started here open the recognisers with onnxruntime alone (onnx is the validator's, 0.7 s)."""
    import sys

    from distributed import Client, LocalCluster

    with LocalCluster(n_workers=1, threads_per_worker=1, processes=True, dashboard_address="127.0.0.1:0",
                      silence_logs=50) as c, Client(c) as client:
        s = run_distributed(pages, cards, store=tmp_path / "o.sqlite", dask=DaskOptions(scheduler=c.scheduler_address))
        assert not s.failed_pages
        assert set(client.run(lambda: "onnx" in sys.modules).values()) == {False}
        assert set(client.run(lambda: "onnxruntime" in sys.modules).values()) == {True}
