"""Faults a long run must survive, each caused for real (no mocks):

* the whole run killed with SIGKILL mid-way, then rerun (serial and Dask engines);
* one Dask worker process killed with SIGKILL mid-run;
* a corrupt ONNX file, a model onnxruntime refuses, a broken card: a clear error before any page runs;
* a full disk (a real file-size limit, RLIMIT_FSIZE, in the run's process) and a read-only store path
  (permissions; as root, the immutable attribute, which binds root too): a clear StoreError, and the
  store is not damaged.

Reference for "not damaged": SQLite's own ``PRAGMA integrity_check`` plus the page/line counts of
tests/_scaleout_support.assert_whole_pages; reference texts come from an undisturbed serial run.
"""

from __future__ import annotations

import hashlib
import os
import resource
import shutil
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

import onnx
import pytest
from onnx import helper

import _tiny_models as tm
from _scaleout_support import assert_whole_pages, done_pages, group_alive, small_pages, tiny_cards
from ocrbench.run.distributed import DaskOptions, run_distributed
from ocrbench.run.engine import RunOptions, run_pages
from ocrbench.store import RunStore

N_PAGES = 12


@pytest.fixture(scope="module")
def pages(tmp_path_factory) -> Path:
    return small_pages(tmp_path_factory.mktemp("pages"), N_PAGES, seed=21)


@pytest.fixture(scope="module")
def cards(tmp_path_factory):
    return tiny_cards(tmp_path_factory.mktemp("models"))


@pytest.fixture(scope="module")
def reference(pages, cards, tmp_path_factory) -> list[dict]:
    """Texts of an undisturbed serial run of the same pages."""
    db = tmp_path_factory.mktemp("ref") / "ref.sqlite"
    s = run_pages(pages, cards, store=db, options=RunOptions(prefetch=False))
    with RunStore(db) as st:
        return [st.page_texts(r.run_id) for r in s.recognisers]


def texts(db: Path) -> list[dict]:
    with RunStore(db) as st:
        return [st.page_texts(r) for r in st.run_ids()]


def run_cmd(pages: Path, cards, db: Path, *extra: str) -> list[str]:
    args = [sys.executable, "-m", "ocrbench", "run", str(pages), "--store", str(db), *extra]
    for c in cards:
        args += ["-r", str(c.path if hasattr(c, "path") else c)]
    return args




# --------------------------------------------------------------------------- kill -9 of the whole run


@pytest.mark.slow
@pytest.mark.parametrize("engine", ["serial", "dask"])
def test_whole_run_killed_then_rerun_holds_every_page_once(engine, pages, cards, reference, tmp_path):
    # SIGKILL cannot be caught: the process and its workers stop at once, mid-page (signal(7)).
    db = tmp_path / "s.sqlite"
    extra = ["--workers", "2"] if engine == "dask" else []
    proc = subprocess.Popen(run_cmd(pages, cards, db, *extra), stdout=subprocess.DEVNULL,
                            stderr=subprocess.DEVNULL, start_new_session=True)
    try:
        deadline = time.monotonic() + 120
        while done_pages(db, run_id=1) < 3 and proc.poll() is None and time.monotonic() < deadline:
            time.sleep(0.02)
    finally:
        os.killpg(proc.pid, signal.SIGKILL)          # the whole run: the command and its worker processes
        proc.wait()
    assert proc.returncode == -signal.SIGKILL
    for _ in range(100):
        if not group_alive(proc.pid):
            break
        time.sleep(0.05)
    assert not group_alive(proc.pid)
    done = assert_whole_pages(db)                    # whatever was written is whole
    n_before = len(done.get(1, ()))
    assert 3 <= n_before < N_PAGES                   # killed mid-way

    rerun = subprocess.run(run_cmd(pages, cards, db, *extra), capture_output=True, text=True, timeout=300)
    assert rerun.returncode == 0, rerun.stderr
    done = assert_whole_pages(db)
    names = {p.name for p in pages.glob("*.png")}
    assert sorted(done) == [1, 2] and all(done[r] == names for r in (1, 2))     # none lost, none extra
    with sqlite3.connect(db) as con:
        assert con.execute("SELECT COUNT(*) FROM runs").fetchone()[0] == 2       # the same two runs resumed
        assert con.execute("SELECT COUNT(*) FROM pages").fetchone()[0] == 2 * N_PAGES
    assert texts(db) == reference


# --------------------------------------------------------------------------- a Dask worker killed


