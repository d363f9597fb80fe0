"""Files of ``quakefolio fit-fragility``: the analysis-results table in, the library update out.

:func:`read_fit_data` reads a CSV or Parquet file of structural-analysis results and
tells which fitting method it suits: multiple-stripe results (columns ``im``,
``n_records``, ``n_exceed``) or incremental dynamic analysis (column ``im_at_failure``,
with ``im_max`` for records that did not fail, i.e. truncated IDA).  Every problem is an
:class:`~quakefolio.core.errors.InputError` naming file, row and column.

:func:`write_fitted_state` adds or replaces one damage state of a fragility library
file: the updated library is validated before the file is replaced atomically, and a
library that is already invalid is never rewritten.  An existing file is edited in place
(:mod:`quakefolio.pipeline.io.library_edit`): its comments, key order and spacing are
kept, or the update is refused when they cannot be.  A symbolic link is written through:
its target is replaced atomically (in the target's folder) and the link stays.
"""
from __future__ import annotations

import os
import stat
import tomllib
from pathlib import Path

import numpy as np

from quakefolio.core.errors import InputError, OutputError
from quakefolio.fragility.fitting import library_to_toml, set_damage_state
from quakefolio.fragility.library import FORMAT_TAG, load_library, parse_library, read_toml
from quakefolio.pipeline.io.ingest import NON_NEGATIVE, POSITIVE, WHOLE, _numbers, read_table
from quakefolio.pipeline.io.library_edit import LayoutError, update_library_text
from quakefolio.pipeline.io.store import atomic_write_text, denied

__all__ = ["read_fit_data", "write_fitted_state", "FIT_COLUMNS"]

#: Columns of a fit-fragility DATA file (none required by itself; the method decides).
FIT_COLUMNS = {"im": False, "n_records": False, "n_exceed": False, "im_at_failure": False, "im_max": False}
#: Multiple-stripe columns and the per-cell rules of each.
_MSA_RULES = {"im": (POSITIVE,), "n_records": (POSITIVE, WHOLE), "n_exceed": (NON_NEGATIVE, WHOLE)}
_MSA_COLUMNS = tuple(_MSA_RULES)


def _detect_method(path, cols):
    """``"msa"`` or None (some IDA form) from the columns present, when no --method was given."""
    has_msa = [c for c in _MSA_COLUMNS if c in cols]
    if has_msa and "im_at_failure" in cols:
        raise InputError(path, f"holds both multiple-stripe columns ({', '.join(has_msa)}) and im_at_failure; "
                               "choose with --method", row=1, column="im_at_failure")
    if not has_msa and "im_at_failure" not in cols:
        raise InputError(path, "cannot tell the kind of results: expected columns im, n_records, n_exceed "
                               "(multiple-stripe analysis) or im_at_failure (IDA)", row=1)
    return "msa" if has_msa else None


def _read_msa(path, frame, rows, im_max):
    """Stripes: IM [g], records run and records exceeding the damage state, per row."""
    for col in _MSA_COLUMNS:
        if col not in frame.columns:
            raise InputError(path, "missing required column", row=1, column=col)
    if im_max is not None:
        raise InputError(path, "--im-max applies to truncated IDA results, not to multiple-stripe results")
    data = {col: _numbers(frame, rows, path, col, rules) for col, rules in _MSA_RULES.items()}
    over = data["n_exceed"] > data["n_records"]
    if over.any():
        i = int(np.argmax(over))
        raise InputError(path, f"n_exceed ({data['n_exceed'][i]:g}) is larger than n_records "
                               f"({data['n_records'][i]:g})", row=int(rows[i]), column="n_exceed")
    return "msa", data


