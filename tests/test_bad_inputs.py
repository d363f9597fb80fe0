"""Hostile-input corpus: every case folder of ``tests/data/broken/``.

Each case folder holds a ``quakefolio.toml`` plus only the files that differ from
``tests/data/mini`` (unchanged files are referenced as ``../../mini/<file>``); its first
line says what is broken.  ``expect.toml`` in the folder says what quakefolio must answer:

- ``command``: ``"check"`` (default), ``"run"`` (``run --no-flow --quiet``, for what only
  a run can meet; its output goes to the case's own ``output/`` folder, removed afterwards) or
  ``"scenario"`` (``scenario quakefolio.toml scenario.toml --quiet``: the case folder holds a
  scenario file, and the station file it names, next to a compute-mode config);
- ``exit``: the exit status (2 for a refused input, 0 for an accepted one with a warning);
- ``level``: ``"error"`` or ``"warning"``: stderr holds exactly one line
  ``<level>: <file>[:<row>]: [column '<col>': ]<message>``;
- ``file``, ``row``, ``column``: where the line must point (``row``/``column`` left out
  when the line names none), and ``message``: a regular expression the message must match.

For every case: that exit status, exactly that one located line, no traceback, and
nothing outside the case's output folder changed.  A new case is a new folder; no list
in this module changes.
"""
from __future__ import annotations

import os
import re
import shutil
import subprocess
import sys
import tomllib
from pathlib import Path

import pytest

from quakefolio.core.errors import InputError
from quakefolio.fragility import load_library
from quakefolio.pipeline.cli import main
from quakefolio.pipeline.io.ingest import read_hazard_curves, read_table, EXPOSURE_COLUMNS

REPO = Path(__file__).resolve().parents[1]
DATA = REPO / "tests" / "data"
BROKEN = DATA / "broken"
MINI = DATA / "mini"

CASES = sorted(p.name for p in BROKEN.iterdir() if p.is_dir() and p.name != "__pycache__")
EXPECT_KEYS = {"command", "exit", "level", "file", "row", "column", "message"}

# <level>: <file>[:<row>]: [column '<col>': ]<message>
LINE = re.compile(r"^(?P<level>error|warning): (?P<file>[^:]+?)(?::(?P<row>\d+))?: "
                  r"(?:column '(?P<col>[^']*)': )?(?P<msg>\S.*)$")


def expectation(case):
    """The parsed ``expect.toml`` of one case folder."""
    with open(BROKEN / case / "expect.toml", "rb") as fh:
        spec = tomllib.load(fh)
    unknown = set(spec) - EXPECT_KEYS
    assert not unknown, f"{case}/expect.toml: unknown keys {sorted(unknown)}"
    spec.setdefault("command", "check")
    spec.setdefault("level", "error")
    assert spec["command"] in ("check", "run", "scenario"), case
    assert spec["level"] in ("error", "warning"), case
    assert (spec["level"] == "error") == (spec["exit"] != 0), f"{case}: an error exits non-zero, a warning 0"
    return spec


def _tree(root):
    return {p.relative_to(root): p.stat().st_mtime_ns for p in root.rglob("*")
            if "__pycache__" not in p.parts}


def _outside_output(tree, case):
    # the case folder's own time stamp moves when a run creates and the test removes output/;
    # its content is still compared entry by entry
    return {p: t for p, t in tree.items() if p.parts[:3] != ("broken", case, "output") and p.parts != ("broken", case)}


def test_corpus_is_complete():
    assert len(CASES) >= 55
    for case in CASES:
        assert (BROKEN / case / "expect.toml").is_file(), f"{case} needs an expect.toml"
        expectation(case)


@pytest.mark.parametrize("case", CASES)
def test_case_folder_holds_only_changed_files(case):
    folder = BROKEN / case
    assert (folder / "quakefolio.toml").is_file()
    assert (folder / "quakefolio.toml").read_text(encoding="utf-8-sig").startswith("# Broken on purpose: ")
    for f in folder.iterdir():
        twin = MINI / f.name
        if f.is_file() and f.name != "quakefolio.toml" and twin.exists():
            assert f.read_bytes() != twin.read_bytes(), f"{case}/{f.name} is a copy of mini: point at ../../mini"


