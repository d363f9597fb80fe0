"""One atomic writer: files and whole folders are put in place by the run store's helpers only."""
from __future__ import annotations

import ast
import os
from pathlib import Path

import pytest

from quakefolio.pipeline.io.store import atomic_publish_folder, atomic_write_bytes

from conftest import REPO


def _folder(path, files):
    path.mkdir()
    for name, text in files.items():
        (path / name).write_text(text)
    return path


def test_publish_folder_renames_and_replaces_on_request(tmp_path):
    final = tmp_path / "entry"
    atomic_publish_folder(_folder(tmp_path / ".one", {"a.txt": "1"}), final)
    assert (final / "a.txt").read_text() == "1" and not (tmp_path / ".one").exists()
    with pytest.raises(OSError):  # a non-empty folder is not replaced unless asked
        atomic_publish_folder(_folder(tmp_path / ".two", {"b.txt": "2"}), final)
    assert sorted(p.name for p in final.iterdir()) == ["a.txt"]
    atomic_publish_folder(tmp_path / ".two", final, replace=True)
    assert sorted(p.name for p in final.iterdir()) == ["b.txt"]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["entry"]  # the replaced folder is gone


def test_publish_folder_puts_the_old_folder_back_when_the_rename_fails(tmp_path, monkeypatch):
    final = _folder(tmp_path / "entry", {"a.txt": "1"})
    partial = _folder(tmp_path / ".new", {"b.txt": "2"})
    real = os.replace

    def failing(src, dst):
        if Path(src) == partial:
            raise OSError("simulated failure")
        return real(src, dst)

    monkeypatch.setattr(os, "replace", failing)
    with pytest.raises(OSError, match="simulated"):
        atomic_publish_folder(partial, final, replace=True)
    assert sorted(p.name for p in final.iterdir()) == ["a.txt"]
    assert sorted(p.name for p in tmp_path.iterdir()) == [".new", "entry"]


def test_write_bytes_keeps_a_given_mode(tmp_path):
    path = atomic_write_bytes(tmp_path / "f.bin", b"abc", mode=0o600)
    assert path.read_bytes() == b"abc" and path.stat().st_mode & 0o777 == 0o600
    assert [p.name for p in tmp_path.iterdir()] == ["f.bin"]


def test_only_the_atomic_writes_rename_over_a_target():
    # the run store's atomic writes (io.atomic): every rename of the pipeline goes through them
    callers = []
    for path in sorted((REPO / "pipeline").rglob("*.py")):
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if isinstance(node, ast.Attribute) and node.attr in ("replace", "rename") \
                    and getattr(node.value, "id", None) == "os":
                callers.append(path.relative_to(REPO).as_posix())
    assert set(callers) == {"pipeline/io/atomic.py"}
