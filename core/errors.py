"""The one error shape shared by every layer: a problem located in a user's input.

``InputError`` carries the file, the row (line number for text files, 1-based; the
header of a CSV file is row 1) and the column (a table column or a dotted key for TOML
files).  Its message reads::

    demo_portfolio/exposure.csv:14: column 'replacement_value': expected a positive number, got '-3e5'

This module also holds a small locator for keys in TOML text, so that semantic errors
in TOML files (which the standard parser does not locate) can name a line, and the one
"did you mean" hint used by every reader for misspelt names.
"""
from __future__ import annotations

import difflib
import re

__all__ = ["InputError", "OutputError", "InputWarning", "locate_toml_line", "closest_name", "did_you_mean"]


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


class OutputError(InputError):
    """A place the user asked us to write to that we cannot or must not write to.

    Names the path and what was attempted, e.g. ``/data/out: cannot create the output
    folder: permission denied``.  A user problem like :class:`InputError` (the command
    line prints it as one line and exits 2), kept as a subclass so every handler of input
    errors also handles it.
    """


class InputWarning(str):
    """An accepted but doubtful input, located as :class:`InputError` locates an error.

    It is the warning's text (a ``str``, so it can sit in a run's list of notes and in its
    manifest) and keeps ``path``, ``row``, ``column`` and ``message``.  The command line
    prints it as one line ``warning: <file>[:<row>]: [column '<col>': ]<message>`` on stderr.
    """

    def __new__(cls, path, message, *, row=None, column=None):
        text = str(InputError(path, message, row=row, column=column))
        self = super().__new__(cls, text)
        self.path, self.row, self.column, self.message = (str(path) if path is not None else None), row, column, message
        return self


def closest_name(name, valid, *, cutoff):
    """The valid name nearest to ``name``, or None when none is close enough.

    Parameters
    ----------
    name : str
        The name the user wrote.
    valid : iterable of str
        The accepted names, in the order used to break ties.
    cutoff : float
        Similarity in [0, 1] below which a valid name is not offered.

    Returns
    -------
    str or None
        The best match by :func:`difflib.get_close_matches` (Ratcliff-Obershelp
        similarity), or None.
    """
    close = difflib.get_close_matches(name, list(valid), n=1, cutoff=cutoff)
    return close[0] if close else None


def did_you_mean(name, valid, *, cutoff, otherwise="", skip=(), quote="'"):
    """The hint appended to an "unknown name" message: ``"; did you mean 'x'?"``.

    Parameters
    ----------
    name : str
        The unknown name.
    valid : iterable of str
        The accepted names.
    cutoff : float
        Similarity in [0, 1] below which no name is offered (see :func:`closest_name`).
    otherwise : str
        Text returned when no valid name is close enough (e.g. ``"; valid: a, b"``).
    skip : collection of str
        Names that give no hint when they are the closest match (e.g. columns that are
        already present, so the unknown one is not a misspelling of them); ``otherwise``
        is returned then.
    quote : {"'", "repr"}
        How the suggestion is quoted: in single quotes, or as ``repr(name)``.

    Returns
    -------
    str
        The hint, starting with ``"; "``, or ``otherwise``.
    """
    close = closest_name(name, valid, cutoff=cutoff)
    if close is None or close in skip:
        return otherwise
    shown = repr(close) if quote == "repr" else f"'{close}'"
    return f"; did you mean {shown}?"


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
