"""Atomic writes: nothing half-written, no silent overwrite."""

import pytest

from envelope.errors import OutputExistsError, InputError
from envelope.io.atomic import atomic_output, atomic_outputs, check_writable


def test_atomic_output_renames_on_success(tmp_path):
    target = tmp_path / "out.json"
    with atomic_output(target) as tmp:
        tmp.write_text("{}")
        assert not target.exists()  # invisible until the block succeeds
    assert target.read_text() == "{}"
    assert list(tmp_path.iterdir()) == [target]


def test_atomic_output_leaves_nothing_on_failure(tmp_path):
    target = tmp_path / "out.json"
    with pytest.raises(RuntimeError):
        with atomic_output(target) as tmp:
            tmp.write_text("half")
            raise RuntimeError("boom")
    assert list(tmp_path.iterdir()) == []


def test_existing_file_is_kept_without_overwrite(tmp_path):
    target = tmp_path / "out.json"
    target.write_text("old")
    with pytest.raises(OutputExistsError, match="add --overwrite"):
        with atomic_output(target) as tmp:
            tmp.write_text("new")
    assert target.read_text() == "old"
    with atomic_output(target, overwrite=True) as tmp:
        tmp.write_text("new")
    assert target.read_text() == "new"


def test_missing_folder_is_named(tmp_path):
    with pytest.raises(InputError, match="does not exist"):
        check_writable(tmp_path / "nope" / "x.tif")


def test_atomic_outputs_all_or_nothing(tmp_path):
    a, b = tmp_path / "a.txt", tmp_path / "b.txt"
    with pytest.raises(ValueError):
        with atomic_outputs([a, b]) as (ta, tb):
            ta.write_text("a")
            raise ValueError("stop")
    assert list(tmp_path.iterdir()) == []
    with atomic_outputs([a, b]) as (ta, tb):
        ta.write_text("a")
        tb.write_text("b")
    assert a.read_text() == "a" and b.read_text() == "b"


def test_full_disk_names_the_final_path_and_leaves_nothing(tmp_path):
    # Common practice, no source: ENOSPC while writing the temporary file is told as the user's
    # path (errno name and a fix), and the temporary file is removed
    import errno
    import os

    from envelope.errors import FileSystemError

    target = tmp_path / "out.csv"
    with pytest.raises(FileSystemError) as info:
        with atomic_output(target) as tmp:
            tmp.write_text("partial")
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), str(tmp))
    message = str(info.value)
    assert message.startswith(f"{target}: no space left on the device (ENOSPC)") and ".part" not in message
    assert list(tmp_path.iterdir()) == []


def test_our_errors_quoting_the_temporary_name_name_the_final_path(tmp_path):
    # Common practice, no source: a writer that checks the path it was given names the user's path
    target = tmp_path / "suit.xyz"
    with pytest.raises(InputError) as info:
        with atomic_output(target) as tmp:
            raise InputError(f"{tmp}: unknown output format")
    assert str(info.value) == f"{target}: unknown output format"


@pytest.mark.parametrize("name, phrase", [
    ("newdir/", "names a folder"),
    ("n" * 300 + ".csv", "file name too long (ENAMETOOLONG)"),
    ("loop-a", "symbolic-link loop (ELOOP)"),
])
def test_unusable_output_names_are_refused_up_front(tmp_path, monkeypatch, name, phrase):
    # Common practice, no source: POSIX limits a path component to NAME_MAX (255 bytes on Linux file systems)
    import os

    from envelope.errors import EnvelopeError

    os.symlink(tmp_path / "loop-b", tmp_path / "loop-a")
    os.symlink(tmp_path / "loop-a", tmp_path / "loop-b")
    monkeypatch.chdir(tmp_path)
    with pytest.raises(EnvelopeError, match=phrase.replace("(", r"\(").replace(")", r"\)")):
        check_writable(name)


def test_remove_empty_folder_only_when_empty(tmp_path):
    # Common practice, no source
    from envelope.io.atomic import remove_empty_folder

    (tmp_path / "a" / "b").mkdir(parents=True)
    assert remove_empty_folder(tmp_path / "a") and not (tmp_path / "a").exists()
    (tmp_path / "c" / "d").mkdir(parents=True)
    (tmp_path / "c" / "d" / "kept.txt").write_text("x")
    assert not remove_empty_folder(tmp_path / "c") and (tmp_path / "c" / "d" / "kept.txt").exists()


def _killed_writer(target, stage=False):
    """A child process that starts an atomic write of ``target`` and is killed (SIGKILL) mid-way."""
    import subprocess
    import sys

    code = ("import os, signal, sys; from pathlib import Path; from envelope.io.atomic import atomic_output\n"
            f"with atomic_output({str(target)!r}, overwrite=True) as tmp:\n"
            "    tmp.write_bytes(b'half' * 1000)\n"
            + ("    Path(str(tmp) + '.stage.tif').write_bytes(b'stage')\n" if stage else "")
            + "    os.kill(os.getpid(), signal.SIGKILL)\n")
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True)
    assert proc.returncode < 0  # the premise: it was killed, not finished


def test_next_writer_removes_temporaries_of_a_killed_one(tmp_path):
    # Common practice, no source: a SIGKILL cannot run clean-up code, so the next writer of
    # the same path finds the dead writer's temporary files by name and removes them
    target = tmp_path / "suit.tif"
    _killed_writer(target, stage=True)
    left = sorted(p.name for p in tmp_path.iterdir())
    assert len(left) == 2 and all(n.startswith(".suit.tif.") and ".part" in n for n in left)
    other = tmp_path / "suit.tif.json"  # a different output whose name starts alike is not touched
    _killed_writer(other)
    with atomic_output(target) as tmp:
        tmp.write_text("done")
    names = sorted(p.name for p in tmp_path.iterdir())
    assert "suit.tif" in names and not any(n.startswith(".suit.tif.") and "json" not in n for n in names)
    assert any(n.startswith(".suit.tif.json.") for n in names)


def test_live_writers_temporaries_are_kept(tmp_path):
    # Common practice, no source: a temporary file of a process that still runs (this one)
    # belongs to a write in progress
    import os

    from envelope.io.atomic import remove_stale_temporaries

    target = tmp_path / "a.tif"
    mine = tmp_path / f".a.tif.{os.getpid()}-abc123.part.tif"
    mine.write_bytes(b"x")
    assert remove_stale_temporaries(target) == [] and mine.exists()
