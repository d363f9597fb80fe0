"""What the command line prints: control characters escaped, one error line with its exit status,
``--version``, and the run's log file (in-process, no Prefect server).

Names and values from user files reach the terminal in the summary, warnings and error
lines; an escape sequence there would be executed by the terminal (clear the screen,
recolour) and a carriage return or newline could forge a line.  Every echoed text shows them
as visible escapes (``pipeline/terminal.py``); stored tables keep the text as given.
"""
from __future__ import annotations

import errno
import json
import logging
import re
import shutil
from importlib import metadata

import pytest

from quakefolio.core.errors import InputError, InputWarning
from quakefolio.pipeline import cli, runlog
from quakefolio.pipeline.cli import main
from quakefolio.pipeline.io.store import latest_run, read_table
from quakefolio.pipeline.runner import StageError, run_pure
from quakefolio.pipeline.summary import summary_text
from quakefolio.pipeline.terminal import echo, one_line, visible

from conftest import MINI

EVIL = "bad\x1b[2J\x1b[31mname\rOK: forged\nline\x9b1m\u202e"
#: any control character a terminal acts on (C0 but newline, DEL, C1, bidirectional overrides)
CONTROL = re.compile("[\x00-\x09\x0b-\x1f\x7f-\x9f\u202a-\u202e\u2066-\u2069]")


def test_control_characters_become_visible_escapes():
    assert visible(EVIL) == "bad\\x1b[2J\\x1b[31mname\\rOK: forged\\nline\\x9b1m\\u202e"
    assert visible("a\tb\nc", keep_newlines=True) == "a\\tb\nc"
    assert one_line(EVIL) == visible(EVIL) and visible(visible(EVIL)) == visible(EVIL)  # idempotent
    assert visible("Zürich – ok") == "Zürich – ok"  # printable text is left alone


def test_echo_keeps_line_breaks_and_escapes_the_rest(capsys):
    echo("line one\x1b[2J", "x\ry", "\nline two", sep="|")
    out = capsys.readouterr().out
    assert out == "line one\\x1b[2J|x\\ry|\nline two\n"


@pytest.fixture(scope="module")
def run_dir(tmp_path_factory):
    dst = tmp_path_factory.mktemp("term") / "mini"
    shutil.copytree(MINI, dst, ignore=shutil.ignore_patterns("output"))
    return run_pure(dst / "quakefolio.toml")


def test_summary_escapes_names_from_the_inputs(run_dir, tmp_path):
    """A scenario name and an asset id carrying escapes, CR and LF: same lines as plain names, escapes shown."""
    plain = summary_text(run_dir)
    evil = tmp_path / run_dir.name
    shutil.copytree(run_dir, evil)
    manifest = json.loads((evil / "manifest.json").read_text(encoding="utf-8"))
    manifest["scenario"] = EVIL
    (evil / "manifest.json").write_text(json.dumps(manifest), encoding="utf-8")
    loss = read_table(run_dir, "asset_loss")
    top = loss.sort_values(["collapse_prob_in_horizon", "asset_id"], ascending=[False, True]).asset_id.iloc[0]
    import pyarrow as pa
    import pyarrow.parquet as pq

    table = pq.read_table(run_dir / "asset_loss.parquet")
    ids = [EVIL if a == top else a for a in table.column("asset_id").to_pylist()]
    table = table.set_column(table.schema.get_field_index("asset_id"), "asset_id", pa.array(ids, pa.string()))
    pq.write_table(table, evil / "asset_loss.parquet")

    text = summary_text(evil)
    assert not CONTROL.search(text)
    assert len(text.splitlines()) == len(plain.splitlines())  # no line forged, none overwritten
    assert f"scenario: {visible(EVIL)}" in text and f"  {visible(EVIL)}" in text
    assert read_table(evil, "asset_loss").asset_id.tolist().count(EVIL) == 1  # the table keeps the name


def test_check_line_and_warnings_are_escaped(tmp_path, capsys):
    folder = tmp_path / "mini\x1b[31m"
    shutil.copytree(MINI, folder, ignore=shutil.ignore_patterns("output"))
    assert main(["check", str(folder / "quakefolio.toml")]) == 0
    out = capsys.readouterr().out
    assert "OK: " in out and "mini\\x1b[31m" in out and not CONTROL.search(out)
    cli._print_notes([InputWarning("x.toml", f"name {EVIL}", row=3, column="scenario.name")], notes=True)
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and err.startswith("warning: x.toml:3: column 'scenario.name': name bad\\x1b")


