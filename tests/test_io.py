"""The atomic-output helper of graphkit.io: one durability rule for every file written whole."""

from __future__ import annotations

import json
import os
import stat

import pytest

from graphkit import io as gio


def test_atomic_output_writes_whole_and_leaves_nothing_aside(tmp_path):
    out = tmp_path / "marker.json"
    out.write_text("old")
    with gio.atomic_output(out) as tmp:
        assert tmp.parent == tmp_path and tmp.name.startswith(".marker.json.tmp-")
        assert tmp.match("*.tmp-*")   # the pattern the stage and store cleanups remove
        tmp.write_text("new")
        assert out.read_text() == "old"   # nothing visible before the block ends
    assert out.read_text() == "new"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["marker.json"]


def test_failed_write_keeps_the_old_file(tmp_path):
    out = tmp_path / "table.parquet"
    out.write_bytes(b"old")
    with pytest.raises(RuntimeError, match="disk full"):
        with gio.atomic_output(out) as tmp:
            tmp.write_bytes(b"half")
            raise RuntimeError("disk full")
    assert out.read_bytes() == b"old"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["table.parquet"]


def test_durability_order_file_fsync_rename_folder_fsync(tmp_path, monkeypatch):
    # The rule: fsync the written file, then rename, then fsync the folder (a rename is durable only once its
    # folder is; POSIX rename(2) and fsync(2) semantics, from memory).
    events = []
    real_fsync, real_replace = os.fsync, os.replace

    def fsync(fd):
        kind = "folder" if stat.S_ISDIR(os.fstat(fd).st_mode) else "file"
        events.append(("fsync", kind))
        real_fsync(fd)

    def replace(src, dst):
        events.append(("replace", os.path.basename(dst)))
        real_replace(src, dst)

    monkeypatch.setattr(os, "fsync", fsync)
    monkeypatch.setattr(os, "replace", replace)
    gio.write_json_atomic(tmp_path / "sub" / "run.json", {"b": 1, "a": [1, 2]})
    assert events == [("fsync", "file"), ("replace", "run.json"), ("fsync", "folder")]
    assert json.loads((tmp_path / "sub" / "run.json").read_text()) == {"a": [1, 2], "b": 1}


def test_aside_names_differ_per_attempt(tmp_path):
    assert gio.aside_path(tmp_path / "x") != gio.aside_path(tmp_path / "x")
