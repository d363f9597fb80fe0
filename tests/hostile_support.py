"""Shared assertions for hostile-input and fault-injection cases outside the folder corpus.

Every such case asserts what a folder case of ``tests/data/broken`` asserts (see
``tests/test_bad_inputs.py``): the exit status, exactly one located stderr line
``<level>: <where>: <message>`` and no traceback, and that nothing outside the output
folder changed (:func:`snapshot` before, :func:`assert_unchanged` after).
"""
from __future__ import annotations

import re
from pathlib import Path

__all__ = ["ONE_LINE", "one_line", "snapshot", "assert_unchanged"]

# <level>: <where>: <message>; <where> is a file[:row][: column '...'] or a stage/command name
ONE_LINE = re.compile(r"^(?P<level>error|warning|internal error): (?P<msg>\S.*)$")


def one_line(err, pattern, *, level="error", out=""):
    """Assert ``err`` is exactly one ``<level>: ...`` line matching ``pattern``; return the line."""
    assert "Traceback" not in out + err, err[-3000:]
    lines = err.splitlines()
    assert len(lines) == 1, err[-3000:]
    m = ONE_LINE.match(lines[0])
    assert m and m["level"] == level, lines[0]
    assert re.search(pattern, lines[0]), lines[0]
    return lines[0]


def snapshot(root, *, exclude=()):
    """{relative path: (size, mtime_ns)} of every file and folder under ``root``, minus ``exclude`` subtrees."""
    root = Path(root)
    skip = [Path(e).resolve() for e in exclude]
    out = {}
    for p in root.rglob("*"):
        rp = p.resolve() if p.is_symlink() else p
        if "__pycache__" in p.parts or any(rp == s or s in rp.parents for s in skip):
            continue
        st = p.lstat()
        out[p.relative_to(root)] = (st.st_size, st.st_mtime_ns)
    return out


def assert_unchanged(before, root, *, exclude=()):
    """Assert the tree under ``root`` is as :func:`snapshot` saw it (``exclude`` subtrees left out)."""
    after = snapshot(root, exclude=exclude)
    changed = sorted(str(p) for p in set(before) | set(after) if before.get(p) != after.get(p))
    assert not changed, f"changed outside the output folder: {changed[:10]}"