def _truncation_cap(path, frame, rows, failure, im_max):
    """Largest IM run per record [g]: ``--im-max`` for all, or the ``im_max`` column."""
    cols = set(frame.columns)
    standing = np.isnan(failure)
    if im_max is not None and "im_max" in cols:
        raise InputError(path, "give the largest IM run either as --im-max or as this column, not both", row=1,
                         column="im_max")
    if im_max is None and "im_max" not in cols:
        raise InputError(path, "truncated IDA needs the largest IM run of the records that did not fail: give "
                               "--im-max X or a column im_max", row=1, column="im_at_failure")
    if im_max is not None:
        return np.full(failure.shape, float(im_max))
    cap = _numbers(frame, rows, path, "im_max", (POSITIVE,), required=False)
    missing = standing & np.isnan(cap)
    if missing.any():
        raise InputError(path, "missing value: this record did not fail, so it needs its largest IM run",
                         row=int(rows[np.argmax(missing)]), column="im_max")
    return np.where(np.isnan(cap), failure, cap)


def _read_ida(path, frame, rows, method, im_max):
    """IDA: IM at failure per record [g] (empty: did not fail), complete or truncated."""
    cols = set(frame.columns)
    if "im_at_failure" not in cols:
        raise InputError(path, "missing required column", row=1, column="im_at_failure")
    failure = _numbers(frame, rows, path, "im_at_failure", (POSITIVE,), required=False)
    standing = np.isnan(failure)
    if method is None:
        method = "ida-truncated" if standing.any() or im_max is not None or "im_max" in cols else "ida"
    if method == "ida":
        if im_max is not None:
            raise InputError(path, "--im-max applies to truncated IDA results; use --method ida-truncated")
        if standing.any():
            raise InputError(path, "missing value: a record that did not fail needs --method ida-truncated with "
                                   "--im-max X or a column im_max", row=int(rows[np.argmax(standing)]),
                             column="im_at_failure")
        return "ida", {"im_at_failure": failure}
    cap = _truncation_cap(path, frame, rows, failure, im_max)
    above = ~standing & (failure > cap)
    if above.any():
        i = int(np.argmax(above))
        raise InputError(path, f"failure at {failure[i]:g} g lies above the largest IM run {cap[i]:g} g",
                         row=int(rows[i]), column="im_at_failure")
    return "ida-truncated", {"im_at_failure": failure, "im_max": cap}


def read_fit_data(path, method=None, im_max=None):
    """Validated arrays of a fit-fragility DATA file.

    Parameters
    ----------
    path : str or Path
        CSV or Parquet file of analysis results.
    method : {"msa", "ida", "ida-truncated"} or None
        Fitting method; None: told from the columns present.
    im_max : float or None
        Largest IM run of records that did not fail [g] (truncated IDA), if not a column.

    Returns
    -------
    (str, dict)
        The method and the keyword arguments of its fitting function in
        :mod:`quakefolio.fragility.fitting` (arrays of shape (n_rows,)).

    Raises
    ------
    InputError
        On any problem, naming file, row and column.
    """
    frame, rows = read_table(path, FIT_COLUMNS)
    if method is None:
        method = _detect_method(path, set(frame.columns))
    if method == "msa":
        return _read_msa(path, frame, rows, im_max)
    return _read_ida(path, frame, rows, method, im_max)


def _existing_library(path):
    """Text and parsed data of the library to update (None, and a new empty library, if the file does not exist)."""
    if os.path.lexists(path) and not path.exists():
        raise InputError(path, f"is a symbolic link to a missing file ({os.readlink(path)!r}); name the library file "
                               "itself")
    if path.exists():
        text, data, _ = read_toml(path)
        parse_library(data, text=text, path=str(path))  # never rewrite a library that is already invalid
        return text, data
    if not path.parent.is_dir():
        raise InputError(path, f"folder {str(path.parent)!r} does not exist")
    return None, {"format": FORMAT_TAG, "classes": {}}


def _header(text, tag, note):
    """The leading comment block of ``text`` without earlier lines starting with ``tag``, plus ``note``."""
    header = []
    for line in text.splitlines():
        if line.strip() and not line.startswith("#"):
            break
        if not line.startswith(tag):
            header.append(line)
    while header and not header[-1].strip():
        header.pop()
    header.append(note)
    return "\n".join(header)