def _answer(case, spec, capsys):
    config = str(BROKEN / case / "quakefolio.toml")
    argv = {"check": ["check", config], "run": ["run", config, "--no-flow", "--quiet"],
            "scenario": ["scenario", config, str(BROKEN / case / "scenario.toml"), "--quiet"]}[spec["command"]]
    try:
        rc = main(argv)
    finally:
        out, err = capsys.readouterr()
        shutil.rmtree(BROKEN / case / "output", ignore_errors=True)
    return rc, out, err


@pytest.mark.parametrize("case", CASES)
def test_case_gets_its_one_located_line(case, capsys):
    spec = expectation(case)
    before = _outside_output(_tree(DATA), case)
    rc, out, err = _answer(case, spec, capsys)
    assert _outside_output(_tree(DATA), case) == before, "nothing outside the output folder may change"
    assert rc == spec["exit"], (rc, err)
    assert "Traceback" not in out + err
    lines = err.splitlines()
    assert len(lines) == 1, err
    m = LINE.match(lines[0])
    assert m, lines[0]
    assert m["level"] == spec["level"], lines[0]
    expected_file = (BROKEN / case / spec["file"]).resolve()
    got_file = Path(m["file"])
    assert (got_file.parent.name, got_file.name) == (expected_file.parent.name, expected_file.name), lines[0]
    row = spec.get("row")
    assert m["row"] == (None if row is None else str(row)), lines[0]
    column = spec.get("column")
    if column is None:
        assert m["col"] is None, lines[0]
    else:
        assert m["col"] is not None and column in m["col"], lines[0]
    assert re.search(spec["message"], m["msg"]), lines[0]


def test_check_writes_nothing(capsys):
    before = _tree(DATA)
    for case in CASES:
        spec = expectation(case)
        if spec["command"] == "check":
            assert main(["check", str(BROKEN / case / "quakefolio.toml")]) == spec["exit"]
    assert main(["check", str(MINI / "quakefolio.toml")]) == 0
    capsys.readouterr()
    assert _tree(DATA) == before
    assert not (MINI / "output").exists()
    assert not any((BROKEN / case / "output").exists() for case in CASES)


def test_module_entry_point_one_line_no_traceback():
    proc = subprocess.run([sys.executable, "-m", "quakefolio.pipeline", "check",
                           str(BROKEN / "exposure_negative_value" / "quakefolio.toml")],
                          capture_output=True, text=True, cwd=REPO, timeout=120)
    assert proc.returncode == 2
    assert "Traceback" not in proc.stdout + proc.stderr
    assert len(proc.stderr.splitlines()) == 1, proc.stderr
    assert re.match(r"error: .*exposure\.csv:3: column 'replacement_value': ", proc.stderr)


def test_console_script_accepts_mini_without_prefect():
    script = Path(sys.executable).with_name("quakefolio")
    cmd = [str(script)] if script.exists() else [sys.executable, "-m", "quakefolio.pipeline"]
    env = dict(os.environ, PYTHONPROFILEIMPORTTIME="1")  # lists every import on stderr
    proc = subprocess.run(cmd + ["check", "tests/data/mini/quakefolio.toml"], capture_output=True, text=True,
                          cwd=REPO, env=env, timeout=120)
    assert proc.returncode == 0, proc.stderr[-2000:]
    assert re.search(r"^OK: .*mini/quakefolio\.toml: 5 assets", proc.stdout, re.M), proc.stdout
    imported = {ln.rsplit("|", 1)[-1].strip() for ln in proc.stderr.splitlines() if ln.startswith("import time:")}
    assert "quakefolio.pipeline.io.ingest" in imported
    assert not {m for m in imported if m.split(".")[0] == "prefect"}, "check must not import Prefect"
    assert not (MINI / "output").exists()


# ---- the reading functions directly ------------------------------------------------------------

def test_cov_error_is_located_at_the_state(tmp_path):
    with pytest.raises(InputError, match=r"cov too large .*got mean \[0\.4\] with cov \[2\.0\]") as exc:
        load_library(BROKEN / "fragility_cov_too_large" / "fragility.toml")
    assert (exc.value.row, exc.value.column) == (20, "classes.TST-A.states[1].cov")


def test_missing_im_is_located_at_the_site():
    with pytest.raises(InputError, match=r"site 'T02' has no curve for SA_1\.0") as exc:
        read_hazard_curves(BROKEN / "hazard_site_missing_im" / "hazard_curves.csv")
    assert (exc.value.row, exc.value.column) == (14, "im")


