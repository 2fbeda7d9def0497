"""Fault injection: a writer killed part-way (SIGKILL) leaves the previous store exactly as
it was, and its leftovers do not break the next write; a second writer waits or fails
clearly.

The atomic-replace pattern checked here (stage in a sibling directory, fsync, rename into
place; the old version survives any crash before the rename) is common practice for crash
safety of on-disk state (no source); the kill points are forced by making the child
process pause inside the write, so each test kills it at a known stage.
"""

from __future__ import annotations

import contextlib
import errno
import json
import os
import shutil
import signal
import subprocess
import time

import pytest

import _reliability_helpers as rh
from analogs.workflows import store as store_io
from analogs.api import AnalogStore
from analogs.cli import main
from analogs.errors import StoreError

#: Child: build (or update) the store, pausing inside the staged write after the
#: ``pause_after``-th NetCDF file it writes, so the parent can kill it there.
CHILD = """
import sys, time
import analogs.workflows.store as store_io
from analogs.api import AnalogStore, build_store
action, pause_after, store, events, *files = sys.argv[1:]
pause_after = int(pause_after)
original = store_io.write_dataset
written = []
def pausing(ds, path, **kwargs):
    original(ds, path, **kwargs)
    written.append(path)
    if len(written) == pause_after:
        print("PAUSED", path, flush=True)
        time.sleep(120)
store_io.write_dataset = pausing
if action == "build":
    build_store(files, store, events=events, region="30,45,-110,-80", progress=False)
else:
    AnalogStore.load(store).update(files, progress=False)
print("DONE", flush=True)
"""


@pytest.fixture(scope="module")
def shared(tmp_path_factory):
    return rh.shared_store(rh.session_root(tmp_path_factory))


def _tiny_archive(directory, days=200):
    """Both fields of the first ``days`` days: what the killed writers build, in a moment."""
    times = rh.archive_times()[:days]
    fields = rh.synthetic_fields(times)
    return rh.write_archive(directory, times=times, fields=fields)


def _answer(store_path):
    result = AnalogStore.load(store_path).find(date=rh.QUERY_DATE, region=rh.REGION)
    return result.to_dict()["analogs"], result.outcomes["p_any_event"]


def _staging_dirs(store_path):
    return sorted(p.name for p in store_path.parent.glob(f".{store_path.name}.tmp-*"))


def _kill_when_paused(process, timeout=120.0):
    """Wait for the child's PAUSED line, then SIGKILL it and reap it."""
    deadline = time.monotonic() + timeout
    line = process.stdout.readline()
    assert line.startswith("PAUSED"), (line, process.stderr.read() if process.poll() is not None else "")
    assert time.monotonic() < deadline
    process.send_signal(signal.SIGKILL)
    process.wait(timeout=30)
    assert process.returncode == -signal.SIGKILL
    return line


@pytest.mark.parametrize("pause_after", [1, 4], ids=["in-basis", "after-scores"])
def test_killed_build_leaves_previous_store(shared, tmp_path, pause_after):
    store_path = rh.copy_store(shared["store"], tmp_path / "store")
    before_bytes = rh.file_digests(store_path)
    before_answer = _answer(store_path)
    files = _tiny_archive(tmp_path / "tiny")
    child = _start(["build", str(pause_after), str(store_path), str(shared["events"]),
                    *map(str, files)])
    paused = _kill_when_paused(child)
    assert f".{store_path.name}.tmp-" in paused   # killed inside the staging directory
    assert _staging_dirs(store_path), "the killed writer left its staging directory"
    assert rh.file_digests(store_path) == before_bytes
    store_io.check_checksums(store_path)
    assert _answer(store_path) == before_answer
    if pause_after != 1:
        return
    # The next build removes the dead writer's leftovers and succeeds (checked once).
    from analogs.api import build_store
    rebuilt = build_store(files, store_path, progress=False)
    assert _staging_dirs(store_path) == []
    assert len(rebuilt.times) == 200
    store_io.check_checksums(store_path)


