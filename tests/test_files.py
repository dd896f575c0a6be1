"""Safe file I/O (fisherwalk.base.files): atomic writes that never follow planted links,
bounded reads, folder checks and the output-folder preflight."""

import errno
import os
import re
import stat
import tempfile
import threading
import tracemalloc

import numpy as np
import pytest

from fisherwalk.base.files import (
    check_folder,
    check_output_folder,
    read_bytes,
    write_atomic,
    write_text_atomic,
)
from fisherwalk.errors import CheckpointError, InputError

ROOT = os.geteuid() == 0


def _victim(tmp_path):
    """A file outside the folder written to, which a planted link points at."""
    victim = tmp_path / "elsewhere" / "precious.txt"
    victim.parent.mkdir()
    victim.write_text("precious")
    return victim


# ------------------------------------------------------------------------- planted links


def test_link_planted_at_the_former_predictable_temp_name_is_not_followed(tmp_path):
    # The name the former writers used: ".<name>.<pid>.tmp" (issue 13, failure 3).
    folder = tmp_path / "ckpt"
    folder.mkdir()
    victim = _victim(tmp_path)
    planted = folder / f".state.json.{os.getpid()}.tmp"
    planted.symlink_to(victim)
    write_text_atomic(folder / "state.json", '{"done": 1}')
    assert victim.read_text() == "precious"
    assert (folder / "state.json").read_text() == '{"done": 1}'
    assert planted.is_symlink()  # left alone, not written through


def test_link_planted_at_the_next_temp_name_is_skipped_for_a_fresh_file(tmp_path, monkeypatch):
    # Force mkstemp's first candidate name onto a planted link (tempfile draws its names
    # from _get_candidate_names); the exclusive create must refuse it and take the next.
    folder = tmp_path / "out"
    folder.mkdir()
    victim = _victim(tmp_path)
    (folder / ".record.json.planted.tmp").symlink_to(victim)
    drawn = []

    def candidates():
        for name in ("planted", "fresh"):
            drawn.append(name)
            yield name

    monkeypatch.setattr(tempfile, "_get_candidate_names", candidates)
    write_text_atomic(folder / "record.json", "new")
    assert drawn == ["planted", "fresh"]  # the planted name was tried and refused
    assert victim.read_text() == "precious"
    assert (folder / "record.json").read_text() == "new"
    assert sorted(os.listdir(folder)) == [".record.json.planted.tmp", "record.json"]


def test_a_target_that_is_a_link_is_refused(tmp_path):
    victim = _victim(tmp_path)
    target = tmp_path / "tuning.json"
    target.symlink_to(victim)
    with pytest.raises(InputError, match="is a symbolic link") as info:
        write_text_atomic(target, "overwrite", where="save_tuning(path)")
    assert "where: save_tuning(path)" in str(info.value)
    assert victim.read_text() == "precious" and target.is_symlink()


def test_a_target_that_is_a_folder_is_refused(tmp_path):
    (tmp_path / "draws.npz").mkdir()
    with pytest.raises(CheckpointError, match="not a regular file"):
        write_text_atomic(tmp_path / "draws.npz", "x", error=CheckpointError)


# ------------------------------------------------------------------------- atomicity


@pytest.mark.parametrize("failure", [RuntimeError("disk on fire"), KeyboardInterrupt()])
def test_a_failure_mid_write_leaves_the_old_file_and_no_temp_file(tmp_path, failure):
    target = tmp_path / "state.json"
    target.write_text("old content")

    def writer(handle):
        handle.write(b"half of the new")
        raise failure

    with pytest.raises(type(failure)):
        write_atomic(target, writer)
    assert target.read_text() == "old content"
    assert os.listdir(tmp_path) == ["state.json"]


def test_a_system_error_mid_write_becomes_the_package_error(tmp_path):
    target = tmp_path / "draws.npz"
    target.write_bytes(b"old")

    def full_disk(handle):
        handle.write(b"partial")
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    with pytest.raises(CheckpointError, match="No space left") as info:
        write_atomic(target, full_disk, error=CheckpointError)
    assert str(target) in str(info.value)
    assert target.read_bytes() == b"old" and os.listdir(tmp_path) == ["draws.npz"]


def test_numpy_writes_through_the_handle_and_missing_folders_are_explained(tmp_path):
    arrays = {"draws": np.arange(6.0).reshape(2, 3)}
    write_atomic(tmp_path / "draws.npz", lambda handle: np.savez(handle, **arrays))
    with np.load(tmp_path / "draws.npz", allow_pickle=False) as data:
        assert np.array_equal(data["draws"], arrays["draws"])
    with pytest.raises(InputError, match="could not be written"):
        write_text_atomic(tmp_path / "missing" / "x.json", "{}")


def test_permissions_follow_the_old_file_or_the_umask(tmp_path):
    old = tmp_path / "kept.json"
    old.write_text("1")
    old.chmod(0o600)
    write_text_atomic(old, "2")
    assert stat.S_IMODE(os.stat(old).st_mode) == 0o600
    umask = os.umask(0o022)  # set a known umask for the new file, then restore it
    try:
        write_text_atomic(tmp_path / "new.json", "3")
    finally:
        os.umask(umask)
    assert stat.S_IMODE(os.stat(tmp_path / "new.json").st_mode) == 0o644


# ------------------------------------------------------------------------- bounded reads