@pytest.mark.slow
def test_a_killed_worker_does_not_lose_a_page(pages, cards, reference, tmp_path):
    from distributed import Client, LocalCluster

    killed = {}
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address="127.0.0.1:0",
                      silence_logs=50) as cluster, Client(cluster) as client:

        def kill_a_busy_worker(ev):
            if ev.kind != "page" or killed:
                return
            busy = [w for w, keys in client.processing().items()
                    if any("ocrbench-pages" in str(k) for k in keys)]
            if not busy:
                return
            pid = client.run(os.getpid, workers=[busy[0]])[busy[0]]
            os.kill(pid, signal.SIGKILL)
            killed.update(worker=busy[0], pid=pid, at=ev.pages_done)

        db = tmp_path / "w.sqlite"
        s = run_distributed(pages, cards, store=db, progress=kill_a_busy_worker,
                            dask=DaskOptions(scheduler=cluster.scheduler_address, max_in_flight=4))
        assert killed and killed["at"] < N_PAGES
        with pytest.raises(ProcessLookupError):
            os.kill(killed["pid"], 0)                 # that worker process is gone
    assert not s.failed_pages
    assert all(r.pages_done == N_PAGES and r.pages_new == N_PAGES for r in s.recognisers)
    done = assert_whole_pages(db)
    assert all(v == {p.name for p in pages.glob("*.png")} for v in done.values())
    assert texts(db) == reference


# --------------------------------------------------------------------------- bad models and cards


