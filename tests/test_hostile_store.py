"""Hostile cases of the run store and of every place a command writes: scripted, not folder cases.

Each case asserts the exit status, the one stderr line (:func:`hostile_support.one_line`)
and that nothing outside the output folder changed (:func:`hostile_support.snapshot`,
:func:`hostile_support.assert_unchanged`); where the command is refused, nothing changed at
all.  Covered: partial run folders of other hosts, boots or versions (left alone, one
warning line) and dead ones of this machine (removed); run ids claimed once; the output
folder's sanity (root, home, an unrelated non-empty folder, a folder inside a run); the
``LATEST`` pointer read as a run id only; ``report --out`` and ``compare --out`` writing
only new files or earlier reports of ours; ``fit-fragility --write-library`` keeping the
library's comments and layout and writing through a symbolic link; access errors (an
unwritable output folder or report folder, an unreadable input file) as one line with
exit 2.
"""
from __future__ import annotations

import contextlib
import json
import os
import re
import shutil
import stat
import subprocess
from pathlib import Path

import pytest

from quakefolio.pipeline.cli import main
from quakefolio.pipeline.io import claims, store
from quakefolio.pipeline.io.claims import OWNER_FILE, this_writer
from quakefolio.pipeline.io.output_folder import MARKER

from conftest import DEMO, MINI
from hostile_support import assert_unchanged, one_line, snapshot

RUN_ID = re.compile(r"runs/\d{8}T\d{6}Z-[0-9a-f]{8}(-\d+)?$")


@pytest.fixture
def mini(tmp_path):
    """A copy of the mini inputs in ``<tmp>/mini`` (the output folder is ``mini/output``)."""
    dst = tmp_path / "mini"
    shutil.copytree(MINI, dst, ignore=shutil.ignore_patterns("output"))
    return dst


@pytest.fixture(scope="module")
def finished(tmp_path_factory):
    """Two finished runs of the mini inputs in one output folder (read only: copy before changing)."""
    dst = tmp_path_factory.mktemp("finished") / "mini"
    shutil.copytree(MINI, dst, ignore=shutil.ignore_patterns("output"))
    from quakefolio.pipeline.runner import run_pure

    a = run_pure(dst / "quakefolio.toml")
    b = run_pure(dst / "quakefolio.toml")
    return dst, a, b


def _cli(argv, capsys):
    code = main([str(a) for a in argv])
    captured = capsys.readouterr()
    return code, captured.out, captured.err


def _run(cfg, capsys):
    return _cli(["run", "--no-flow", "--quiet", cfg], capsys)


def _set_output(cfg, folder):
    text = cfg.read_text()
    cfg.write_text(text.replace('folder = "output"', f"folder = {json.dumps(str(folder))}"))
    return [no for no, line in enumerate(cfg.read_text().splitlines(), 1) if line.startswith("folder =")][0]


def _partial(runs, name, **record):
    """A partial run folder with an owner record (this process's, changed by ``record``), or none."""
    folder = runs / name
    folder.mkdir(parents=True)
    (folder / "site_hazard.parquet").write_bytes(b"half-written")
    if record.get("owner", True):
        (folder / OWNER_FILE).write_text(json.dumps(dict(this_writer(), **record)))
    return folder


# --- 1. partial run folders: foreign ones left alone, dead ones of this machine removed -----------------

@pytest.mark.parametrize("name, record", [
    (".partial-20250101T000000Z-0000abcd", {"host": "another-host"}),
    (".partial-20250101T000000Z-0000abce", {"boot_id": "00000000-0000-0000-0000-000000000000"}),
    (".partial-20250101T000000Z-0000abcf", {"pid_ns": "pid:[1]"}),
    (".partial-20250101T000000Z-0000abc0.4242", {"owner": False}),  # an older version's partial folder
])
def test_foreign_partial_is_left_alone_with_one_warning(mini, capsys, name, record):
    foreign = _partial(mini / "output" / "runs", name, **record)
    before = snapshot(mini.parent, exclude=[mini / "output"])
    kept = snapshot(foreign)
    code, out, err = _run(mini / "quakefolio.toml", capsys)
    assert code == 0 and RUN_ID.search(out.strip()), out + err
    one_line(err, r"output/runs: 1 unfinished run folder\(s\) of another host, boot or container, or of an older "
                  rf"version, left alone \('{re.escape(name)}'\); remove them by hand", level="warning")
    assert foreign.is_dir() and snapshot(foreign) == kept
    assert_unchanged(before, mini.parent, exclude=[mini / "output"])