def test_read_bytes_checks_the_size_before_reading(tmp_path):
    sparse = tmp_path / "huge.json"
    with open(sparse, "wb") as handle:  # 1 GiB on paper, no blocks on disk
        handle.truncate(2**30)
    with pytest.raises(CheckpointError, match=f"holds {2**30} bytes, more than the 1024"):
        read_bytes(sparse, max_bytes=1024, error=CheckpointError)
    exact = tmp_path / "exact"
    exact.write_bytes(b"x" * 1024)
    assert read_bytes(exact, max_bytes=1024) == b"x" * 1024
    several_chunks = bytes(range(256)) * (3 * 2**12 + 7)  # about 3 MiB: read in pieces
    exact.write_bytes(several_chunks)
    assert read_bytes(exact, max_bytes=2**30) == several_chunks


def test_a_generous_limit_does_not_allocate_up_to_the_limit(tmp_path):
    small = tmp_path / "state.json"
    small.write_bytes(b"{}")
    tracemalloc.start()
    try:
        assert read_bytes(small, max_bytes=2**40) == b"{}"
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert peak < 4 * 2**20  # one read chunk (1 MiB) at most, not the 1 TiB limit


def test_read_bytes_refuses_fifos_without_blocking_and_links_on_request(tmp_path):
    fifo = tmp_path / "state.json"
    os.mkfifo(fifo)
    outcome = []
    reader = threading.Thread(target=lambda: outcome.append(_refusal(fifo)), daemon=True)
    reader.start()
    reader.join(60)
    if reader.is_alive():  # unblock the reader so the test run can finish, then fail
        with open(fifo, "wb"):
            pass
        pytest.fail("read_bytes blocked on a fifo")
    assert "not a regular file" in outcome[0]
    link = tmp_path / "link.json"
    target = tmp_path / "real.json"
    target.write_text("{}")
    link.symlink_to(target)
    assert read_bytes(link, max_bytes=10) == b"{}"
    with pytest.raises(InputError, match="symbolic link"):
        read_bytes(link, max_bytes=10, follow_symlinks=False)


def _refusal(path):
    try:
        read_bytes(path, max_bytes=100)
    except InputError as err:
        return str(err)
    return "read"


# ------------------------------------------------------------------------- folders


def test_check_folder_accepts_regular_files_and_checks_names(tmp_path):
    for name in ("run.json", "segment-000000.npz"):
        (tmp_path / name).write_text("x")
    assert check_folder(tmp_path) == ["run.json", "segment-000000.npz"]
    pattern = re.compile(r"run\.json|segment-\d{6}\.npz")
    assert check_folder(tmp_path, expected=pattern) == ["run.json", "segment-000000.npz"]
    (tmp_path / "notes.txt").write_text("x")
    with pytest.raises(CheckpointError, match="did not write: notes.txt"):
        check_folder(tmp_path, expected=pattern, error=CheckpointError)
    with pytest.raises(InputError, match="did not write: notes.txt"):
        check_folder(tmp_path, expected={"run.json", "segment-000000.npz"})


@pytest.mark.parametrize("plant", ["link", "folder", "fifo", "dangling link"])
def test_check_folder_refuses_entries_that_are_not_regular_files(tmp_path, plant):
    (tmp_path / "run.json").write_text("{}")
    odd = tmp_path / "state.json"
    if plant == "link":
        odd.symlink_to(tmp_path / "run.json")
    elif plant == "dangling link":
        odd.symlink_to(tmp_path / "nowhere")
    elif plant == "folder":
        odd.mkdir()
    else:
        os.mkfifo(odd)
    with pytest.raises(CheckpointError, match="not regular files: state.json"):
        check_folder(tmp_path, error=CheckpointError)


def test_check_folder_refuses_a_file(tmp_path):
    (tmp_path / "ckpt").write_text("x")
    with pytest.raises(InputError, match="is not a folder"):
        check_folder(tmp_path / "ckpt")


# ------------------------------------------------------------------------- output preflight


def test_output_folder_is_created_and_tested(tmp_path):
    out = tmp_path / "results" / "run1"
    assert check_output_folder(out, 10_000) == out
    assert out.is_dir() and os.listdir(out) == []  # the probe file is gone


def test_output_folder_that_is_a_file_is_refused(tmp_path):
    (tmp_path / "out").write_text("x")
    with pytest.raises(InputError, match="is a file, not a folder") as info:
        check_output_folder(tmp_path / "out", 0)
    assert "where: --out" in str(info.value)


def test_output_folder_under_a_file_is_refused(tmp_path):
    # Works as root too: no permission bit is involved.
    (tmp_path / "plain").write_text("x")
    with pytest.raises(InputError, match="cannot be created"):
        check_output_folder(tmp_path / "plain" / "out", 0)


@pytest.mark.skipif(ROOT, reason="root writes through permission bits, so a read-only folder "
                                 "cannot be simulated with chmod; the folder-under-a-file "
                                 "case covers the refusal path")
def test_read_only_output_folder_is_refused(tmp_path):
    out = tmp_path / "ro"
    out.mkdir()
    out.chmod(0o555)
    try:
        with pytest.raises(InputError, match="not writable"):
            check_output_folder(out, 0)
    finally:
        out.chmod(0o755)


def test_output_folder_without_the_space_is_refused_with_the_numbers(tmp_path):
    with pytest.raises(InputError, match=r"free; the outputs need about 931322574\.62 GiB"):
        check_output_folder(tmp_path, 10**18)


@pytest.mark.parametrize("needed", [-1, 1.5, True])
def test_output_folder_needs_a_whole_byte_count(tmp_path, needed):
    with pytest.raises(InputError, match="needed_bytes"):
        check_output_folder(tmp_path, needed)
