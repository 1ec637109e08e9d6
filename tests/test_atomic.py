"""Atomic output: the target is replaced only on success."""

import pytest

from ensemble.atomic import atomic_output


def test_replaces_on_success(tmp_path):
    target = tmp_path / "out.txt"
    target.write_text("old")
    with atomic_output(target) as tmp:
        tmp.write_text("new")
        assert target.read_text() == "old"
    assert target.read_text() == "new"
    assert [p.name for p in tmp_path.iterdir()] == ["out.txt"]


def test_untouched_on_failure(tmp_path):
    target = tmp_path / "out.txt"
    target.write_text("old")
    with pytest.raises(RuntimeError):
        with atomic_output(target, copy_from=target) as tmp:
            assert tmp.read_text() == "old"
            tmp.write_text("half")
            raise RuntimeError("boom")
    assert target.read_text() == "old"
    assert [p.name for p in tmp_path.iterdir()] == ["out.txt"]
