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