def test_check_names_foreign_partials_and_writes_nothing(mini, capsys):
    _partial(mini / "output" / "runs", ".partial-20250101T000000Z-0000abcd", host="another-host")
    before = snapshot(mini.parent)
    code, out, err = _cli(["check", mini / "quakefolio.toml"], capsys)
    assert code == 0 and "OK:" in out
    one_line(err, r"1 unfinished run folder\(s\).*left alone", level="warning")
    assert_unchanged(before, mini.parent)


def test_dead_partial_of_this_machine_is_removed_and_live_one_kept(mini, capsys):
    runs = mini / "output" / "runs"
    me = this_writer()
    dead = _partial(runs, ".partial-20250101T000000Z-00000001", start_ticks=me["start_ticks"] - 1)  # pid reused
    gone = _partial(runs, ".partial-20250101T000000Z-00000002", pid=2 ** 22 + 1)  # above any pid_max: no process
    live = _partial(runs, ".partial-20250101T000000Z-00000003")  # this very process: a run still writing
    before = snapshot(mini.parent, exclude=[mini / "output"])
    code, out, err = _run(mini / "quakefolio.toml", capsys)
    assert code == 0 and err == "", err
    assert not dead.exists() and not gone.exists() and live.is_dir()
    assert sorted(p.name for p in runs.iterdir() if p.name.startswith(".")) == [live.name]  # no trash left
    assert_unchanged(before, mini.parent, exclude=[mini / "output"])


# --- 2. run ids: claimed once, never two runs in one folder ---------------------------------------------

def test_same_second_runs_get_distinct_folders(mini, capsys, monkeypatch):
    # every run below "starts in the same second": one id wished for all of them
    monkeypatch.setattr("quakefolio.pipeline.runner.new_run_id", lambda output, digest: "20260101T000000Z-" + digest[:8])
    runs = mini / "output" / "runs"
    held = None
    folders = []
    for i in range(3):
        code, out, err = _run(mini / "quakefolio.toml", capsys)
        assert code == 0, err
        if i == 0:
            assert err == "", err
        else:
            one_line(err, r"1 unfinished run folder\(s\) .* left alone", level="warning")
        folders.append(Path(out.strip()))
        if i == 0:  # a foreign writer holds the next id: it is skipped, its folder untouched
            held = _partial(runs, f".partial-{folders[0].name}-2", host="another-host")
    assert [f.name[len(folders[0].name):] for f in folders] == ["", "-3", "-4"]
    assert all((f / "manifest.json").is_file() for f in folders)
    assert json.loads((folders[2] / "manifest.json").read_text())["run_id"] == folders[2].name
    assert (mini / "output" / "LATEST").read_text().strip() == folders[2].name
    assert held.is_dir() and (held / OWNER_FILE).is_file()


def test_claim_skips_ids_held_or_finished(tmp_path):
    runs = tmp_path / "runs"
    runs.mkdir()
    (runs / "20260101T000000Z-0000abcd").mkdir()  # a finished run
    first, p1 = claims.claim_run(runs, "20260101T000000Z-0000abcd")
    second, p2 = claims.claim_run(runs, "20260101T000000Z-0000abcd")
    assert (first, second) == ("20260101T000000Z-0000abcd-2", "20260101T000000Z-0000abcd-3")
    assert claims.owner_state(claims.read_owner(p1)) == "live" and p2.is_dir()
    assert sorted(p.name for p in runs.iterdir()) == sorted([p1.name, p2.name, "20260101T000000Z-0000abcd"])


def test_commit_never_replaces_a_run_that_appeared(tmp_path):
    w = store.RunWriter(tmp_path, "20260101T000000Z-0000abcd")
    w.write_text("manifest.json", "{}")
    (w.final).mkdir()  # written meanwhile by something that does not claim its ids
    (w.final / "keep.txt").write_text("theirs")
    with pytest.raises(store.OutputError, match="exists already.*never replaced"):
        w.commit()
    assert (w.final / "keep.txt").read_text() == "theirs" and not (tmp_path / "LATEST").exists()


