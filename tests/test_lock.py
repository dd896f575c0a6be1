"""One writer per folder (fisherwalk.base.lock): the kernel's advisory lock (flock) refuses
a live second writer by name and is gone when its owner dies, however it dies; a lock
file of the old format (a pid file) is still judged by the old rules: a stale one is
broken only on request."""

import json
import os
import socket
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest

from fisherwalk.base.lock import LOCK_FILE, acquire_lock, pid_alive, read_lock
from fisherwalk.errors import CheckpointError

SRC = str(Path(__file__).resolve().parents[1] / "src")


def _plant(folder, pid, host=None):
    """A lock file as another process would have left it."""
    content = {"pid": pid, "host": host or socket.gethostname(),
               "started": "2026-01-02T03:04:05+00:00", "token": "0123456789abcdef"}
    (folder / LOCK_FILE).write_text(json.dumps(content))
    return content


def _dead_pid():
    """The id of a process that has run and been reaped."""
    child = subprocess.Popen([sys.executable, "-c", "pass"])
    child.wait()
    return child.pid


def test_lock_file_names_its_owner_and_is_removed_on_release(tmp_path):
    with acquire_lock(tmp_path, error=CheckpointError) as lock:
        assert lock.broken is None
        owner = read_lock(tmp_path / LOCK_FILE)
        assert owner.pid == os.getpid() and owner.host == socket.gethostname()
        assert read_lock(tmp_path / LOCK_FILE) == lock.owner and lock.held
    assert not (tmp_path / LOCK_FILE).exists() and not lock.held
    lock.release()  # idempotent
    acquire_lock(tmp_path).release()  # free again


def test_a_second_writer_in_another_process_is_refused_by_pid_and_host(tmp_path):
    # A real second process takes the lock and waits; this process then tries.
    script = textwrap.dedent(f"""
        import sys
        sys.path.insert(0, {SRC!r})
        from fisherwalk.base.lock import acquire_lock
        lock = acquire_lock({str(tmp_path)!r})
        print("locked", flush=True)
        sys.stdin.readline()
        lock.release()
    """)
    child = subprocess.Popen([sys.executable, "-c", script], stdin=subprocess.PIPE,
                             stdout=subprocess.PIPE, text=True)
    try:
        assert child.stdout.readline().strip() == "locked"
        with pytest.raises(CheckpointError, match="in use by process") as info:
            acquire_lock(tmp_path, break_stale=True, error=CheckpointError,
                         where="walk(checkpoint='run.ckpt')")
        message = str(info.value)
        assert f"process {child.pid} on host {socket.gethostname()!r}" in message
        assert "where: walk(checkpoint='run.ckpt')" in message
    finally:
        child.communicate("go\n", timeout=60)
    assert child.returncode == 0 and not (tmp_path / LOCK_FILE).exists()


def test_a_second_writer_in_this_process_is_refused(tmp_path):
    with acquire_lock(tmp_path):
        with pytest.raises(CheckpointError, match="this very process"):
            acquire_lock(tmp_path, error=CheckpointError)


def test_a_stale_lock_is_reported_and_broken_only_on_request(tmp_path):
    pid = _dead_pid()
    assert not pid_alive(pid)
    _plant(tmp_path, pid)
    with pytest.raises(CheckpointError, match="stale lock") as info:
        acquire_lock(tmp_path, error=CheckpointError, break_hint="pass --break-lock")
    assert f"process {pid}" in str(info.value) and "pass --break-lock" in str(info.value)
    assert read_lock(tmp_path / LOCK_FILE).pid == pid  # untouched
    with acquire_lock(tmp_path, break_stale=True) as lock:
        assert read_lock(tmp_path / LOCK_FILE) == lock.owner
        assert lock.owner.pid == os.getpid() and lock.broken.pid == pid


def test_a_live_owners_lock_is_never_broken(tmp_path):
    sleeper = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(120)"])
    try:
        _plant(tmp_path, sleeper.pid)
        with pytest.raises(CheckpointError, match=f"in use by process {sleeper.pid}"):
            acquire_lock(tmp_path, break_stale=True, error=CheckpointError)
    finally:
        sleeper.kill()
        sleeper.wait()
    assert read_lock(tmp_path / LOCK_FILE).pid == sleeper.pid


def test_a_lock_from_another_host_is_not_judged(tmp_path):
    _plant(tmp_path, _dead_pid(), host="some-other-machine")
    with pytest.raises(CheckpointError, match="host 'some-other-machine'") as info:
        acquire_lock(tmp_path, break_stale=True, error=CheckpointError)
    assert f"delete {tmp_path / LOCK_FILE}" in str(info.value)


@pytest.mark.parametrize("content", ["{not json", '{"pid": true, "host": "h", '
                                     '"started": "s", "token": "t"}', "[" * 10_000])
def test_an_unreadable_lock_is_refused(tmp_path, content):
    (tmp_path / LOCK_FILE).write_text(content)
    with pytest.raises(CheckpointError, match="cannot be read"):
        acquire_lock(tmp_path, break_stale=True, error=CheckpointError)
    assert (tmp_path / LOCK_FILE).read_text() == content


def test_a_link_planted_at_the_lock_name_is_not_followed(tmp_path):
    victim = tmp_path / "precious.txt"
    victim.write_text("precious")
    folder = tmp_path / "ckpt"
    folder.mkdir()
    (folder / LOCK_FILE).symlink_to(victim)
    with pytest.raises(CheckpointError, match="cannot be read"):
        acquire_lock(folder, break_stale=True, error=CheckpointError)
    assert victim.read_text() == "precious"


def test_release_leaves_a_lock_taken_over_by_someone_else(tmp_path):
    lock = acquire_lock(tmp_path)
    other = _plant(tmp_path, _dead_pid())  # e.g. broken and re-taken by another writer
    lock.release()
    assert json.loads((tmp_path / LOCK_FILE).read_text()) == other


def test_a_missing_folder_is_explained(tmp_path):
    with pytest.raises(CheckpointError, match="cannot be created"):
        acquire_lock(tmp_path / "missing", error=CheckpointError)


def test_a_killed_writers_lock_is_taken_without_a_flag(tmp_path):
    # The child takes the lock and kills itself with SIGKILL (no release, no cleanup):
    # the kernel dropped its lock, the file it left is taken by the next writer as is.
    script = textwrap.dedent(f"""
        import os, signal, sys
        sys.path.insert(0, {SRC!r})
        from fisherwalk.base.lock import acquire_lock
        lock = acquire_lock({str(tmp_path)!r})
        os.kill(os.getpid(), signal.SIGKILL)
    """)
    child = subprocess.Popen([sys.executable, "-c", script])
    assert child.wait(timeout=120) == -9
    # the file is left behind, naming the dead child
    assert read_lock(tmp_path / LOCK_FILE).pid == child.pid
    with acquire_lock(tmp_path, error=CheckpointError) as lock:
        assert lock.broken is None and read_lock(tmp_path / LOCK_FILE) == lock.owner
    assert not (tmp_path / LOCK_FILE).exists()


def test_an_empty_lock_file_left_by_a_crash_is_taken(tmp_path):
    # a writer killed between creating the file and writing its name leaves it empty
    (tmp_path / LOCK_FILE).write_bytes(b"")
    with acquire_lock(tmp_path, error=CheckpointError) as lock:
        assert lock.broken is None


def test_a_dropped_lock_object_lets_the_folder_go(tmp_path):
    # the kernel's lock follows the open file: once it is closed, the folder is free
    lock = acquire_lock(tmp_path)
    del lock
    acquire_lock(tmp_path, error=CheckpointError).release()