def _replace_file(path, text):
    """Write ``text`` to ``path`` atomically, keeping the permissions of an existing file.

    A symbolic link is followed: its target is replaced (the temporary file goes to the
    target's folder) and the link itself stays.

    Parameters
    ----------
    path : pathlib.Path
        The library file (its folder must exist).
    text : str
        The whole new content (UTF-8, newlines as given).

    Returns
    -------
    pathlib.Path
        The file written (the link's target for a link).

    Raises
    ------
    OutputError
        When the system refuses the write (naming the file or folder).
    """
    target = Path(os.path.realpath(path))
    if target.exists() and not target.is_file():
        raise OutputError(target, "is not a regular file; the library is written only to a regular file")
    mode = stat.S_IMODE(target.stat().st_mode) if target.exists() else None
    try:
        atomic_write_text(target, text, mode=mode)
    except OSError as exc:
        out = denied(exc, target.parent, "cannot write the library (it is replaced through a temporary file in "
                                         "its folder)")
        if out is None:
            raise
        raise out from None
    return target


def write_fitted_state(library_path, class_code, state, fit, *, data_path, mean_damage_ratio=None, cov=None,
                       im=None):
    """Add or replace one damage state of a fragility library file with a fitted fragility.

    Parameters
    ----------
    library_path : str or Path
        Library TOML file to update (created if absent; its folder must exist).
    class_code : str
        Building class to update or create.
    state : str
        Damage state to add or replace.
    fit : quakefolio.fragility.fitting result
        The fit: ``median`` [g], ``beta_total`` [-], ``method`` and ``n``.
    data_path : str or Path
        The analysis-results file, named in the header comment.
    mean_damage_ratio, cov : float or None
        Consequence model of the state [-] (see ``set_damage_state``).
    im : str or None
        IM of the fit (required for a new class).

    Returns
    -------
    list of str
        Lines to print: what was written, then notes.

    Raises
    ------
    InputError
        When the library is invalid before or would be after the update, or the update
        cannot keep the file's comments and layout.
    OutputError
        When the file cannot be written (naming it and what was attempted).
    """
    path = Path(library_path)
    text, data = _existing_library(path)
    try:
        new, notes = set_damage_state(data, class_code, state, fit.median, fit.beta_total,
                                      mean_damage_ratio=mean_damage_ratio, cov=cov, im=im)
    except ValueError as exc:
        raise InputError(path, str(exc), column=f"classes.{class_code}") from None
    tag = f"# fit-fragility: classes.{class_code} state {state!r}"
    note = f"{tag} fitted to {Path(data_path).name!r} ({fit.method}, n = {fit.n}; beta is beta_total)"
    if text is None:  # a new file
        new_text = library_to_toml(new, header=_header("# quakefolio fragility library\n", tag, note))
    else:
        try:
            new_text = update_library_text(text, data, new, class_code, state, tag=tag, note=note)
        except LayoutError as exc:
            raise InputError(path, f"refused: cannot update the file in place and keep its comments and layout "
                                   f"({exc}); nothing written. Write the state as a [[classes.{class_code}.states]] "
                                   "table, one key per line, or edit the file by hand", column=f"classes.{class_code}") \
                from None
    try:  # validate before replacing anything; line numbers of the unwritten text would mislead, so none are given
        parse_library(tomllib.loads(new_text), text=new_text, path=str(path))
    except InputError as exc:
        raise InputError(path, f"refused, the updated library would be invalid: {exc.message}",
                         column=exc.column) from None
    written_to = _replace_file(path, new_text)
    load_library(path)  # the file as written loads in our format
    written = next(s for s in new["classes"][class_code]["states"] if s["name"] == state)
    where = f"{path} (link to {written_to})" if path.is_symlink() else str(path)
    return [f"wrote {where}: class {class_code!r}, state {state!r}: median {written['median']:g} g, "
            f"beta {written['beta']:g} (beta_total)"] + [f"note: {n}" for n in notes]