# --- 4. output folder sanity ------------------------------------------------------------------------

def _refused_output(mini, capsys, folder, pattern, command="run"):
    row = _set_output(mini / "quakefolio.toml", folder)
    before = snapshot(mini.parent)
    argv = ["run", "--no-flow", "--quiet"] if command == "run" else [command]
    code, out, err = _cli(argv + [mini / "quakefolio.toml"], capsys)
    assert code == 2, out + err
    one_line(err, rf"quakefolio\.toml:{row}: column 'output\.folder': output folder .*{pattern}")
    assert_unchanged(before, mini.parent)


def test_root_folder_is_refused(mini, capsys):
    _refused_output(mini, capsys, "/", "is the root folder", command="check")


def test_home_folder_is_refused(mini, capsys, monkeypatch):
    home = mini.parent / "home"
    home.mkdir()
    monkeypatch.setenv("HOME", str(home))
    _refused_output(mini, capsys, home, "is the home folder")


def test_unrelated_non_empty_folder_is_refused(mini, capsys):
    other = mini.parent / "photos"
    other.mkdir()
    (other / "LATEST").write_text("holiday\n")  # even a LATEST of someone else's is never overwritten
    (other / "img001.jpg").write_bytes(b"\xff\xd8")
    _refused_output(mini, capsys, other, "is not empty and holds no quakefolio outputs")


def test_folder_inside_a_finished_run_is_refused(mini, capsys):
    code, out, _ = _run(mini / "quakefolio.toml", capsys)
    run = Path(out.strip())
    _refused_output(mini, capsys, run / "nested", f"is inside run folder {re.escape(str(run))}")


def test_runs_folder_of_an_output_is_refused(mini, capsys):
    assert _run(mini / "quakefolio.toml", capsys)[0] == 0
    _refused_output(mini, capsys, mini / "output" / "runs", "is inside .*the runs folder of output folder")


def test_folder_under_a_file_is_refused(mini, capsys):
    _refused_output(mini, capsys, mini / "exposure.csv" / "out", "cannot be created: .*exposure.csv is a file")


def test_older_output_folder_of_ours_is_accepted_and_marked(mini, capsys):
    code, out, _ = _run(mini / "quakefolio.toml", capsys)
    (mini / "output" / MARKER).unlink()  # as an older version left it: runs/, LATEST, cache/
    before = snapshot(mini.parent, exclude=[mini / "output"])
    code, out, err = _run(mini / "quakefolio.toml", capsys)
    assert code == 0 and err == "" and (mini / "output" / MARKER).is_file()
    assert_unchanged(before, mini.parent, exclude=[mini / "output"])


# --- 5. LATEST is a run id, never a path -------------------------------------------------------------

@pytest.mark.parametrize("pointer", ["../..", "../../victim", "runs/../../x", "/etc", "20260101T000000Z-0000abcd\n.."])
def test_latest_that_is_not_a_run_id_is_refused(finished, tmp_path, capsys, pointer):
    _, run_a, _ = finished
    out = tmp_path / "out"
    (out / "runs").mkdir(parents=True)
    shutil.copytree(run_a, out / "runs" / run_a.name)
    (out / "LATEST").write_text(pointer + "\n")
    before = snapshot(tmp_path)
    for argv in (["report", out], ["compare", run_a, out]):
        code, _, err = _cli(argv, capsys)
        assert code == 2
        one_line(err, rf"{re.escape(str(out / 'LATEST'))}:1: expected one run id .*never a path")
    assert_unchanged(before, tmp_path)


def test_latest_naming_a_missing_run_is_refused(finished, tmp_path, capsys):
    out = tmp_path / "out"
    (out / "runs").mkdir(parents=True)
    (out / "LATEST").write_text("20260101T000000Z-0000abcd\n")
    before = snapshot(tmp_path)
    code, _, err = _cli(["report", out], capsys)
    assert code == 2
    one_line(err, r"LATEST: names run '20260101T000000Z-0000abcd', which is not in")
    assert_unchanged(before, tmp_path)


# --- 3. report --out and compare --out -----------------------------------------------------------------

def _report_refused(argv, root, capsys, pattern):
    before = snapshot(root)
    code, out, err = _cli(argv, capsys)
    assert code == 2, out + err
    one_line(err, pattern)
    assert_unchanged(before, root)