def truncated_onnx(folder: Path) -> str:
    f = folder / "model.onnx"
    data = f.read_bytes()
    f.write_bytes(data[: len(data) // 2])
    return "model.onnx"


def unknown_operator(folder: Path) -> str:
    # A well-formed ONNX file that onnxruntime cannot run: an operator from a domain nobody registered.
    m = onnx.load(folder / "model.onnx")
    for n in m.graph.node:
        if n.op_type == "Add":
            n.op_type, n.domain = "NoSuchOp", "org.example.none"
    m.opset_import.append(helper.make_opsetid("org.example.none", 1))
    onnx.save(m, folder / "model.onnx")
    return "model.onnx"


def broken_card(folder: Path) -> str:
    (folder / "card.toml").write_text('name = "tiny-ctc"\nkind = "ctc\n[ctc\n', encoding="utf-8")
    return "card.toml"


def missing_alphabet(folder: Path) -> str:
    (folder / "alphabet.txt").unlink()
    return "alphabet.txt"


@pytest.mark.parametrize("engine", ["serial", "dask"])
@pytest.mark.parametrize("damage", [truncated_onnx, unknown_operator, broken_card, missing_alphabet])
def test_bad_model_or_card_stops_before_any_page(engine, damage, pages, tmp_path):
    from typer.testing import CliRunner

    from ocrbench.cli.app import app

    good = tm.write_seq(tmp_path / "seq")
    bad = tm.write_ctc(tmp_path / "ctc")
    named = damage(bad)
    db = tmp_path / "s.sqlite"
    args = ["run", str(pages), "-r", str(good), "-r", str(bad), "--store", str(db)]
    if engine == "dask":
        args += ["--workers", "1", "--no-processes"]
    res = CliRunner().invoke(app, args)
    assert res.exit_code == 2, res.output
    lines = [ln for ln in res.stderr.splitlines() if ln.startswith("ocrbench:")]
    assert len(lines) == 1 and named in lines[0], res.stderr        # one line, naming the file
    if db.exists():                       # the cards are checked before the store is opened: usually none
        with sqlite3.connect(db) as con:
            assert con.execute("SELECT COUNT(*) FROM pages").fetchone()[0] == 0
            assert con.execute("SELECT COUNT(*) FROM lines").fetchone()[0] == 0


# --------------------------------------------------------------------------- full disk, read-only store


def sha256(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


@pytest.mark.slow
@pytest.mark.parametrize("engine", ["serial", "dask"])
def test_full_disk_is_a_clear_error_and_the_store_survives(engine, cards, reference, pages, tmp_path):
    # Run on 4 pages, then on all of them with the file-size limit just above the store's size, so
    # SQLite's writes fail part-way (setrlimit(2) RLIMIT_FSIZE: writes beyond it fail with EFBIG once
    # SIGXFSZ is ignored) - a real refused write, as on a full disk.
    folder = tmp_path / "pages"
    folder.mkdir()
    for p in sorted(pages.glob("*.png"))[:4]:
        shutil.copy(p, folder / p.name)
    db = tmp_path / "s.sqlite"
    run_pages(folder, cards, store=db)
    for p in sorted(pages.glob("*.png"))[4:]:
        shutil.copy(p, folder / p.name)
    limit = db.stat().st_size + 48 * 1024

    def limited():
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
        resource.setrlimit(resource.RLIMIT_FSIZE, (limit, limit))

    extra = ["--workers", "1", "--no-processes"] if engine == "dask" else []
    res = subprocess.run(run_cmd(folder, cards, db, *extra), preexec_fn=limited, capture_output=True,
                         text=True, timeout=300)
    assert res.returncode == 2, res.stderr
    msg = [ln for ln in res.stderr.splitlines() if ln.startswith("ocrbench:")]
    assert len(msg) == 1 and str(db) in msg[0] and "rerun to resume" in msg[0], res.stderr
    done = assert_whole_pages(db)                   # integrity_check ok, every written page whole
    assert 4 <= len(done[1]) < N_PAGES
    again = subprocess.run(run_cmd(folder, cards, db, *extra), capture_output=True, text=True, timeout=300)
    assert again.returncode == 0, again.stderr
    done = assert_whole_pages(db)
    assert all(len(v) == N_PAGES for v in done.values())
    assert texts(db) == reference


class ReadOnly:
    """Makes files and folders read-only for the command under test, by the first way that works here:

    * not root: permission bits (chmod);
    * root: the immutable attribute (chattr(1) +i), which binds root too;
    * root where chattr is refused (a container without CAP_LINUX_IMMUTABLE): permission bits, with
      the command run as the unprivileged user nobody (uid 65534), for whom they apply.
    """

    def __init__(self, tmp: Path):
        self.tmp, self.done, self.as_nobody = tmp, [], False
        self.root = os.geteuid() == 0

    def protect(self, paths: list[Path]) -> None:
        for p in paths:
            if self.root and not self.as_nobody:
                r = subprocess.run(["chattr", "+i", str(p)], capture_output=True, text=True) \
                    if shutil.which("chattr") else None
                if r is not None and r.returncode == 0:
                    self.done.append(("attr", p))
                    continue
                self.use_nobody()
            p.chmod(0o555 if p.is_dir() else 0o444)
            self.done.append(("mode", p))

    def use_nobody(self) -> None:
        for q in [self.tmp, *self.tmp.parents]:          # nobody must reach the pages, card and store
            if q == Path(q.anchor):
                break
            mode = q.stat().st_mode & 0o7777
            if mode & 0o005 != 0o005:
                self.done.insert(0, ("restore", q, mode))   # put back last
                q.chmod(mode | 0o005)
        try:
            probe = subprocess.run([sys.executable, "-c", "import ocrbench"], capture_output=True, user=65534,
                                   group=65534, extra_groups=[]).returncode
        except OSError:
            probe = -1
        if probe != 0:
            pytest.skip("running as root, chattr +i refused and nobody cannot run this Python: "
                        "no way to make a path read-only for the command here")
        self.as_nobody = True

    def run_kwargs(self) -> dict:
        return {"user": 65534, "group": 65534, "extra_groups": []} if self.as_nobody else {}

    def lift(self) -> None:
        while self.done:
            how, p, *mode = self.done.pop()
            if how == "attr":
                subprocess.run(["chattr", "-i", str(p)], check=True)
            elif how == "restore":
                p.chmod(mode[0])
            else:
                p.chmod(0o755 if p.is_dir() else 0o644)


@pytest.fixture()
def read_only(tmp_path):
    ro = ReadOnly(tmp_path)
    yield ro
    ro.lift()


@pytest.mark.parametrize("case", ["existing store", "no store yet"])
def test_read_only_store_is_a_clear_error_and_untouched(case, tmp_path, read_only):
    pages = small_pages(tmp_path / "pages", 3, seed=31)
    card = tm.write_ctc(tmp_path / "ctc")
    folder = tmp_path / "store"
    folder.mkdir()
    db = folder / "s.sqlite"
    if case == "existing store":
        (pages / "page_003.png").rename(tmp_path / "later.png")
        run_pages(pages, [card], store=db)
        (tmp_path / "later.png").rename(pages / "page_003.png")    # one more page to write
        before = sha256(db)
        read_only.protect([db])
    read_only.protect([folder])
    res = subprocess.run(run_cmd(pages, [card], db), capture_output=True, text=True, timeout=120,
                         **read_only.run_kwargs())
    assert res.returncode == 2, res.stderr
    msg = [ln for ln in res.stderr.splitlines() if ln.startswith("ocrbench:")]
    assert len(msg) == 1 and str(db) in msg[0] and "read-only" in msg[0], res.stderr
    if case == "existing store":
        assert sha256(db) == before and sorted(p.name for p in folder.iterdir()) == ["s.sqlite"]
        read_only.lift()                            # (a WAL store needs its folder writable even to be read)
        done = assert_whole_pages(db)
        assert done == {1: {"page_001.png", "page_002.png"}}
    else:
        assert list(folder.iterdir()) == []
