"""What reaches the terminal: control characters made visible.

Names read from user files (scenario, class and damage-state names, asset ids) and the
values quoted in error messages are echoed to the terminal.  An escape sequence in such a
name would be executed by the terminal (clear the screen, move the cursor, recolour) and
a carriage return or newline could overwrite or forge a line of the summary.  Everything
the command line prints therefore goes through :func:`echo`, which shows every control
character as a visible escape (``\\x1b``, ``\\r`` ...); tables and files keep the text as
it was given.
"""
from __future__ import annotations

import sys

__all__ = ["visible", "one_line", "echo"]

_NAMED = {"\t": "\\t", "\n": "\\n", "\r": "\\r"}
#: C0 controls, DEL, C1 controls (0x9b is a one-byte escape-sequence introducer on some
#: terminals) and the bidirectional embeddings, overrides and isolates (they reorder what
#: is shown)
_CONTROLS = [*range(0x00, 0x20), 0x7F, *range(0x80, 0xA0), *range(0x202A, 0x202F), *range(0x2066, 0x206A)]
_TABLE = {c: _NAMED.get(chr(c), f"\\x{c:02x}" if c < 0x100 else f"\\u{c:04x}") for c in _CONTROLS}
_TABLE_KEEP_NEWLINE = {c: v for c, v in _TABLE.items() if c != ord("\n")}


def visible(text, *, keep_newlines=False):
    """``text`` with every control character replaced by a visible escape.

    Parameters
    ----------
    text : object
        Converted with ``str``.
    keep_newlines : bool
        Keep ``\\n`` as a line break (text of several lines built by this program).

    Returns
    -------
    str
        Printable text; the escapes themselves are printable, so applying this twice
        changes nothing more.
    """
    return str(text).translate(_TABLE_KEEP_NEWLINE if keep_newlines else _TABLE)


def one_line(text):
    """``text`` as one printable line (newlines escaped too).

    Parameters
    ----------
    text : object
        Converted with ``str``.

    Returns
    -------
    str
    """
    return visible(text)


def echo(*values, sep=" ", end="\n", file=None, flush=False):
    """``print`` with control characters made visible (line breaks between lines are kept).

    The command line prints through this function only.  Text of several lines keeps its
    line breaks; a value that must stay on one line (a name inside a summary line, an error
    line) is passed through :func:`one_line` or :func:`visible` first.

    Parameters
    ----------
    *values : object
        What to print, converted with ``str``.
    sep, end : str
        As for ``print``.
    file : file-like, optional
        Default ``sys.stdout``.
    flush : bool
        Flush the stream after writing.
    """
    text = sep.join(visible(v, keep_newlines=True) for v in values)
    print(text, end=end, file=sys.stdout if file is None else file, flush=flush)