def _start(arguments):
    import os
    import subprocess
    import sys
    return subprocess.Popen([sys.executable, "-c", CHILD, *arguments], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True,
                            env={**os.environ, "PYTHONHASHSEED": "0"})


def test_killed_update_leaves_store_exactly_as_before(shared, tmp_path):
    store_path = rh.copy_store(shared["store"], tmp_path / "store")
    # The days after the archive, continuing its synthetic weather (same seed).
    longer = rh.archive_times(rh.YEARS + (2004,))
    fields = rh.synthetic_fields(longer)
    fresh = slice(len(longer) - 366, len(longer) - 351)
    new_files = rh.write_archive(tmp_path / "new", times=longer[fresh],
                                 fields={k: v[fresh] for k, v in fields.items()})
    before_bytes = rh.file_digests(store_path)
    before_answer = _answer(store_path)
    child = _start(["update", "1", str(store_path), "-", *map(str, new_files)])
    _kill_when_paused(child)
    assert _staging_dirs(store_path)
    assert rh.file_digests(store_path) == before_bytes
    assert _answer(store_path) == before_answer
    # The next append works and cleans up; a repeat of it changes nothing (idempotent).
    updated = AnalogStore.load(store_path).update(new_files, progress=False)
    assert updated.last_update["days_added"] == 15 and _staging_dirs(store_path) == []
    after = rh.file_digests(store_path)
    again = AnalogStore.load(store_path).update(new_files, progress=False)
    assert again.last_update["days_added"] == 0 and rh.file_digests(store_path) == after


def test_kill_at_any_moment_gives_old_or_new_store(shared, tmp_path):
    """Killed as soon as its staging directory appears, with no pause: the store is then
    either the old version byte for byte or the complete new one, and it verifies."""
    store_path = rh.copy_store(shared["store"], tmp_path / "store")
    before_bytes = rh.file_digests(store_path)
    files = _tiny_archive(tmp_path / "tiny")
    child = _start(["build", "0", str(store_path), str(shared["events"]), *map(str, files)])
    deadline = time.monotonic() + 120
    while not _staging_dirs(store_path) and child.poll() is None and time.monotonic() < deadline:
        time.sleep(0.001)
    child.send_signal(signal.SIGKILL)
    child.wait(timeout=30)
    manifest = store_io.check_checksums(store_path)
    if child.returncode == -signal.SIGKILL:
        assert rh.file_digests(store_path) == before_bytes
    else:
        assert manifest["archive"]["n_days"] == 200


def test_second_writer_fails_clearly_after_timeout(shared, tmp_path, capsys, monkeypatch):
    store_path = rh.copy_store(shared["store"], tmp_path / "store")
    holder = rh.python_subprocess(
        "import time; from filelock import FileLock\n"
        f"lock = FileLock({str(store_io.lock_for(store_path).lock_file)!r}); lock.acquire()\n"
        "print('HELD', flush=True); time.sleep(60)")
    assert holder.stdout.readline().strip() == "HELD"
    try:
        monkeypatch.setenv(store_io.LOCK_TIMEOUT_ENV, "1")
        files = _tiny_archive(tmp_path / "tiny")
        started = time.monotonic()
        code = main(["build", "--store", str(store_path), "--quiet", *map(str, files)])
        waited = time.monotonic() - started
        err = capsys.readouterr().err
    finally:
        holder.kill()
        holder.wait()
    assert code == 2 and waited >= 1.0
    lines = [line for line in err.splitlines() if not line.startswith("analogs: warning:")]
    assert len(lines) == 1 and "is locked by another writer" in lines[0] and "waited 1 s" in lines[0]
    store_io.check_checksums(store_path)


