"""Output safety: a held output folder, a second writer of the store, a full disk.

A second run on a folder in use must stop at once with one message naming the folder and the
run that holds it, and touch nothing; a run killed while it held the folder must not block the
next; a full disk must stop a run with a clear error, keep every point stored before it, and
leave outputs as they were.

Outside facts relied on:
- flock(2) (Linux man page): a lock belongs to an open file description, so two opens of the
  same file conflict even within one process; LOCK_NB makes a conflicting request fail with
  EWOULDBLOCK; the lock is released when the last descriptor of that open is closed, which the
  kernel does for a killed process.
- SQLite documentation, "PRAGMA max_page_count": sets the most pages the database file of that
  connection may hold; a write that needs more fails with SQLITE_FULL, "database or disk is
  full", the same error as a full disk. SQLite documentation, "Write-Ahead Logging" and
  "sqlite3_busy_timeout": one writer at a time; a writer that finds another waits up to the
  busy timeout, then fails with SQLITE_BUSY, "database is locked".
- null(4) (Linux man page): writes to /dev/full fail with ENOSPC, "No space left on device".
"""

from __future__ import annotations

import os
import shutil
import signal
import sqlite3
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import pytest

from charflow.cli import main as cli
from charflow.config import library as config
from charflow.execution import store as store_module
from charflow.execution import sweep
from charflow.execution.lock import LOCK_NAME, FolderLock, read_holder
from charflow.execution.store import FILE_NAME, Store, keyring
from charflow.flow import characterize as flow
from charflow.io import atomic
from charflow.io.atomic import write_atomic
from charflow.records.errors import OutputError, StoreError
from charflow.simulation import netlist

ROOT = Path(__file__).resolve().parents[1]
SMALL = ROOT / "tests" / "data" / "small_l1.toml"
EXIT_OK, EXIT_TROUBLE = 0, 3
OUTPUTS = ("small_l1.json", "small_l1.lib", FILE_NAME)


@pytest.fixture(scope="module", autouse=True)
def _need_ngspice():
    if shutil.which("ngspice") is None:
        pytest.fail("ngspice is not installed; these tests need it (apt-get install ngspice)")


def _exe() -> str:
    exe = shutil.which("charflow")
    if exe is None:
        pytest.fail("the charflow command is not on PATH; install the package (pip install -e .)")
    return exe


def _charflow(*args: str | Path, cwd: Path) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [_exe(), *map(str, args)],
        capture_output=True,
        text=True,
        cwd=cwd,
        timeout=120,
        check=False,
        stdin=subprocess.DEVNULL,
    )


def _refused(done: subprocess.CompletedProcess[str], *names: str | Path) -> str:
    """Assert one clean ``charflow: ...`` line and exit 3; return the line."""
    assert "Traceback" not in done.stderr, done.stderr
    assert done.returncode == EXIT_TROUBLE, done.stderr
    (line,) = done.stderr.splitlines()
    assert line.startswith("charflow: "), line
    for name in names:
        assert str(name) in line, (name, line)
    return line


def _snapshot(out: Path) -> dict[str, tuple[bytes, int]]:
    return {n: ((out / n).read_bytes(), (out / n).stat().st_mtime_ns) for n in OUTPUTS}


def _integrity(path: Path) -> str:
    with sqlite3.connect(path) as db:
        return db.execute("PRAGMA integrity_check").fetchone()[0]


def _checks(path: Path) -> int:
    """The function checks a store holds."""
    with sqlite3.connect(path) as db:
        query = "SELECT COUNT(*) FROM point WHERE record = 'FunctionChecked'"
        return db.execute(query).fetchone()[0]


def _hold_in_child(folder: Path) -> subprocess.Popen[str]:
    """Another process holding ``folder``; returns once it holds it."""
    code = (
        "import sys, time\n"
        "from charflow.execution.lock import FolderLock\n"
        "with FolderLock(sys.argv[1]):\n"
        "    print('held', flush=True)\n"
        "    time.sleep(60)\n"
    )
    child = subprocess.Popen(
        [sys.executable, "-c", code, str(folder)], stdout=subprocess.PIPE, text=True
    )
    assert child.stdout.readline() == "held\n"
    child.stdout.close()
    return child


# --- the folder lock ----------------------------------------------------------------------


def test_a_held_folder_is_refused_and_freed(tmp_path: Path) -> None:
    with FolderLock(tmp_path):
        holder = read_holder(tmp_path)
        assert holder is not None and holder.pid == os.getpid()
        # A second open of the lock file is a second lock, even in this process (flock(2)).
        with pytest.raises(OutputError) as err:
            FolderLock(tmp_path).acquire()
        assert str(tmp_path) in str(err.value)
        assert f"process {os.getpid()} on " in str(err.value)
    assert read_holder(tmp_path) is None  # released: the file names no holder
    with FolderLock(tmp_path):
        pass