def test_multiline_quoted_field_keeps_file_line_numbers():
    frame, rows = read_table(BROKEN / "exposure_multiline_field" / "exposure.csv", EXPOSURE_COLUMNS)
    assert list(frame.asset_id) == ["B1", "B2", "B3", "B4", "B5"]
    assert rows.tolist() == [2, 4, 5, 6, 7]


def test_trailing_delimiters_and_byte_order_mark_are_tolerated(tmp_path):
    # Spreadsheet exports: a UTF-8 byte-order mark and a trailing comma on every data row.
    lines = (MINI / "exposure.csv").read_text().splitlines()
    path = tmp_path / "exposure.csv"
    path.write_bytes(b"\xef\xbb\xbf" + ("\n".join([lines[0]] + [ln + "," for ln in lines[1:]]) + "\n").encode())
    frame, rows = read_table(path, EXPOSURE_COLUMNS)
    assert list(frame.columns) == lines[0].split(",")
    assert list(frame.asset_id) == ["B1", "B2", "B3", "B4", "B5"]
    assert list(frame.lon)[:2] == ["10.001", "10.029"]
    assert rows.tolist() == [2, 3, 4, 5, 6]


def test_extra_non_empty_field_is_an_error():
    with pytest.raises(InputError, match=r"record has 10 fields but the header has 9") as exc:
        read_table(BROKEN / "exposure_extra_field" / "exposure.csv", EXPOSURE_COLUMNS)
    assert exc.value.row == 4


@pytest.mark.parametrize("sep, name", [(";", "semicolon"), ("\t", "tab"), ("|", "'|'")])
def test_other_delimiters_are_named(tmp_path, sep, name):
    # Spreadsheets in many locales export ';'-separated "CSV": say what was seen, on the header line.
    lines = (MINI / "exposure.csv").read_text().splitlines()
    path = tmp_path / "exposure.csv"
    path.write_text("\n".join(ln.replace(",", sep) for ln in lines) + "\n")
    with pytest.raises(InputError, match=rf"the header is {re.escape(name)}-delimited \(9 fields, no comma\)") as exc:
        read_table(path, EXPOSURE_COLUMNS)
    assert exc.value.row == 1


def test_spreadsheet_separator_hint_line_is_named(tmp_path):
    path = tmp_path / "exposure.csv"
    path.write_text("sep=,\n" + (MINI / "exposure.csv").read_text())
    with pytest.raises(InputError, match=r"first line 'sep=,' is a spreadsheet delimiter hint") as exc:
        read_table(path, EXPOSURE_COLUMNS)
    assert exc.value.row == 1


def test_byte_order_mark_in_toml_is_accepted(tmp_path):
    # Some editors start UTF-8 files with a byte-order mark; TOML files are read as CSV files are.
    import shutil

    dst = tmp_path / "mini"
    shutil.copytree(MINI, dst, ignore=shutil.ignore_patterns("output"))
    for name in ("quakefolio.toml", "fragility.toml"):
        path = dst / name
        if path.exists():
            path.write_bytes(b"\xef\xbb\xbf" + path.read_bytes())
    assert main(["check", str(dst / "quakefolio.toml")]) == 0


def test_debug_before_the_command_is_honoured():
    from quakefolio.pipeline.cli import _parser

    assert _parser().parse_args(["--debug", "check", "x.toml"]).debug is True
    assert _parser().parse_args(["check", "x.toml", "--debug"]).debug is True
    assert _parser().parse_args(["check", "x.toml"]).debug is False


def test_a_located_warning_is_one_stderr_line(monkeypatch, capsys):
    # An accepted but doubtful input: exit 0, the OK line on stdout, one located line on stderr.
    from dataclasses import replace

    from quakefolio.core.errors import InputWarning
    from quakefolio.pipeline import stages

    real = stages.load_inputs

    def with_warning(path):
        inputs = real(path)
        w = InputWarning("exposure.csv", "looks odd, got '5'", row=3, column="vs30_mps")
        return replace(inputs, warnings=inputs.warnings + (w,))

    monkeypatch.setattr(stages, "load_inputs", with_warning)
    assert main(["check", str(MINI / "quakefolio.toml")]) == 0
    out, err = capsys.readouterr()
    assert out.splitlines()[-1].startswith("OK: ") or "OK: " in out
    assert err == "warning: exposure.csv:3: column 'vs30_mps': looks odd, got '5'\n"
    assert LINE.match(err.strip())["level"] == "warning"