def test_report_out_over_an_input_file_is_refused(finished, capsys):
    dst, _, run_b = finished
    _report_refused(["report", run_b, "--out", dst / "exposure.csv"], dst, capsys,
                    r"exposure\.csv: exists and is not a quakefolio report; a report is written only to a new file")


def test_report_out_symlink_is_refused(finished, tmp_path, capsys):
    _, _, run_b = finished
    target = tmp_path / "notes.txt"
    target.write_text("mine\n")
    (tmp_path / "link.html").symlink_to(target)
    _report_refused(["report", run_b, "--out", tmp_path / "link.html"], tmp_path, capsys,
                    r"link\.html: is a symbolic link; a report is written only")


def test_report_out_pipe_and_folder_are_refused(finished, tmp_path, capsys):
    _, _, run_b = finished
    os.mkfifo(tmp_path / "pipe.html")
    (tmp_path / "folder.html").mkdir()
    _report_refused(["report", run_b, "--out", tmp_path / "pipe.html"], tmp_path, capsys,
                    r"pipe\.html: is not a regular file \(a device, pipe or socket\)")
    _report_refused(["report", run_b, "--out", tmp_path / "folder.html"], tmp_path, capsys, r"folder\.html: is a folder")


def test_report_out_replaces_an_earlier_report(finished, tmp_path, capsys):
    from quakefolio.pipeline.report import REPORT_MARKER

    _, _, run_b = finished
    target = tmp_path / "report.html"
    target.write_text(f'<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">{REPORT_MARKER}<title>old')
    code, out, err = _cli(["report", run_b, "--out", target], capsys)
    assert code == 0 and err == "" and out.strip() == str(target)
    assert run_b.name in target.read_text() and REPORT_MARKER in target.read_text()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["report.html"]


def test_compare_out_on_an_existing_file_is_refused(finished, tmp_path, capsys):
    _, run_a, run_b = finished
    (tmp_path / "summary.txt").write_text("mine\n")
    _report_refused(["compare", run_a, run_b, "--out", tmp_path / "summary.txt"], tmp_path, capsys,
                    r"summary\.txt: --out names an existing file; give the folder that holds change reports")


def test_compare_never_replaces_a_folder_that_is_not_a_change_report(finished, tmp_path, capsys):
    _, run_a, run_b = finished
    theirs = tmp_path / f"{run_a.name}__{run_b.name}"
    theirs.mkdir()
    (theirs / "notes.txt").write_text("mine\n")
    _report_refused(["compare", run_a, run_b, "--out", tmp_path], tmp_path, capsys,
                    r"exists and is not a change report; it is never replaced")
    (theirs / "notes.txt").unlink()
    theirs.rmdir()
    code, out, err = _cli(["compare", run_a, run_b, "--out", tmp_path], capsys)  # then written, and rewritten
    assert code == 0 and err == "" and (theirs / "change_causes.json").is_file()
    assert _cli(["compare", run_a, run_b, "--out", tmp_path], capsys)[0] == 0
    assert sorted(p.name for p in tmp_path.iterdir()) == [theirs.name]


# --- 7. access errors: one line naming the path and what was attempted, exit 2 ---------------------------

@contextlib.contextmanager
def _unwritable(folder, monkeypatch):
    """``folder`` made unwritable: by its mode, or (as root, who ignores modes) the immutable attribute."""
    if os.geteuid() != 0:
        folder.chmod(0o555)
        try:
            yield
        finally:
            folder.chmod(0o755)
        return
    done = subprocess.run(["chattr", "+i", str(folder)], capture_output=True) if shutil.which("chattr") else None
    if done is not None and done.returncode == 0:
        try:
            yield
        finally:
            subprocess.run(["chattr", "-i", str(folder)], check=True)
        return
    real_mkdir = Path.mkdir  # no way to deny root on this file system: the system's refusal is injected

    def refuse(self, *args, **kwargs):
        if self == folder or folder in self.parents:
            raise PermissionError(13, "Permission denied", str(self))
        return real_mkdir(self, *args, **kwargs)

    monkeypatch.setattr(Path, "mkdir", refuse)
    monkeypatch.setattr(os, "access", lambda p, mode, **kw: Path(p) != folder)
    yield


