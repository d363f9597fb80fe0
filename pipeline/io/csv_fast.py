"""Vectorised reading of regular CSV files and of numeric text columns (the fast path of ingest).

:mod:`quakefolio.pipeline.io.ingest` reads every CSV file through the general reader: the
standard-library parser for record start lines (a quoted field may span lines) and pandas
for the cells.  Most files are *regular*: no quote character, no control character other
than tab and line ends, ``\\n`` or ``\\r\\n`` line ends only, no byte-order mark, the header
on line 1 with at least two non-empty names, and every non-empty line one record with as
many fields as the header.  For those, each non-empty line after the header is one record,
so the record start lines follow from the positions of the line ends (numpy), and the cells
are parsed by Arrow's CSV reader as text.  :func:`read_regular_csv` returns None for any
file that is not regular, or when Arrow meets a record it cannot read; the general reader
then reads it and reports any problem exactly as before.

Numeric cells are parsed by Arrow's cast from text to float64 (correctly rounded, as the
general path's parser is); :func:`parse_numbers` returns None whenever a cell has white
space around it, a missing-value word, does not parse, or parses to a negative zero (the
general path gives +0 for ``-0`` in a column of integers), so the general path decides
every doubtful column.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
from pyarrow import csv as pa_csv

from quakefolio.core.errors import InputError

__all__ = ["read_regular_csv", "parse_numbers", "first_line", "check_unique_columns"]

_BOM = b"\xef\xbb\xbf"
_NL, _CR, _TAB, _QUOTE = 10, 13, 9, 34


def first_line(text, window=1 << 16):
    """The first non-blank line of ``text`` (stripped), as ``text.splitlines()`` would find it; None if none.

    Only a prefix of ``text`` is split when the line ends inside it (a large file is not
    split into a million lines to look at its header).

    Parameters
    ----------
    text : str
        Decoded file content.
    window : int
        Characters looked at first.

    Returns
    -------
    str or None
    """
    lines = text[:window].splitlines() if len(text) > window else text.splitlines()
    complete = lines[:-1] if len(text) > window else lines  # the last line of a prefix may be cut
    for ln in complete:
        if ln.strip():
            return ln.strip()
    if len(text) > window:
        return first_line(text, window * 16)
    return None


def check_unique_columns(path, names):
    """Refuse a header naming a column twice (row 1, the column named).

    Parameters
    ----------
    path : str or Path
        The file (named in the error).
    names : list of str
        Header fields, stripped.

    Raises
    ------
    InputError
        At the first name seen before.
    """
    seen = set()
    for name in names:
        if name in seen:
            raise InputError(path, "column name appears more than once in the header", row=1, column=name)
        seen.add(name)


def _regular_lines(raw):
    """Record start lines (1-based) and header fields of a regular CSV file, or None.

    Parameters
    ----------
    raw : bytes
        The file content (valid UTF-8).

    Returns
    -------
    (list of str, ndarray of int64) or None
        The header's fields as written and the line of every non-empty line after it.
    """
    if not raw or raw.startswith(_BOM) or b'"' in raw:
        return None
    buf = np.frombuffer(raw, dtype=np.uint8)
    where = np.flatnonzero(buf < 32)  # line ends, tabs and any other control byte
    ctrl = buf[where]
    if not np.all((ctrl == _NL) | (ctrl == _CR) | (ctrl == _TAB)):
        return None  # NUL or another control character: the general reader decides
    cr = where[ctrl == _CR]
    if len(cr) and (cr[-1] + 1 >= len(buf) or not np.all(buf[cr + 1] == _NL)):
        return None  # a lone carriage return ends a line for some parsers and not others
    ends = where[ctrl == _NL]
    starts = np.concatenate(([0], ends + 1))
    stops = np.concatenate((ends, [len(buf)]))
    length = stops - starts
    if len(cr):
        length = length - (buf[np.maximum(stops - 1, 0)] == _CR) * (length > 0)
    if length[0] == 0:
        return None  # blank lines before the header: the general reader decides
    header = raw[: int(starts[0] + length[0])].decode("utf-8").split(",")
    if len(header) < 2 or not all(f.strip() for f in header):
        return None
    lines = np.flatnonzero(length[1:] > 0) + 2  # 1-based line numbers of the non-empty lines after the header
    return header, lines


def read_regular_csv(path, raw):
    """Frame (every cell as text) and record start lines of a regular CSV file; None otherwise.

    The frame equals the general reader's (pandas ``read_csv`` with ``dtype=str``,
    ``keep_default_na=False``): every cell as written, empty cells as ``""``.

    Parameters
    ----------
    path : str or Path
        The file (named in errors).
    raw : bytes
        Its content, already checked to be UTF-8.

    Returns
    -------
    (pandas.DataFrame, ndarray of int64) or None
        None when the file is not regular (see the module docstring): read it with the
        general reader.

    Raises
    ------
    InputError
        A column name that appears twice in the header (row 1), as the general reader.
    """
    found = _regular_lines(raw)
    if found is None:
        return None
    header, lines = found
    check_unique_columns(path, [f.strip() for f in header])
    if not len(lines):
        return None
    names = [f"c{i}" for i in range(len(header))]
    try:
        table = pa_csv.read_csv(
            pa.BufferReader(raw),
            read_options=pa_csv.ReadOptions(column_names=names, skip_rows=1),
            parse_options=pa_csv.ParseOptions(newlines_in_values=False, ignore_empty_lines=True),
            convert_options=pa_csv.ConvertOptions(column_types={n: pa.string() for n in names},
                                                  strings_can_be_null=False, quoted_strings_can_be_null=False))
    except (pa.ArrowInvalid, pa.ArrowException):
        return None
    if table.num_rows != len(lines):
        return None
    frame = table.rename_columns(header).to_pandas()
    return frame, lines.astype(np.int64)


def parse_numbers(cells):
    """Float64 values and empty cells of a text column of plain numbers; None where the general parser must decide.

    Accepted at once: every cell either empty (``""``) or a number Arrow's cast reads
    (no surrounding white space, no ``nan`` spelling).  Anything else (white space, a
    missing-value word, a cell that does not parse, a negative zero) returns None: the
    caller's general parser then reads the column and reports any bad cell.

    Parameters
    ----------
    cells : pandas.Series of str
        The column as read (not stripped).

    Returns
    -------
    (ndarray of float64, ndarray of bool) or None
        Values (NaN where empty) and the empty cells.
    """
    try:
        text = pa.array(cells, type=pa.string())
        if text.null_count:
            return None
        empty = pc.equal(text, "")
        values = pc.cast(pc.if_else(empty, pa.scalar(None, pa.string()), text), pa.float64())
    except (pa.ArrowInvalid, pa.ArrowTypeError, pa.ArrowNotImplementedError):
        return None
    values = np.asarray(values.to_numpy(zero_copy_only=False), dtype=float)
    empty = np.asarray(empty.to_numpy(zero_copy_only=False), dtype=bool)
    if np.any(np.isnan(values) & ~empty):
        return None  # a "nan" spelling: the general parser reads it as empty or reports it
    if np.any((values == 0) & np.signbit(values)):
        return None  # "-0" reads as +0 in a column of integers under the general parser
    return values, empty


def _offsets_and_bytes(text):
    """Offsets (n + 1,) and UTF-8 bytes of an Arrow text array, as numpy views."""
    if isinstance(text, pa.ChunkedArray):
        text = text.combine_chunks()
    if text.type != pa.large_string():
        text = text.cast(pa.large_string())
    _, offsets, data = text.buffers()
    offsets = np.frombuffer(offsets, dtype=np.int64)[text.offset: text.offset + len(text) + 1]
    data = np.frombuffer(data, dtype=np.uint8) if data is not None else np.zeros(0, dtype=np.uint8)
    return offsets, data


def identifier_problems(ids, formula_start):
    """Masks of identifier cells that are missing, start with a formula character or hold a control
    character, or are longer than 128 characters.

    Parameters
    ----------
    ids : pandas.Series of str
        Stripped identifiers, no missing values.
    formula_start : tuple of str
        One-character prefixes refused (ASCII).

    Returns
    -------
    missing, formula, long : ndarray of bool (n,)
        ``missing``: empty, ``nan`` or ``none`` (any case); ``formula``: a first character
        in ``formula_start`` or any character below U+0020; ``long``: more than 128
        characters.

    Notes
    -----
    Characters below U+0020 are exactly the UTF-8 bytes below 0x20 (every byte of a
    multi-byte sequence is 0x80 or above), and a one-character ASCII prefix is the first
    byte, so both are read from the array's bytes at once; only an array holding some
    control byte is searched cell by cell.
    """
    text = pa.array(ids, type=pa.string())
    offsets, data = _offsets_and_bytes(text)
    nbytes = np.diff(offsets)
    nonempty = nbytes > 0
    first = np.zeros(len(nbytes), dtype=np.uint8)
    first[nonempty] = data[offsets[:-1][nonempty]]
    formula = np.isin(first, np.frombuffer("".join(formula_start).encode("ascii"), dtype=np.uint8)) & nonempty
    if np.any(data[offsets[0]: offsets[-1]] < 32):
        formula |= np.asarray(pc.match_substring_regex(text, r"[\x00-\x1f]").to_numpy(zero_copy_only=False),
                              dtype=bool)
    short = (nbytes >= 3) & (nbytes <= 4)
    missing = ~nonempty
    if short.any():
        words = pc.is_in(pc.utf8_lower(text.filter(pa.array(short))), pa.array(["nan", "none"]))
        missing[short] = np.asarray(words.to_numpy(zero_copy_only=False), dtype=bool)
    long = nbytes > 128  # bytes >= characters: only these can be too long
    if long.any():
        long[long] = np.asarray(pc.utf8_length(text.filter(pa.array(long))).to_numpy(zero_copy_only=False)) > 128
    return missing, formula, long
