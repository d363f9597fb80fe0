"""Editing a fragility library file in place: one damage state, the rest of the text untouched.

``fit-fragility --write-library`` adds or replaces one damage state of one class.  The
file is not regenerated from its parsed content (that would drop every comment and the
user's layout): :func:`update_library_text` changes only

- the values that changed in the state's ``[[classes.<code>.states]]`` table (each on its
  own line, keeping the key's spelling, the spacing and a trailing comment), adding a key
  line the state did not have after its last key line;
- for a new state, a new ``[[classes.<code>.states]]`` table before the state it
  precedes (above that state's own comment lines) or after the class's last state;
- for a new class, a ``[classes.<code>]`` table with its state at the end of the file;
- the file's leading comment block, where the line naming the fit is replaced.

The edited text is parsed again and must give exactly the updated library; when it does
not (states written as inline tables, dotted keys, values over several lines ...) the
edit is refused with :class:`LayoutError` and nothing is written.
"""
from __future__ import annotations

import math
import re
import tomllib

__all__ = ["LayoutError", "update_library_text"]

_HEADER = re.compile(r"^\s*(\[\[?)\s*([^\[\]]+?)\s*(\]\]?)\s*(?:#.*)?$")
_BARE = re.compile(r"[A-Za-z0-9_-]+")
_KEY_PART = re.compile(r'\s*(?:([A-Za-z0-9_-]+)|"((?:[^"\\]|\\.)*)"|\'([^\']*)\')\s*')


class LayoutError(ValueError):
    """The file cannot be edited in place so that it parses to the updated library."""


def _key_path(text):
    """Dotted TOML key as a tuple of names, or None when it is not a plain dotted key."""
    parts, pos = [], 0
    while True:
        m = _KEY_PART.match(text, pos)
        if not m or m.end() == pos:
            return None
        bare, basic, literal = m.groups()
        if basic is not None:
            if "\\" in basic:
                return None  # escapes in table names: not edited in place
            parts.append(basic)
        else:
            parts.append(bare if bare is not None else literal)
        pos = m.end()
        if pos == len(text):
            return tuple(parts)
        if text[pos] != ".":
            return None
        pos += 1


def _headers(lines):
    """``(line index, is array-of-tables, key path)`` of every table header line."""
    out = []
    for i, line in enumerate(lines):
        m = _HEADER.match(line)
        if m and len(m.group(1)) == len(m.group(3)):
            path = _key_path(m.group(2))
            if path is not None:
                out.append((i, m.group(1) == "[[", path))
    return out


def _key(name):
    return name if _BARE.fullmatch(name) else _string(name)


def _string(s):
    out = []
    for ch in s:
        if ch in "\\\"":
            out.append("\\" + ch)
        elif ord(ch) < 32 or ord(ch) == 127:
            out.append(f"\\u{ord(ch):04x}")
        else:
            out.append(ch)
    return '"' + "".join(out) + '"'


def _value(v):
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float) and math.isfinite(v):
        return repr(v)
    if isinstance(v, str):
        return _string(v)
    raise LayoutError(f"cannot write the value {v!r} on one line")


def _is_code(line):
    """A line holding TOML (not blank, not only a comment)."""
    s = line.strip()
    return bool(s) and not s.startswith("#")


def _block_end(headers, start, n_lines):
    """Index of the first line after the table whose header is at ``start``."""
    return next((i for i, _, _ in headers if i > start), n_lines)


def _last_code(lines, lo, hi):
    """Index after the last TOML line in ``lines[lo:hi]`` (``lo`` when there is none)."""
    for i in range(hi - 1, lo - 1, -1):
        if _is_code(lines[i]):
            return i + 1
    return lo


def _set_value(lines, lo, hi, key, value, nl):
    """Replace ``key = ...`` in ``lines[lo:hi]`` keeping spacing and comment, or add it after the last key line."""
    pattern = re.compile(r"^(\s*(?:" + re.escape(key) + r"|\"" + re.escape(key) + r"\"|'" + re.escape(key)
                         + r"')[ \t]*=[ \t]*)([^\s#]+|\"(?:[^\"\\]|\\.)*\")([ \t]*(?:#[^\r\n]*)?)(\r?\n?)$")
    for i in range(lo, hi):
        m = pattern.match(lines[i])
        if m:
            lines[i] = f"{m.group(1)}{_value(value)}{m.group(3)}{m.group(4) or nl}"
            return 0
    at = _last_code(lines, lo + 1, hi)
    lines.insert(at, f"{_key(key)} = {_value(value)}{nl}")
    return 1


