"""Every public function and method of ``pipeline/`` carries a numpydoc docstring.

Read from the source with :mod:`ast` (nothing is imported).  Public means a name without a
leading underscore, defined at module level (also inside module-level ``if``/``try`` blocks)
or as a method of a public class.  The rules (numpydoc docstring standard, sections
underlined with dashes):

- a docstring whose first line is a one-line summary;
- a ``Parameters`` section naming every parameter of the signature except ``self``/``cls``
  and ``*args``/``**kwargs`` (a function with no such parameter needs no section), each
  entry with its type (``name : type``);
- a ``Returns`` section if the function returns a value, a ``Yields`` section if it is a
  generator.

Exempt: dunder methods (``__init__``, ``__post_init__``, ...).  Properties may use a
one-line docstring (they still need one).
"""
from __future__ import annotations

import ast
import inspect
import re
from pathlib import Path

from conftest import REPO

PIPELINE = REPO / "pipeline"
_HEADER = re.compile(r"^(\w[\w ]*)\n-{3,}\s*$", re.MULTILINE)
_PROPERTY_DECORATORS = {"property", "cached_property"}


def _sections(doc):
    """Map each numpydoc section header to the text under it."""
    heads = list(_HEADER.finditer(doc))
    out = {}
    for i, match in enumerate(heads):
        end = heads[i + 1].start() if i + 1 < len(heads) else len(doc)
        out[match.group(1).strip()] = doc[match.end():end]
    return out


def _documented_names(section):
    """Parameter names listed in a Parameters section (``a, b : type`` lines, not indented)."""
    names = set()
    for line in section.splitlines():
        if not line.strip() or line[:1].isspace():
            continue
        head = line.split(" : ", 1)[0].strip()
        for name in head.split(","):
            names.add(name.strip().lstrip("*"))
    return names


def _untyped_entries(section):
    """Entries of a Parameters section without ``name : type`` (``*args`` may go untyped)."""
    return [line.strip() for line in section.splitlines()
            if line.strip() and not line[:1].isspace() and " : " not in line and not line.startswith("*")]


def _own_nodes(fn):
    """Nodes of a function body, not descending into nested functions, lambdas or classes."""
    stack = list(fn.body)
    while stack:
        node = stack.pop()
        yield node
        if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef, ast.Lambda, ast.ClassDef)):
            continue
        stack.extend(ast.iter_child_nodes(node))


def _returns_value(fn):
    return any(isinstance(n, ast.Return) and n.value is not None
               and not (isinstance(n.value, ast.Constant) and n.value.value is None)
               for n in _own_nodes(fn))


def _is_generator(fn):
    return any(isinstance(n, (ast.Yield, ast.YieldFrom)) for n in _own_nodes(fn))


def _decorator_names(fn):
    for dec in fn.decorator_list:
        target = dec.func if isinstance(dec, ast.Call) else dec
        if isinstance(target, ast.Name):
            yield target.id
        elif isinstance(target, ast.Attribute):
            yield target.attr


def _parameters(fn):
    args = fn.args
    every = [*args.posonlyargs, *args.args, *args.kwonlyargs]
    return [a.arg for a in every if a.arg not in ("self", "cls")]


def _flat(body):
    """Statements of a block, opening ``if``/``try`` blocks (conditional definitions)."""
    for node in body:
        if isinstance(node, ast.If):
            yield from _flat(node.body)
            yield from _flat(node.orelse)
        elif isinstance(node, ast.Try):
            for block in (node.body, node.orelse, node.finalbody, *(h.body for h in node.handlers)):
                yield from _flat(block)
        else:
            yield node


def _public_functions(tree):
    """(qualified name, function node, is a property) of every public function and method."""
    for node in _flat(tree.body):
        if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)) and not node.name.startswith("_"):
            yield node.name, node, False
        elif isinstance(node, ast.ClassDef) and not node.name.startswith("_"):
            yield from _methods(node, node.name)


def _methods(cls, prefix):
    for node in _flat(cls.body):
        if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)) and not node.name.startswith("_"):
            decorators = set(_decorator_names(node))
            is_property = bool(decorators & _PROPERTY_DECORATORS) or bool(decorators & {"setter", "deleter"})
            yield f"{prefix}.{node.name}", node, is_property
        elif isinstance(node, ast.ClassDef) and not node.name.startswith("_"):
            yield from _methods(node, f"{prefix}.{node.name}")


def _problems(fn, is_property):
    """What the docstring of ``fn`` lacks (empty list if nothing)."""
    raw = ast.get_docstring(fn, clean=False)
    if not raw or not raw.strip():
        return ["no docstring"]
    doc = inspect.cleandoc(raw)
    if not doc.splitlines()[0].strip():
        return ["no one-line summary on the first line"]
    if is_property:
        return []
    sections = _sections(doc)
    problems = []
    params = _parameters(fn)
    if params:
        if "Parameters" not in sections:
            problems.append("no Parameters section")
        else:
            missing = [p for p in params if p not in _documented_names(sections["Parameters"])]
            if missing:
                problems.append(f"Parameters lacks {', '.join(missing)}")
            untyped = _untyped_entries(sections["Parameters"])
            if untyped:
                problems.append(f"Parameters entries without a type: {', '.join(untyped)}")
    if _is_generator(fn):
        if "Yields" not in sections:
            problems.append("no Yields section")
    elif _returns_value(fn) and "Returns" not in sections:
        problems.append("no Returns section")
    return problems


def _all_problems():
    found = []
    for path in sorted(PIPELINE.rglob("*.py")):
        tree = ast.parse(path.read_text(encoding="utf-8"))
        rel = path.relative_to(REPO).as_posix()
        for name, fn, is_property in _public_functions(tree):
            for problem in _problems(fn, is_property):
                found.append(f"{rel}:{fn.lineno} {name}: {problem}")
    return found


def test_public_pipeline_functions_have_numpydoc_docstrings():
    problems = _all_problems()
    assert not problems, f"{len(problems)} docstring problems:\n" + "\n".join(problems)


def test_checker_finds_what_is_missing():
    source = '''
def documented(a, b=1, *args, c, **kwargs):
    """Sum.

    Parameters
    ----------
    a, b : int
        Terms.
    c : int
        Third term.

    Returns
    -------
    int
    """
    return a + b + c


def lacks_c(a, *, c):
    """Sum.

    Parameters
    ----------
    a
        First term.
    """
    return a + c


def gen(n):
    """Count.

    Parameters
    ----------
    n : int

    Returns
    -------
    int
    """
    yield from range(n)


def bare():
    return 1


def _private(x):
    return x


class Thing:
    def __init__(self, x):
        self.x = x

    @property
    def size(self):
        """Size [m]."""
        return self.x

    def act(self, y):
        """Act."""
        def inner():
            return y
        inner()
'''
    tree = ast.parse(source)
    got = {name: _problems(fn, prop) for name, fn, prop in _public_functions(tree)}
    assert got == {
        "documented": [],
        "lacks_c": ["Parameters lacks c", "Parameters entries without a type: a", "no Returns section"],
        "gen": ["no Yields section"],
        "bare": ["no docstring"],
        "Thing.size": [],
        "Thing.act": ["no Parameters section"],
    }