def test_a_lock_file_that_cannot_be_made_names_the_folder(tmp_path: Path) -> None:
    # Root can write anywhere, so no permission bits make a folder unwritable here; a folder
    # where the lock file should be makes its open fail (EISDIR) for anyone.
    (tmp_path / LOCK_NAME).mkdir()
    with pytest.raises(OutputError, match="cannot make the lock file") as err:
        FolderLock(tmp_path).acquire()
    assert str(tmp_path) in str(err.value)


def test_a_second_run_on_a_held_folder_stops_at_once(tmp_path: Path) -> None:
    out = tmp_path / "out"
    out.mkdir()
    with FolderLock(out):
        start = time.perf_counter()
        done = _charflow("run", SMALL, "--out", out, "--quiet", cwd=tmp_path)
        took = time.perf_counter() - start
    line = _refused(done, out, f"process {os.getpid()} on ", "in use", "nothing was written")
    assert "wait for it to end" in line
    assert took < 30  # refused, not queued behind the holder
    assert sorted(p.name for p in out.iterdir()) == [LOCK_NAME]  # no store was made


def test_two_runs_at_once_on_one_folder(tmp_path: Path) -> None:
    out = tmp_path / "out"
    first = _charflow("run", SMALL, "--out", out, "--quiet", cwd=tmp_path)
    assert first.returncode == EXIT_OK, first.stderr
    before = _snapshot(out)
    # Run A is held inside its command for as long as the test keeps the store's write lock:
    # its store opens behind it (the busy timeout) while it already holds the folder.
    blocker = sqlite3.connect(out / FILE_NAME, isolation_level=None)
    blocker.execute("BEGIN IMMEDIATE")
    a = subprocess.Popen(
        [_exe(), "run", str(SMALL), "--out", str(out), "--quiet"],
        cwd=tmp_path,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    )
    try:
        deadline = time.monotonic() + 60
        while (h := read_holder(out)) is None or h.pid != a.pid:
            assert a.poll() is None, a.communicate()
            assert time.monotonic() < deadline, "run A never took the folder"
            time.sleep(0.05)
        assert f"run {SMALL} --out {out}" in h.command
        b = _charflow("run", SMALL, "--out", out, "--quiet", cwd=tmp_path)
        assert a.poll() is None  # A was still running: the two overlapped
        _refused(b, out, f"process {a.pid} on ", "charflow run")
        assert _snapshot(out) == before  # B touched nothing
    finally:
        blocker.rollback()
        blocker.close()
        stdout, stderr = a.communicate(timeout=120)
    assert a.returncode == EXIT_OK, stderr
    # 90 points, 24 toggles and 3 cells' leakage
    assert "90 points measured, 0 failed" in stdout and "117 reused from the store" in stdout
    assert _integrity(out / FILE_NAME) == "ok"


def test_worker_processes_do_not_keep_the_folder(tmp_path: Path) -> None:
    # joblib keeps its worker processes for the next sweep: they must not hold the lock.
    with FolderLock(tmp_path), Store(tmp_path / FILE_NAME) as store:
        result = flow.characterize(config.load(SMALL), jobs=2, store=store)
    assert not result.failures
    assert len(sweep.chunks(list(result.plan.points))) > 1  # so the sweep used the workers
    child = _hold_in_child(tmp_path)  # returns only once it holds the folder
    child.kill()
    child.wait(timeout=10)


def test_a_killed_holder_does_not_block(tmp_path: Path) -> None:
    out = tmp_path / "out"
    out.mkdir()
    child = _hold_in_child(out)
    child.send_signal(signal.SIGKILL)
    child.wait(timeout=10)
    stale = read_holder(out)
    assert stale is not None and stale.pid == child.pid  # its record outlives it, its lock not
    with FolderLock(out):
        assert read_holder(out).pid == os.getpid()  # the stale record is overwritten
    done = _charflow("run", SMALL, "--out", out, "--quiet", cwd=tmp_path)
    assert done.returncode == EXIT_OK, done.stderr


# --- the store: a second writer, a full disk -----------------------------------------------


def _ring(cfg: config.LibraryConfig):
    return keyring(cfg, {c.name: netlist.build_deck(cfg, c) for c in cfg.cells})


def _hold_store_in_child(path: Path, seconds: float) -> subprocess.Popen[str]:
    code = (
        "import sqlite3, sys, time\n"
        "db = sqlite3.connect(sys.argv[1], isolation_level=None)\n"
        "db.execute('BEGIN IMMEDIATE')\n"
        "print('held', flush=True)\n"
        "time.sleep(float(sys.argv[2]))\n"
        "db.execute('COMMIT')\n"
    )
    child = subprocess.Popen(
        [sys.executable, "-c", code, str(path), str(seconds)], stdout=subprocess.PIPE, text=True
    )
    assert child.stdout.readline() == "held\n"
    child.stdout.close()
    return child


