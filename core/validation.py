"""Constraints declared as data, and the one validator that applies them.

A reader declares what it accepts as small constraint objects (a number type, an
interval, a choice set, a list of items, a pattern) grouped into :class:`Field` and
:class:`Schema` objects; :func:`validate_table` applies a schema to one parsed table
(a TOML table, a config section) and raises every problem in the project's one error
shape, :class:`quakefolio.core.errors.InputError` (file, row or line, column or key,
message).  Each constraint knows how to check a value, how to check a whole column at
once (:meth:`Constraint.violations`, for tabular files) and how to describe itself::

    Interval(0, None, closed="neither").describe()   # 'expected a positive number'

Pure Python and numpy: no file access.  Where the rows and columns of a file are is
told by a :class:`Place`, which the file readers build.
"""
from __future__ import annotations

import math
import re
from dataclasses import dataclass, field
from typing import Callable

import numpy as np

from quakefolio.core.errors import InputError, did_you_mean, locate_toml_line

__all__ = ["Invalid", "Constraint", "Real", "Integer", "Boolean", "Text", "OneOf", "Interval", "Pattern",
           "ListOf", "Rule", "WholeNumber", "MaxMagnitude", "Field", "Schema", "Place", "REQUIRED",
           "check_value", "validate_table", "toml_place"]


class Invalid(Exception):
    """Raised by :meth:`Constraint.convert` when a value passes the check but cannot be converted."""

    def __init__(self, message):
        super().__init__(message)
        self.message = message


class Constraint:
    """A declared condition on one value.

    Subclasses implement :meth:`holds` (one value) and, where tabular files use them,
    :meth:`violations` (a whole float column).  ``message`` overrides the generated
    description (a callable ``message(value) -> str`` words a failure in terms of the
    value); ``show_value`` appends ``", got <value>"`` to the failure message.
    """

    show_value = True

    def __init__(self, message=None, *, show_value=True):
        self.message = message
        self.show_value = show_value

    def holds(self, value):
        """True when ``value`` satisfies the constraint.

        Parameters
        ----------
        value : object
            The value to check.

        Returns
        -------
        bool
        """
        raise NotImplementedError

    def violations(self, values):
        """Element-wise failures of a float column.

        Parameters
        ----------
        values : ndarray of float (n,)
            Column values; NaN marks an empty cell (the caller masks those out).

        Returns
        -------
        ndarray of bool (n,)
            True where the value breaks the constraint.
        """
        return np.array([not self.holds(v) for v in values], dtype=bool)

    def default_description(self):
        """Description used when no ``message`` is given (``"expected ..."``)."""
        return "invalid value"

    def describe(self):
        """What the constraint accepts, as the start of an error message.

        Returns
        -------
        str
            e.g. ``"expected a positive number"``.
        """
        return self.message if self.message is not None else self.default_description()

    def convert(self, value, context):
        """The value after the check has passed (identity unless a subclass converts).

        Parameters
        ----------
        value : object
            A value for which :meth:`holds` is true.
        context : dict
            Reader-specific settings (e.g. the folder relative paths are resolved against).

        Returns
        -------
        object
        """
        return value

    def failure(self, value, shown):
        """The error message for ``value``, or None when the constraint holds.

        Parameters
        ----------
        value : object
            The value to check (possibly converted by earlier constraints).
        shown : object
            The value as the user wrote it, quoted with ``repr`` after ``", got "``.

        Returns
        -------
        str or None
        """
        if self.holds(value):
            return None
        text = self.message(value) if callable(self.message) else self.describe()
        return f"{text}, got {shown!r}" if self.show_value else text


def _is_number(value):
    return not isinstance(value, bool) and isinstance(value, (int, float))


class Real(Constraint):
    """A real number (int or float, not bool), optionally finite; converted to float."""

    def __init__(self, message=None, *, finite=False, show_value=True):
        super().__init__(message, show_value=show_value)
        self.finite = finite

    def holds(self, value):
        return _is_number(value) and (not self.finite or math.isfinite(value))

    def violations(self, values):
        return ~np.isfinite(values) if self.finite else np.zeros(len(values), dtype=bool)

    def default_description(self):
        return "expected a finite number" if self.finite else "expected a number"

    def convert(self, value, context):
        return float(value)


class Integer(Constraint):
    """An integer (not bool); not converted."""

    def holds(self, value):
        return not isinstance(value, bool) and isinstance(value, int)

    def default_description(self):
        return "expected an integer"


class Boolean(Constraint):
    """``true`` or ``false``."""

    def holds(self, value):
        return isinstance(value, bool)

    def default_description(self):
        return "expected true or false"


class Text(Constraint):
    """A string; with ``non_empty`` one that is not blank."""

    def __init__(self, message=None, *, non_empty=False, show_value=True):
        super().__init__(message, show_value=show_value)
        self.non_empty = non_empty

    def holds(self, value):
        return isinstance(value, str) and (not self.non_empty or bool(value.strip()))

    def default_description(self):
        return "expected a non-empty string" if self.non_empty else "expected a string"