def test_unwritable_output_parent_is_one_line(mini, capsys, monkeypatch):
    parent = mini.parent / "locked"
    parent.mkdir()
    row = _set_output(mini / "quakefolio.toml", parent / "out")
    before = snapshot(mini.parent)
    with _unwritable(parent, monkeypatch):
        code, out, err = _run(mini / "quakefolio.toml", capsys)
    assert code == 2, out + err
    one_line(err, rf"quakefolio\.toml:{row}: column 'output\.folder': output folder .*out' cannot be created: "
                  rf".*locked is not writable \(permission denied\)")
    assert_unchanged(before, mini.parent)


def test_output_folder_locked_after_the_check_is_one_line(mini, capsys, monkeypatch):
    # the folder passes the check when the inputs are read, then the system refuses the first write
    assert _run(mini / "quakefolio.toml", capsys)[0] == 0
    from quakefolio.pipeline.io import output_folder

    monkeypatch.setattr("quakefolio.pipeline.stages.inputs.check_output_folder", lambda config: [])
    monkeypatch.setattr(output_folder, "output_folder_problem", lambda folder: None)
    runs = mini / "output" / "runs"
    before = snapshot(mini.parent, exclude=[mini / "output" / "cache"])
    with _unwritable(runs, monkeypatch):
        code, out, err = _cli(["run", "--no-flow", "--quiet", mini / "quakefolio.toml"], capsys)
    assert code == 2, out + err
    one_line(err, rf"{re.escape(str(runs))}: cannot create a run folder: (permission denied|operation not permitted)")
    assert_unchanged(before, mini.parent, exclude=[mini / "output" / "cache"])


def test_unreadable_input_file_is_one_line(mini, capsys, monkeypatch):
    exposure = mini / "exposure.csv"
    if os.geteuid() != 0:
        exposure.chmod(0)
    else:  # root reads any file: the system's refusal is injected where the reader opens it
        import builtins

        real_open = builtins.open

        def refuse(file, *args, **kwargs):
            if str(file) == str(exposure):
                raise PermissionError(13, "Permission denied", str(file))
            return real_open(file, *args, **kwargs)

        monkeypatch.setattr("quakefolio.pipeline.io.ingest.open", refuse, raising=False)
    before = snapshot(mini.parent)
    code, out, err = _cli(["check", mini / "quakefolio.toml"], capsys)
    exposure.chmod(0o644)
    assert code == 2, out + err
    one_line(err, rf"{re.escape(str(exposure))}: cannot read file: Permission denied")
    assert_unchanged(before, mini.parent)


def test_report_into_an_unwritable_folder_is_one_line(finished, tmp_path, capsys, monkeypatch):
    _, _, run_b = finished
    folder = tmp_path / "reports"
    folder.mkdir()
    before = snapshot(tmp_path)
    with _unwritable(folder, monkeypatch):
        code, out, err = _cli(["report", run_b, "--out", folder / "r.html"], capsys)
    assert code == 2, out + err
    one_line(err, r"r\.html: cannot write the report: permission denied \(folder .*reports is not writable\)")
    assert_unchanged(before, tmp_path)


# --- 6. fit-fragility --write-library keeps comments and layout, writes through a link ----------------------

EXAMPLE_MSA = DEMO / "fragility_msa_example.csv"


def _fit(lib, capsys, *extra, state="irreparable", cls="RCF-LO"):
    return _cli(["fit-fragility", EXAMPLE_MSA, "--extra-beta", "0.45", "--write-library", lib, "--class", cls,
                 "--state", state, *extra], capsys)


def _changed_lines(old, new):
    import difflib

    return [ln for ln in difflib.ndiff(old.splitlines(), new.splitlines()) if ln[:1] in "+-"]


def test_write_library_replaces_one_state_keeping_comments_and_layout(tmp_path, capsys):
    lib = tmp_path / "library.toml"
    shutil.copyfile(DEMO / "fragility_library.toml", lib)
    old = lib.read_text()
    code, out, err = _fit(lib, capsys)
    assert code == 0 and err == "", err
    new = lib.read_text()
    changed = _changed_lines(old, new)
    # the header note, and the median and beta lines of the one state (their trailing comment kept)
    assert [ln[:2] for ln in changed] == ["+ ", "- ", "+ ", "- ", "+ "], changed
    assert changed[0].startswith("+ # fit-fragility: classes.RCF-LO state 'irreparable'")
    assert re.fullmatch(r"\+ median = [0-9.]+  # g \(SA_0\.3\)", changed[2])
    assert [ln for ln in old.splitlines() if "#" in ln and "median" not in ln] == \
        [ln for ln in new.splitlines() if "#" in ln and "median" not in ln and "fit-fragility" not in ln]
    code, _, _ = _fit(lib, capsys)  # a second fit of the same state replaces the note, not adds one
    assert code == 0 and lib.read_text().count("# fit-fragility: classes.RCF-LO state 'irreparable'") == 1