def _state_lines(code, state, nl):
    return [f"[[classes.{_key(code)}.states]]{nl}"] + [f"{_key(k)} = {_value(v)}{nl}" for k, v in state.items()]


def _new_class_lines(code, body, nl):
    out = [nl, f"[classes.{_key(code)}]{nl}"]
    out += [f"{_key(k)} = {_value(v)}{nl}" for k, v in body.items() if k != "states"]
    for state in body.get("states", []):
        out += [nl] + _state_lines(code, state, nl)
    return out


def _edit_states(lines, old_body, new_body, code, state_name, nl):
    """Replace or insert the one state of an existing class in ``lines`` (in place)."""
    headers = _headers(lines)
    path = ("classes", code, "states")
    starts = [i for i, is_array, p in headers if is_array and p == path]
    old_states, new_states = old_body.get("states", []), new_body["states"]
    if len(starts) != len(old_states):
        raise LayoutError(f"the states of class {code!r} are not written as [[classes.{code}.states]] tables")
    old_names = [s.get("name") for s in old_states]
    if state_name in old_names:
        pos = old_names.index(state_name)
        old, new = old_states[pos], new_states[pos]
        lo, hi = starts[pos], _block_end(headers, starts[pos], len(lines))
        for key, value in new.items():
            if old.get(key) != value or type(old.get(key)) is not type(value):
                hi += _set_value(lines, lo, hi, key, value, nl)
        return
    pos = [s.get("name") for s in new_states].index(state_name)
    block = _state_lines(code, new_states[pos], nl)
    if pos < len(starts):
        at = starts[pos]
        while at > 0 and lines[at - 1].lstrip().startswith("#"):
            at -= 1  # above the comment lines that belong to the next state
        lines[at:at] = block + [nl]
    else:
        last = starts[-1] if starts else next(i for i, is_array, p in headers if p == ("classes", code))
        at = _last_code(lines, last, _block_end(headers, last, len(lines)))
        lines[at:at] = [nl] + block


def _edit_header(lines, tag, note, nl):
    """Drop earlier lines starting with ``tag`` from the leading comment block and add ``note`` at its end."""
    k = next((i for i, line in enumerate(lines) if _is_code(line)), len(lines))
    lead = [line for line in lines[:k] if not line.startswith(tag)]
    last_comment = max((i for i, line in enumerate(lead) if line.lstrip().startswith("#")), default=-1)
    lead.insert(last_comment + 1, note + nl)
    if last_comment < 0 and k < len(lines) and (not lead[1:] or lead[1].strip()):
        lead.insert(1, nl)  # a blank line between the new comment and the first key
    lines[:k] = lead


def update_library_text(text, old, new, class_code, state_name, *, tag, note):
    """The library file's text with one state of one class changed as ``new`` has it.

    Parameters
    ----------
    text : str
        The file's text (as read; its line endings are kept).
    old : dict
        ``text`` parsed.
    new : dict
        The updated library mapping (``old`` with the one state added or replaced, or a
        new class holding it).
    class_code, state_name : str
        The class and state that changed.
    tag : str
        Start of the header comment line naming the fit of this class and state (an
        earlier such line is replaced).
    note : str
        The new header comment line.

    Returns
    -------
    str
        The edited text; it parses to ``new``.

    Raises
    ------
    LayoutError
        When the change cannot be made in place so that the text parses to ``new``.
    """
    nl = "\r\n" if "\r\n" in text else "\n"
    lines = text.splitlines(keepends=True)
    if lines and not lines[-1].endswith(("\n", "\r")):
        lines[-1] += nl
    old_body = (old.get("classes") or {}).get(class_code)
    new_body = new["classes"][class_code]
    if old_body is None:
        lines += _new_class_lines(class_code, new_body, nl)
    else:
        if {k: v for k, v in old_body.items() if k != "states"} != {k: v for k, v in new_body.items() if k != "states"}:
            raise LayoutError(f"class {class_code!r} would change beyond its states")
        _edit_states(lines, old_body, new_body, class_code, state_name, nl)
    _edit_header(lines, tag, note, nl)
    edited = "".join(lines)
    try:
        parsed = tomllib.loads(edited)
    except tomllib.TOMLDecodeError as exc:
        raise LayoutError(f"the edited text would not parse ({exc})") from None
    if parsed != new:
        raise LayoutError("the edited text would not give the updated library")
    return edited
