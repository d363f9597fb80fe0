"""The one error shape shared by every layer: a problem located in a user's input.

``InputError`` carries the file, the row (line number for text files, 1-based; the
header of a CSV file is row 1) and the column (a table column or a dotted key for TOML
files).  Its message reads::

    demo_portfolio/exposure.csv:14: column 'replacement_value': expected a positive number, got '-3e5'

This module also holds a small locator for keys in TOML text, so that semantic errors
in TOML files (which the standard parser does not locate) can name a line.
"""
from __future__ import annotations

import re

__all__ = ["InputError", "locate_toml_line"]


class InputError(ValueError):
    """A user-input problem with its location (file, row, column)."""

    def __init__(self, path, message, *, row=None, column=None):
        self.path = str(path) if path is not None else None
        self.row = row
        self.column = column
        self.message = message
        super().__init__(self.__str__())

    def __str__(self):
        where = self.path or "<input>"
        if self.row is not None:
            where += f":{self.row}"
        col = f" column '{self.column}':" if self.column is not None else ""
        return f"{where}:{col} {self.message}"


_HEADER = re.compile(r"^\s*\[\[?\s*([^\]]+?)\s*\]\]?\s*(#.*)?$")


def _norm_table(name):
    parts = [p.strip().strip('"').strip("'") for p in re.split(r"\.(?=(?:[^\"]*\"[^\"]*\")*[^\"]*$)", name)]
    return tuple(parts)


def locate_toml_line(text, table, key=None, occurrence=0):
    """1-based line number of ``key`` inside ``[table]`` (or of the header), or None.

    Parameters
    ----------
    text : str
        TOML document.
    table : tuple of str
        Table path, e.g. ``("classes", "RCF-LO", "states")``; ``()`` for the root.
    key : str or None
        Key inside the table; None for the table header line itself.
    occurrence : int
        Which ``[[array-of-tables]]`` entry (0-based) when ``table`` is repeated.

    Only the plain layout (one key per line, tables as headers) is recognised; in any
    other layout the nearest header found is returned, or None.
    """
    lines = text.splitlines()
    current = ()
    seen = -1
    header_line = None if table else 0
    in_target = not table and occurrence == 0
    key_re = re.compile(r"^\s*[\"']?" + re.escape(key) + r"[\"']?\s*=") if key else None
    for no, line in enumerate(lines, start=1):
        m = _HEADER.match(line)
        if m:
            current = _norm_table(m.group(1))
            if current == tuple(table):
                seen += 1
                in_target = seen == occurrence
                if in_target:
                    header_line = no
            else:
                in_target = False
            continue
        if in_target and key_re is not None and key_re.match(line):
            return no
    return header_line or None
