"""Text columns as Arrow arrays: per-asset tables are built by index, never through Python strings.

A run of a million buildings repeats each asset id in several tables (four damage states
per asset ...).  Converting such columns to Python objects and back costs more than the
computation itself, so the stages keep text in Arrow: a text column is an Arrow
``string`` array, a repeated one is :func:`take_text` of it by an index array, and a
column compared against a few values (building classes) becomes integer positions by
:func:`index_of`.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

__all__ = ["text_array", "take_text", "index_of", "text_series"]


def text_array(values):
    """Values as an Arrow ``string`` array (missing values as nulls).

    Parameters
    ----------
    values : pandas.Series, pandas array, numpy array, list or pyarrow array of str
        A pandas column held by Arrow (pandas' ``str`` dtype) is cast without passing
        through Python objects.

    Returns
    -------
    pyarrow.StringArray
    """
    if isinstance(values, (pa.Array, pa.ChunkedArray)):
        arr = values
    elif isinstance(values, pd.Series) and isinstance(values.dtype, pd.StringDtype) \
            and values.dtype.storage == "pyarrow":
        arr = pa.array(values.array)
    elif isinstance(values, pd.Series):
        arr = pa.array(values.astype(object).where(values.notna(), None).to_numpy(), type=pa.string())
    else:
        arr = pa.array(np.asarray(values, dtype=object), type=pa.string())
    if isinstance(arr, pa.ChunkedArray):
        arr = arr.combine_chunks()
    return arr if arr.type == pa.string() else arr.cast(pa.string())


def take_text(text, index):
    """``text[index]`` as an Arrow ``string`` array.

    Parameters
    ----------
    text : pyarrow.StringArray
    index : ndarray of int (m,)
        Positions into ``text``.

    Returns
    -------
    pyarrow.StringArray, length m
    """
    return text.take(pa.array(np.asarray(index, dtype=np.int64)))


def index_of(values, choices):
    """Position of each value in ``choices``; -1 where a value is not among them.

    Parameters
    ----------
    values : pandas.Series, numpy array or pyarrow array of str (n,)
    choices : sequence of str
        Distinct.

    Returns
    -------
    ndarray of int64 (n,)
    """
    found = pc.index_in(text_array(values), value_set=pa.array(list(choices), type=pa.string()))
    return np.asarray(found.fill_null(-1).to_numpy(zero_copy_only=False), dtype=np.int64)


def text_series(text):
    """An Arrow text array as a pandas column of pandas' ``str`` dtype (held by Arrow, not copied to Python).

    Parameters
    ----------
    text : pyarrow.StringArray

    Returns
    -------
    pandas.Series
    """
    return pa.table({"text": text}).to_pandas()["text"]
