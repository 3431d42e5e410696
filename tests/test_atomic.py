"""Atomic writes: complete file or nothing, ordinary permissions."""

import os
import stat

import pytest

from plateaufit.atomic import write_bytes, write_text


def test_write_text_creates_parents_and_content(tmp_path):
    target = tmp_path / "a" / "b" / "results.json"
    write_text(target, "{}\n")
    assert target.read_text() == "{}\n"
    assert [p.name for p in target.parent.iterdir()] == ["results.json"]


def test_mode_follows_umask(tmp_path):
    old = os.umask(0o022)
    try:
        target = write_bytes(tmp_path / "x.bin", b"123")
    finally:
        os.umask(old)
    assert stat.S_IMODE(target.stat().st_mode) == 0o644


def test_failed_write_leaves_old_file_and_no_temporary(tmp_path, monkeypatch):
    target = tmp_path / "results.json"
    target.write_text("old")

    def boom(*args, **kwargs):
        raise OSError("disk full")

    monkeypatch.setattr(os, "replace", boom)
    with pytest.raises(OSError):
        write_text(target, "new")
    assert target.read_text() == "old"
    assert [p.name for p in tmp_path.iterdir()] == ["results.json"]