class OneOf(Constraint):
    """One of a fixed set of values (compared with ``in``)."""

    def __init__(self, options, message=None, *, show_value=True):
        super().__init__(message, show_value=show_value)
        self.options = tuple(options)

    def holds(self, value):
        return value in self.options

    def default_description(self):
        return f"expected one of {', '.join(repr(c) for c in self.options)}"


class Interval(Constraint):
    """A number between ``lo`` and ``hi`` (either may be None: unbounded).

    ``closed`` is ``"both"``, ``"left"``, ``"right"`` or ``"neither"``; NaN never lies
    in an interval.
    """

    def __init__(self, lo=None, hi=None, *, closed="both", message=None, show_value=True):
        super().__init__(message, show_value=show_value)
        if closed not in ("both", "left", "right", "neither"):
            raise ValueError(f"closed must be 'both', 'left', 'right' or 'neither', got {closed!r}")
        self.lo, self.hi, self.closed = lo, hi, closed

    def _above_lo(self, v):
        if self.lo is None:
            return v == v
        return v >= self.lo if self.closed in ("both", "left") else v > self.lo

    def _below_hi(self, v):
        if self.hi is None:
            return v == v
        return v <= self.hi if self.closed in ("both", "right") else v < self.hi

    def holds(self, value):
        return bool(self._above_lo(value) and self._below_hi(value))

    def violations(self, values):
        if self.hi is None:
            return ~self._above_lo(values)
        if self.lo is None:
            return ~self._below_hi(values)
        return ~(self._above_lo(values) & self._below_hi(values))

    def default_description(self):
        if self.hi is None and self.lo == 0:
            return "expected a non-negative number" if self.closed in ("both", "left") else \
                "expected a positive number"
        left = "[" if self.closed in ("both", "left") else "("
        right = "]" if self.closed in ("both", "right") else ")"
        lo = "-inf" if self.lo is None else f"{self.lo:g}"
        hi = "inf" if self.hi is None else f"{self.hi:g}"
        return f"expected a number in {left}{lo}, {hi}{right}"


class Pattern(Constraint):
    """A string matching a regular expression (``re.match``); ``allow_empty`` also accepts ``""``."""

    def __init__(self, regex, message=None, *, allow_empty=False, show_value=True):
        super().__init__(message, show_value=show_value)
        self.regex = re.compile(regex)
        self.allow_empty = allow_empty

    def holds(self, value):
        if self.allow_empty and not value:
            return True
        return isinstance(value, str) and self.regex.match(value) is not None

    def default_description(self):
        return f"expected a string matching {self.regex.pattern!r}"


class ListOf(Constraint):
    """A list whose items all satisfy ``item`` (if given), of at least ``min_len`` items,
    strictly increasing if ``increasing``; items are converted by ``item``."""

    def __init__(self, item=None, message=None, *, min_len=0, increasing=False, show_value=True):
        super().__init__(message, show_value=show_value)
        self.item, self.min_len, self.increasing = item, min_len, increasing

    def holds(self, value):
        if not isinstance(value, list) or len(value) < self.min_len:
            return False
        if self.item is not None and not all(self.item.holds(v) for v in value):
            return False
        return not self.increasing or sorted(set(value)) == list(value)

    def default_description(self):
        what = "a list" if self.item is None else f"a list of items each {self.item.describe()}"
        return f"expected {what}"

    def convert(self, value, context):
        if self.item is None:
            return value
        return [self.item.convert(v, context) for v in value]


class Rule(Constraint):
    """Any condition given as a function ``value -> bool``, with its description."""

    def __init__(self, test, message, *, show_value=True, column_test=None):
        super().__init__(message, show_value=show_value)
        self.test, self.column_test = test, column_test

    def holds(self, value):
        return bool(self.test(value))

    def violations(self, values):
        if self.column_test is not None:
            return self.column_test(values)
        return super().violations(values)


class WholeNumber(Constraint):
    """A number without fractional part (NaN counts as 0, i.e. passes)."""

    def holds(self, value):
        v = np.nan_to_num(value)
        return bool(v == np.round(v))

    def violations(self, values):
        v = np.nan_to_num(values)
        return v != np.round(v)

    def default_description(self):
        return "expected an integer"


class MaxMagnitude(Constraint):
    """``|x| <= limit`` (NaN counts as 0, i.e. passes): guards against absurdly large values."""

    def __init__(self, limit, message=None, *, show_value=True):
        super().__init__(message, show_value=show_value)
        self.limit = limit

    def holds(self, value):
        return not bool(abs(np.nan_to_num(value)) > self.limit)

    def violations(self, values):
        return np.abs(np.nan_to_num(values)) > self.limit

    def default_description(self):
        return f"value out of range (|x| > {self.limit:g})"


REQUIRED = object()


@dataclass(frozen=True)
class Field:
    """One key of a table: its constraints (checked and applied in order), default and help.

    ``rules`` are checked in order; after a rule holds, its :meth:`Constraint.convert`
    is applied, so later rules see the converted value.  ``default`` is
    :data:`REQUIRED` when the key must be given.  ``help`` documents meaning and unit.
    """

    rules: tuple = ()
    default: object = REQUIRED
    help: str = ""

    @property
    def required(self):
        """True when the key has no default."""
        return self.default is REQUIRED