def test_second_writer_waits_for_the_first(tmp_path):
    store_path = tmp_path / "store"
    holder = rh.python_subprocess(
        "import time; from filelock import FileLock\n"
        f"lock = FileLock({str(store_io.lock_for(store_path).lock_file)!r}); lock.acquire()\n"
        "print('HELD', flush=True); time.sleep(1.5)")
    assert holder.stdout.readline().strip() == "HELD"
    started = time.monotonic()
    with store_io.writing(store_path, {"config": {}}, timeout=60) as staged:
        (staged / "note.txt").write_text("second writer")
    waited = time.monotonic() - started
    holder.wait()
    assert waited >= 1.0
    assert json.loads((store_path / store_io.MANIFEST).read_text())["files"]["note.txt"]


def test_lock_timeout_setting(monkeypatch):
    monkeypatch.delenv(store_io.LOCK_TIMEOUT_ENV, raising=False)
    assert store_io.lock_timeout() == store_io.LOCK_TIMEOUT == 600.0
    monkeypatch.setenv(store_io.LOCK_TIMEOUT_ENV, "2.5")
    assert store_io.lock_timeout() == 2.5
    assert store_io.lock_timeout(0) == 0.0
    monkeypatch.setenv(store_io.LOCK_TIMEOUT_ENV, "soon")
    with pytest.raises(StoreError, match="ANALOGS_LOCK_TIMEOUT='soon': expected a number"):
        store_io.lock_timeout()
    with pytest.raises(StoreError, match="'timeout' parameter of writing must be"):
        store_io.lock_timeout(-1)


def test_live_writers_staging_is_kept_dead_ones_removed(tmp_path):
    """Only directories of processes that are gone are removed (PID in the name)."""
    import os
    store_path = tmp_path / "store"
    dead = rh.python_subprocess("pass")
    dead.wait()
    live = tmp_path / f".store.tmp-{os.getpid()}-abc"
    gone = tmp_path / f".store.tmp-{dead.pid}-def"
    unnamed = tmp_path / ".store.tmp-xyz"
    other = tmp_path / ".other.tmp-1-abc"
    for directory in (live, gone, unnamed, other):
        directory.mkdir()
    removed = store_io.remove_stale_staging(store_path)
    assert sorted(removed) == sorted([gone.name, unnamed.name])
    assert live.exists() and other.exists() and not gone.exists()


# --------------------------------------------------------------------------------------
# Issue 13: a write that cannot succeed (disk full, read-only folder) ends in exit 2 with
# one clear line and leaves the store exactly as it was. ENOSPC, EROFS and EACCES are the
# POSIX errors of those conditions (errno(3), from memory); fsync may report a full disk
# (fsync(2), "ENOSPC ... no room for the data", from memory), so failing every fsync of
# the writer is a faithful stand-in for a full disk when no small file system can be made.


def _new_days(tmp_path, n=15):
    """Files of ``n`` days after the shared archive (same synthetic weather)."""
    longer = rh.archive_times(rh.YEARS + (2004,))
    fields = rh.synthetic_fields(longer)
    fresh = slice(len(longer) - 366, len(longer) - 366 + n)
    return rh.write_archive(tmp_path / "new", times=longer[fresh],
                            fields={k: v[fresh] for k, v in fields.items()})


def _one_error_line(err):
    lines = [line for line in err.splitlines() if not line.startswith("analogs: warning:")]
    assert len(lines) == 1 and "Traceback" not in err, err
    return lines[0]


WRITES = {
    "update": lambda store, tmp_path: ["update", "--store", str(store), "--quiet",
                                       *map(str, _new_days(tmp_path))],
    "tag-save": lambda store, tmp_path: ["tag", "--store", str(store), "--out",
                                         str(tmp_path / "tags.csv"), "--kmeans", "3",
                                         "--save", "--quiet"],
}