@pytest.mark.parametrize("exc, status, pattern", [
    (InputError("x.toml", f"value {EVIL}", row=2, column="name"), 2, r"^error: x\.toml:2: column 'name': value bad\\x1b"),
    (StageError("store-run", OSError(errno.ENOSPC, "No space left on device", "/o/runs/t.parquet"), "c.toml"), 2,
     r"^error: stage 'store-run' failed: OSError: \[Errno 28\] No space left on device: '/o/runs/t\.parquet'"),
    (StageError("store-run", PermissionError(errno.EACCES, "Permission denied", "/o"), "c.toml"), 2,
     r"^error: stage 'store-run' failed: PermissionError: \[Errno 13\] Permission denied"),
    (PermissionError(errno.EACCES, "Permission denied", "/o/reports/r.html"), 2,
     r"^error: /o/reports/r\.html: Permission denied$"),
    (StageError("damage-and-loss-block", RuntimeError(f"boom {EVIL}"), "c.toml"), 1,
     r"^error: stage 'damage-and-loss-block' failed: RuntimeError: boom bad\\x1b"),
    (RuntimeError("multi\nline"), 1, r"^internal error: RuntimeError: multi\\nline \(rerun with --debug"),
    (KeyboardInterrupt(), 130, r"^interrupted$"),
    (cli.Terminated(), 143, r"^terminated \(SIGTERM\)$"),
])
def test_every_failure_is_one_escaped_line_with_its_exit_status(monkeypatch, capsys, tmp_path, exc, status,
                                                                 pattern):
    """Exit 2 for what the user can fix (bad input, a folder that cannot be written, a full disk)."""
    def fail(args):
        raise exc

    monkeypatch.setattr(cli, "_check", fail)
    monkeypatch.delenv(runlog.LOG_ENV, raising=False)
    assert main(["check", "whatever.toml"]) == status
    captured = capsys.readouterr()
    assert captured.out == ""
    assert captured.err.count("\n") == 1 and re.search(pattern, captured.err.rstrip("\n")), captured.err
    assert not CONTROL.search(captured.err.rstrip("\n"))


def test_error_line_names_the_log_file_when_prefect_logged(monkeypatch, capsys, tmp_path):
    log = tmp_path / "run.log"
    log.write_text("12:00:00 | ERROR | Traceback ...\n", encoding="utf-8")
    monkeypatch.setenv(runlog.LOG_ENV, str(log))

    def fail(args):
        raise StageError("store-run", OSError(errno.EROFS, "Read-only file system", "/o"), "c.toml")

    monkeypatch.setattr(cli, "_check", fail)
    assert main(["check", "whatever.toml"]) == 2
    assert capsys.readouterr().err.rstrip("\n").endswith(f"; Prefect log: {log}")


def test_version(capsys):
    with pytest.raises(SystemExit) as stop:
        main(["--version"])
    assert stop.value.code == 0
    assert capsys.readouterr().out == f"quakefolio {metadata.version('quakefolio')}\n"


def test_log_file_goes_to_the_output_folder_once_it_holds_runs(run_dir, tmp_path):
    output = run_dir.parent.parent
    assert latest_run(output) == run_dir
    log = runlog.choose_log_file(output, tmp_path / "state")
    assert log.parent == output / "logs" and not log.exists()  # created with the first record
    fresh = runlog.choose_log_file(tmp_path / "new-output", tmp_path / "state")
    assert fresh.parent == tmp_path / "state" / "logs"


def test_log_handler_writes_records_and_never_raises(monkeypatch, tmp_path, capsys):
    log = tmp_path / "logs" / "a.log"
    monkeypatch.setenv(runlog.LOG_ENV, str(log))
    handler = runlog.RunLogHandler(stream="ignored", styles={})
    record = logging.LogRecord("prefect.flow_runs", logging.ERROR, __file__, 1, "failed: %s", ("x",), None)
    handler.handle(record)
    handler.close()
    assert log.read_text(encoding="utf-8").strip().endswith("failed: x")
    monkeypatch.setenv(runlog.LOG_ENV, str(tmp_path / "a-file" / "sub" / "b.log"))
    (tmp_path / "a-file").write_text("not a folder", encoding="utf-8")
    broken = runlog.RunLogHandler()
    broken.handle(record)  # the folder cannot be made: the record is dropped, nothing raised or printed
    broken.close()
    assert capsys.readouterr() == ("", "")