@dataclass(frozen=True)
class Schema:
    """The keys a table accepts and how its errors read.

    Attributes
    ----------
    fields : dict
        Key -> :class:`Field`, in checking order.
    cutoff : float
        Similarity cutoff of the "did you mean" hint for unknown keys.
    valid_label : str
        Label of the list of valid keys shown when no key is close (``"valid keys"``).
    missing : str
        Message for a missing required key; ``{key}`` is replaced by the key.
    missing_names_key : bool
        Whether the column of a missing-key error names the key (``table.key``) or only
        the table.
    missing_first : bool
        Whether every required key is checked for presence before any value is checked
        (otherwise presence and value are checked key by key).
    """

    fields: dict
    cutoff: float = 0.6
    valid_label: str = "valid keys"
    missing: str = "missing required key '{key}'"
    missing_names_key: bool = True
    missing_first: bool = False


@dataclass(frozen=True)
class Place:
    """Where a table sits in a file: the file, how to find the row of a key, the column prefix.

    Attributes
    ----------
    path : str or path-like
        The file.
    locate : callable
        ``locate(key)`` -> 1-based row of ``key`` (``key=None``: of the table itself), or None.
    column : str
        Column (dotted key) of the table; keys are reported as ``column.key``.
    """

    path: object
    locate: Callable = field(default=lambda key: None)
    column: str = ""

    def column_of(self, key):
        """Column name of ``key`` (the table's own column when ``key`` is None)."""
        if key is None:
            return self.column or None
        return f"{self.column}.{key}" if self.column else key

    def error(self, message, key=None, *, row_key=REQUIRED, column=REQUIRED):
        """The :class:`InputError` for ``message`` at ``key``.

        Parameters
        ----------
        message : str
            What is wrong.
        key : str or None
            The key at fault (None: the table itself).
        row_key : str or None
            Key whose row is reported, if not ``key``.
        column : str or None
            Column reported, if not that of ``key``.

        Returns
        -------
        InputError
        """
        row = self.locate(key if row_key is REQUIRED else row_key)
        col = self.column_of(key) if column is REQUIRED else column
        return InputError(self.path, message, row=row, column=col)


def toml_place(path, text, table, column, occurrence=0):
    """A :class:`Place` for a table of a TOML document.

    Parameters
    ----------
    path : str or path-like
        The file.
    text : str
        The TOML text ("" when unknown: no rows are reported).
    table : tuple of str
        Table path, e.g. ``("classes", "RCF-LO", "states")``.
    column : str
        Column prefix of the table's keys, e.g. ``"classes.RCF-LO.states[0]"``.
    occurrence : int
        Which entry of an array of tables.

    Returns
    -------
    Place
    """
    return Place(path, lambda key: locate_toml_line(text, table, key, occurrence), column)


def check_value(rules, value, context=None):
    """Apply ``rules`` in order to ``value``.

    Parameters
    ----------
    rules : sequence of Constraint
        Checked in order; each converts the value once it holds.
    value : object
        The value as the user wrote it.
    context : dict or None
        Passed to :meth:`Constraint.convert`.

    Returns
    -------
    (object, str or None)
        The converted value and None, or the value reached and the first failure message.
    """
    context = context or {}
    current = value
    for rule in rules:
        msg = rule.failure(current, value)
        if msg is not None:
            return current, msg
        try:
            current = rule.convert(current, context)
        except Invalid as exc:
            return current, exc.message
    return current, None


def _unknown_keys(table, schema, place):
    for key in table:
        if key not in schema.fields:
            valid = list(schema.fields)
            hint = did_you_mean(key, valid, cutoff=schema.cutoff,
                                otherwise=f"; {schema.valid_label}: {', '.join(valid)}")
            raise place.error(f"unknown key{hint}", key)


def _missing(schema, place, key):
    column = place.column_of(key) if schema.missing_names_key else place.column_of(None)
    return place.error(schema.missing.format(key=key), None, column=column)


def validate_table(table, schema, place, context=None):
    """Check a parsed table against ``schema``; return its converted values with defaults.

    Order of checks: unknown keys (in the table's order, with a "did you mean" hint),
    then required keys and values in the schema's order (all presence checks first when
    ``schema.missing_first``).

    Parameters
    ----------
    table : dict
        The parsed table.
    schema : Schema
        What the table accepts.
    place : Place
        Where the table is, for error messages.
    context : dict or None
        Passed to the constraints' conversions.

    Returns
    -------
    dict
        Every key of the schema: the converted value, or the default when absent.

    Raises
    ------
    InputError
        On the first problem, naming file, row and key.
    """
    _unknown_keys(table, schema, place)
    if schema.missing_first:
        for key, spec in schema.fields.items():
            if spec.required and key not in table:
                raise _missing(schema, place, key)
    out = {}
    for key, spec in schema.fields.items():
        if key not in table:
            if spec.required:
                raise _missing(schema, place, key)
            out[key] = spec.default
            continue
        value, msg = check_value(spec.rules, table[key], context)
        if msg is not None:
            raise place.error(msg, key)
        out[key] = value
    return out