@pytest.mark.parametrize("command", list(WRITES))
def test_disk_full_while_writing_leaves_the_store(shared, tmp_path, capsys, monkeypatch,
                                                  command):
    """Every fsync of the writer fails with ENOSPC: exit 2, one line saying the disk is
    full and that the store was left as it was; the store's bytes are unchanged and no
    staging directory is left."""
    from analogs.workflows import files as files_io
    store_path = rh.copy_store(shared["store"], tmp_path / "store")
    before = rh.file_digests(store_path)
    argv = WRITES[command](store_path, tmp_path)

    def full(path):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), str(path))

    monkeypatch.setattr(files_io, "fsync_path", full)
    code = main(argv)
    line = _one_error_line(capsys.readouterr().err)
    assert code == 2
    assert "no space left on the device" in line and "left as it was" in line, line
    assert rh.file_digests(store_path) == before and _staging_dirs(store_path) == []
    monkeypatch.undo()
    store_io.check_checksums(store_path)


@contextlib.contextmanager
def _small_file_system(directory, size_kb):
    """A tmpfs of ``size_kb`` kB mounted at ``directory`` (root only; skipped otherwise)."""
    if os.geteuid() != 0 or shutil.which("mount") is None:
        pytest.skip("mounting a small tmpfs needs root")
    directory.mkdir()
    done = subprocess.run(["mount", "-t", "tmpfs", "-o", f"size={size_kb}k", "tmpfs",
                           str(directory)], capture_output=True, text=True)
    if done.returncode != 0:
        pytest.skip(f"cannot mount a tmpfs here: {done.stderr.strip()}")
    try:
        yield directory
    finally:
        subprocess.run(["umount", "-l", str(directory)], capture_output=True)


def _size_kb(path):
    return sum(p.stat().st_size for p in path.rglob("*") if p.is_file()) // 1024 + 1


def test_real_full_disk_and_read_only_file_system(shared, tmp_path, capsys):
    """On a real tmpfs barely larger than the store: update runs out of space (exit 2,
    store unchanged); remounted read-only, update is refused before any work."""
    size = _size_kb(shared["store"]) + 200
    with _small_file_system(tmp_path / "mnt", size) as mount:
        store_path = rh.copy_store(shared["store"], mount / "store")
        before = rh.file_digests(store_path)
        code = main(WRITES["update"](store_path, tmp_path))
        line = _one_error_line(capsys.readouterr().err)
        assert code == 2 and "no space left" in line, line
        assert rh.file_digests(store_path) == before and _staging_dirs(store_path) == []
        subprocess.run(["mount", "-o", "remount,ro", str(mount)], check=True)
        code = main(WRITES["update"](store_path, tmp_path / "again"))
        line = _one_error_line(capsys.readouterr().err)
        assert code == 2 and "read-only" in line and "left as it was" in line, line
        assert rh.file_digests(store_path) == before


def test_read_only_store_folder_is_refused(shared, tmp_path, capsys):
    """A store folder without write permission (chmod a-w; for root, whom permissions do
    not stop, a store on a read-only tmpfs) is refused before any work: exit 2, one line,
    the store unchanged."""
    if os.geteuid() == 0:
        with _small_file_system(tmp_path / "mnt", _size_kb(shared["store"]) + 2000) as mount:
            store_path = rh.copy_store(shared["store"], mount / "store")
            before = rh.file_digests(store_path)
            subprocess.run(["mount", "-o", "remount,ro", str(mount)], check=True)
            for command in WRITES:
                code = main(WRITES[command](store_path, tmp_path / command))
                line = _one_error_line(capsys.readouterr().err)
                assert code == 2 and "read-only" in line, line
            assert rh.file_digests(store_path) == before
        return
    store_path = rh.copy_store(shared["store"], tmp_path / "store")
    before = rh.file_digests(store_path)
    os.chmod(store_path, 0o555)
    try:
        for command in WRITES:
            code = main(WRITES[command](store_path, tmp_path / command))
            line = _one_error_line(capsys.readouterr().err)
            assert code == 2 and "read-only" in line, line
    finally:
        os.chmod(store_path, 0o755)
    assert rh.file_digests(store_path) == before