def test_write_library_inserts_a_state_and_a_class_in_place(tmp_path, capsys):
    lib = tmp_path / "library.toml"
    shutil.copyfile(DEMO / "fragility_library.toml", lib)
    old = lib.read_text()
    assert _fit(lib, capsys, "--mean-damage-ratio", "0.3", "--cov", "0.5", state="moderate")[0] == 0
    assert _fit(lib, capsys, "--mean-damage-ratio", "1.0", "--im", "SA_1.0", state="collapse", cls="NEW-1")[0] == 0
    new = lib.read_text()
    removed = [ln for ln in _changed_lines(old, new) if ln.startswith("- ")]
    assert removed == [], removed  # every line of the file is still there
    assert new.index("name = \"moderate\"") < new.index("name = \"irreparable\"", new.index("[classes.RCF-LO]"))
    assert new.rstrip().endswith("mean_damage_ratio = 1.0") and "[classes.NEW-1]" in new


def test_write_library_through_a_symlink_keeps_the_link(tmp_path, capsys):
    real = tmp_path / "shared" / "library.toml"
    real.parent.mkdir()
    shutil.copyfile(DEMO / "fragility_library.toml", real)
    link = tmp_path / "library.toml"
    link.symlink_to(os.path.relpath(real, tmp_path))
    code, out, err = _fit(link, capsys)
    assert code == 0 and err == "" and f"(link to {real})" in out
    assert link.is_symlink() and "# fit-fragility" in real.read_text()
    assert sorted(p.name for p in real.parent.iterdir()) == ["library.toml"]  # no temporary file left


def test_write_library_refuses_a_layout_it_cannot_keep(tmp_path, capsys):
    lib = tmp_path / "library.toml"
    lib.write_text('# my library\nformat = "quakefolio-fragility-1"\n\n[classes.X]\nim = "PGA"\nstates = [\n'
                   '  {name = "light", median = 0.2, beta = 0.5, mean_damage_ratio = 0.1},  # inline\n'
                   '  {name = "collapse", median = 3.0, beta = 0.9, mean_damage_ratio = 1.0},\n]\n')
    before = snapshot(tmp_path)
    code, out, err = _cli(["fit-fragility", EXAMPLE_MSA, "--extra-beta", "0.45", "--write-library", lib, "--class",
                           "X", "--state", "light"], capsys)
    assert code == 2
    one_line(err, r"library\.toml: column 'classes\.X': refused: cannot update the file in place and keep its "
                  r"comments and layout \(the states of class 'X' are not written as \[\[classes\.X\.states\]\] tables")
    assert_unchanged(before, tmp_path)


def test_write_library_to_a_dangling_link_is_refused(tmp_path, capsys):
    (tmp_path / "library.toml").symlink_to(tmp_path / "gone.toml")
    before = snapshot(tmp_path)
    code, _, err = _fit(tmp_path / "library.toml", capsys, "--mean-damage-ratio", "1.0", "--im", "SA_1.0")
    assert code == 2
    one_line(err, r"library\.toml: is a symbolic link to a missing file")
    assert_unchanged(before, tmp_path)
    assert stat.S_ISLNK((tmp_path / "library.toml").lstat().st_mode)


def test_folder_holding_only_a_nested_output_of_ours_is_accepted(mini, capsys):
    # another config wrote into output/other/ first: output/ holds nothing but that output folder
    nested = mini / "other.toml"
    nested.write_text((mini / "quakefolio.toml").read_text().replace('folder = "output"', 'folder = "output/other"'))
    assert _run(nested, capsys)[0] == 0
    assert sorted(p.name for p in (mini / "output").iterdir()) == ["other"]
    code, out, err = _run(mini / "quakefolio.toml", capsys)
    assert code == 0 and err == "" and RUN_ID.search(out.strip())