def test_a_second_writer_of_the_store_waits_its_turn(tmp_path: Path) -> None:
    cfg = config.load(SMALL)
    ring = _ring(cfg)
    path = tmp_path / FILE_NAME
    with Store(path) as store:
        child = _hold_store_in_child(path, 1.0)
        start = time.perf_counter()
        store.mark_verified(ring, "QINV_P1")
        waited = time.perf_counter() - start
        child.wait(timeout=10)
        assert waited > 0.3  # it waited for the other writer rather than failing
        assert store.verified(ring, "QINV_P1")


def test_a_writer_kept_waiting_too_long_names_the_store(tmp_path: Path) -> None:
    cfg = config.load(SMALL)
    ring = _ring(cfg)
    path = tmp_path / FILE_NAME
    with Store(path, timeout=0.2) as store:
        child = _hold_store_in_child(path, 5.0)
        try:
            with pytest.raises(StoreError) as err:
                store.mark_verified(ring, "QINV_P1")
            # Opening writes the schema version: it waits for the other writer too.
            with pytest.raises(StoreError, match="cannot open the result store"):
                Store(path, timeout=0.2)
        finally:
            child.kill()
            child.wait(timeout=10)
    assert "database is locked" in str(err.value) and str(path) in str(err.value)


class _FullStore(Store):
    """A store on a disk with no room left beyond what it holds when opened."""

    def __init__(self, path: str | Path) -> None:
        super().__init__(path)
        pages = self._db.execute("PRAGMA page_count").fetchone()[0]
        self._db.execute(f"PRAGMA max_page_count={pages}")


def test_a_full_store_stops_the_run_and_keeps_what_it_stored(tmp_path: Path) -> None:
    cfg = config.load(SMALL)
    path = tmp_path / FILE_NAME
    with _FullStore(path) as store, pytest.raises(StoreError) as err:
        flow.characterize(cfg, jobs=1, store=store)
    message = str(err.value)
    assert str(path) in message and "database or disk is full" in message
    assert "points stored before are kept" in message and "re-run resumes" in message
    assert _integrity(path) == "ok"
    with Store(path) as store:
        kept = store.count()
        # It filled up part way through the 90 points, 24 toggles, 3 leakage points and 3
        # function checks (each cell's first in the sweep).
        assert 0 < kept < 120
        checks = _checks(path)
        result = flow.characterize(cfg, jobs=1, store=store)  # room again: resume
        assert store.count() == 120
    assert not result.failures
    assert len(result.reused) == kept - checks  # the checks are not among the run's points
    assert len(result.measurements) + len(result.toggles) == 114


def test_a_full_store_exits_3_and_says_a_re_run_resumes(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    out = tmp_path / "out"
    args = ["run", str(SMALL), "--out", str(out), "--jobs", "1", "--quiet"]
    with monkeypatch.context() as m:
        m.setattr(store_module, "Store", _FullStore)  # the class cli's run opens
        assert cli.main(args) == EXIT_TROUBLE
    err = capsys.readouterr().err
    assert err.startswith(f"charflow: file {out / FILE_NAME}: cannot write the result store")
    assert "database or disk is full" in err and "a re-run resumes" in err
    assert not (out / "small_l1.json").exists() and not (out / "small_l1.lib").exists()
    with Store(out / FILE_NAME) as store:
        kept = store.count()
    assert kept > 0
    checks = _checks(out / FILE_NAME)
    assert cli.main(args) == EXIT_OK
    # The function checks stored are not among the points the run reports.
    assert f"{kept - checks} reused from the store" in capsys.readouterr().out
    assert read_holder(out) is None  # both commands let go of the folder


# --- the outputs: a full disk ----------------------------------------------------------------


@pytest.mark.parametrize("text", ["new text\n" * 5000, b"\x89PNG" * 5000])
def test_an_output_on_a_full_disk_keeps_the_previous_version(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, text: str | bytes
) -> None:
    path = tmp_path / "small_l1.lib"
    path.write_text("library (old) { }\n", encoding="utf-8")
    made = []
    real_mkstemp = tempfile.mkstemp

    def mkstemp_on_a_full_disk(*args, **kwargs):
        fd, name = real_mkstemp(*args, **kwargs)
        os.close(fd)
        made.append(Path(name))
        return os.open("/dev/full", os.O_WRONLY), name  # writes fail with ENOSPC

    monkeypatch.setattr(atomic.tempfile, "mkstemp", mkstemp_on_a_full_disk)
    with pytest.raises(OutputError) as err:
        write_atomic(path, text)
    message = str(err.value)
    assert message.startswith(f"file {path}: cannot write output: No space left on device")
    assert "the previous version is kept" in message
    assert path.read_text(encoding="utf-8") == "library (old) { }\n"
    assert made and not any(p.exists() for p in made)  # the temp file is gone
    assert sorted(p.name for p in tmp_path.iterdir()) == ["small_l1.lib"]
