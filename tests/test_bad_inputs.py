"""Broken-input corpus: ``quakefolio check`` on every case of ``tests/data/broken/``.

Each case folder holds a ``quakefolio.toml`` plus only the files that differ from
``tests/data/mini`` (unchanged files are referenced as ``../../mini/<file>``); its first
line says what is broken.  For every case the check must exit 2 with exactly one
stderr line ``error: <file>[:<row>]: [column '<col>': ]<message>`` naming the offending
file, row and column, write nothing, and never show a traceback.
"""
from __future__ import annotations

import os
import re
import subprocess
import sys
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

# case -> (offending file, relative to the case folder; row or None; column fragment or None; message regex)
EXPECTED = {
    # exposure
    "exposure_missing_column": ("exposure.csv", 1, "building_class", r"missing required column"),
    "exposure_misspelt_column": ("exposure.csv", 1, "replacment_value", r"did you mean 'replacement_value'"),
    "exposure_non_numeric": ("exposure.csv", 4, "replacement_value", r"expected a number, got '800k USD'"),
    "exposure_negative_value": ("exposure.csv", 3, "replacement_value", r"expected a positive number, got '-3e5'"),
    "exposure_empty_required": ("exposure.csv", 5, "replacement_value", r"missing value"),
    "exposure_nan_required": ("exposure.csv", 4, "lat", r"missing value \(empty or NaN\)"),
    "exposure_duplicate_id": ("exposure.csv", 5, "asset_id", r"duplicate id 'B2' \(first seen at row 3\)"),
    "exposure_unknown_class": ("exposure.csv", 5, "building_class", r"unknown building class 'TST-X'"),
    "exposure_lat_out_of_range": ("exposure.csv", 3, "lat", r"expected a number in \[-90, 90\], got '95.0'"),
    "exposure_asset_too_far": ("exposure.csv", 5, "lon", r"asset 'B4' is 22\.\d+ km from the nearest hazard site "
                                                        r"'T02' \(limit 5 km"),
    "exposure_formula_id": ("exposure.csv", 4, "asset_id", r"'=HYPERLINK.*starts with a formula character"),
    "exposure_non_utf8": ("exposure.csv", 5, "asset_id", r"not valid UTF-8 text \(byte 0xe2\)"),
    "exposure_empty_file": ("exposure.csv", None, None, r"file is empty"),
    "exposure_header_only": ("exposure.csv", 2, None, r"no data rows"),
    "exposure_deductible_ge_limit": ("exposure.csv", 4, "deductible", r"deductible 800000 is not below the limit"),
    "exposure_not_found": ("no_such_exposure.csv", None, None, r"file not found"),
    "exposure_multiline_field": ("exposure.csv", 6, "replacement_value", r"got '-1200000'"),
    "exposure_extra_field": ("exposure.csv", 4, None, r"record has 10 fields but the header has 9"),
    "exposure_duplicate_column": ("exposure.csv", 1, "lat", r"appears more than once in the header"),
    "exposure_is_directory": ("exposure.csv", None, None, r"not a regular file"),
    "exposure_parquet_negative": ("exposure.parquet", 3, "replacement_value", r"expected a positive number"),
    "exposure_parquet_null_id": ("exposure.parquet", 4, "asset_id", r"missing identifier"),
    "exposure_parquet_corrupt": ("exposure.parquet", None, None, r"not a readable Parquet file"),
    # source models (compute mode)
    "sources_unknown_key": ("sources.toml", 8, "faults[0].dip_degree", r"unknown key; did you mean 'dip_deg'"),
    "sources_depths_inverted": ("sources.toml", 11, "faults[0].lower_depth_km", r"expected a positive number"),
    "sources_mfd_missing_rate": ("sources.toml", 12, "faults[0].mfd", r"needs exactly one of rate_above_min"),
    "config_branch_weights": ("quakefolio.toml", 7, "hazard.source_models", r"branch weights must sum to 1"),
    "config_unknown_gmm": ("quakefolio.toml", 8, "hazard.gmm_branches", r"unknown ground-motion model 'BSSA2014'"),
    "exposure_huge_value": ("exposure.csv", 3, "replacement_value", r"value out of range \(\|x\| > 1e\+15\), got '1e300'"),
    "config_output_not_a_folder": ("quakefolio.toml", 18, "output.folder", r"is an existing file; name a folder"),
    # hazard curves
    "hazard_rate_increasing": ("hazard_curves.csv", 20, "annual_rate",
                               r"site 'T02', SA_0\.3 increases with im_level \(rate 0\.02 then 0\.05\)"),
    "hazard_negative_rate": ("hazard_curves.csv", 13, "annual_rate", r"expected a non-negative number, got '-0\.0002'"),
    "hazard_unknown_im": ("hazard_curves.csv", 10, "im", r"unknown IM 'SA\(1\.0\)'"),
    "hazard_duplicated_level": ("hazard_curves.csv", 5, "im_level", r"duplicated im_level"),
    "hazard_site_missing_im": ("hazard_curves.csv", 14, "im", r"site 'T02' has no curve for SA_1\.0"),
    "hazard_site_two_coordinates": ("hazard_curves.csv", 7, "lon", r"site 'T01' has more than one lon/lat pair"),
    "hazard_im_unit_typo": ("quakefolio.toml", 10, "hazard.im_unit", r"expected one of 'g', 'm/s2', 'cm/s2', "
                                                                     r"got 'cm/s\^2'"),
    "hazard_statistic_absent": ("../../mini/hazard_curves.csv", 2, "statistic", r"no curves with statistic 'p84'"),
    # fragility library
    "fragility_medians_out_of_order": ("fragility.toml", 17, "classes.TST-A.states[1].median",
                                       r"medians must increase with severity \(0\.2 for 'light', then 0\.15"),
    "fragility_negative_beta": ("fragility.toml", 42, "classes.TST-B.states[1].beta",
                                r"expected a positive number, got -0\.5"),
    "fragility_damage_ratio_decreasing": ("fragility.toml", 19, "classes.TST-A.states[1].mean_damage_ratio",
                                          r"mean damage ratios must not decrease"),
    "fragility_damage_ratio_above_one": ("fragility.toml", 26, "classes.TST-A.states[2].mean_damage_ratio",
                                         r"expected a number in \[0, 1\], got 1\.2"),
    "fragility_cov_too_large": ("fragility.toml", 20, "classes.TST-A.states[1].cov",
                                r"cov too large for a beta distribution"),
    "fragility_crossing_curves": ("fragility.toml", 18, "classes.TST-A.states[1].beta",
                                  r"'light' and 'heavy' cross at SA_0\.3 = 0\.13\d+ g"),
    "fragility_unknown_key": ("fragility.toml", 41, "classes.TST-B.states[1].medain", r"did you mean 'median'"),
    "fragility_toml_syntax": ("fragility.toml", 16, None, r"TOML syntax error"),
    "fragility_missing_im": ("fragility.toml", 28, "classes.TST-B.im", r"missing required key 'im'"),
    "fragility_im_outside_periods": ("fragility.toml", 47, "classes.TST-C.im",
                                     r"SA_5\.0 is outside the tabulated periods .*\(PGA, SA_0\.3, SA_1\.0\)"),
    # run config
    "config_unknown_section": ("quakefolio.toml", 20, "exposures", r"unknown section \[exposures\]; did you mean "
                                                                   r"'exposure'"),
    "config_unknown_key": ("quakefolio.toml", 5, "scenario.horizon_yrs", r"unknown key; did you mean 'horizon_yr'"),
    "config_wrong_type": ("quakefolio.toml", 5, "scenario.horizon_yr", r"expected a finite number, got 'fifty'"),
    "config_missing_required": ("quakefolio.toml", 2, "scenario.name", r"missing required key 'name'"),
    "config_mode_compute": ("quakefolio.toml", 8, "hazard.source_models", r'mode = "compute" needs source_models'),
    "config_bad_choice": ("quakefolio.toml", 21, "execution.backend", r"got 'spark'"),
    "config_toml_syntax": ("quakefolio.toml", 11, None, r"TOML syntax error: Expected '\]'"),
}

CASES = sorted(p.name for p in BROKEN.iterdir() if p.is_dir())

# error: <file>[:<row>]: [column '<col>': ]<message>
LINE = re.compile(r"^error: (?P<file>[^:]+?)(?::(?P<row>\d+))?: (?:column '(?P<col>[^']*)': )?(?P<msg>\S.*)$")


def _tree(root):
    return {p.relative_to(root): p.stat().st_mtime_ns for p in root.rglob("*")}


def test_corpus_and_expectations_match():
    assert len(CASES) >= 20
    assert set(CASES) == set(EXPECTED), "every case folder needs an expectation and vice versa"


@pytest.mark.parametrize("case", CASES)
def test_case_folder_holds_only_changed_files(case):
    folder = BROKEN / case
    assert (folder / "quakefolio.toml").is_file()
    assert (folder / "quakefolio.toml").read_text().startswith("# Broken on purpose: ")
    for f in folder.iterdir():
        twin = MINI / f.name
        if f.is_file() and f.name != "quakefolio.toml" and twin.exists():
            assert f.read_bytes() != twin.read_bytes(), f"{case}/{f.name} is a copy of mini: point at ../../mini"


@pytest.mark.parametrize("case", CASES)
def test_check_reports_one_located_error(case, capsys):
    fname, row, column, message = EXPECTED[case]
    rc = main(["check", str(BROKEN / case / "quakefolio.toml")])
    out, err = capsys.readouterr()
    assert rc == 2
    assert "Traceback" not in out + err
    lines = err.splitlines()
    assert len(lines) == 1, err
    m = LINE.match(lines[0])
    assert m, lines[0]
    expected_file = (BROKEN / case / fname).resolve()
    got_file = Path(m["file"])
    assert (got_file.parent.name, got_file.name) == (expected_file.parent.name, expected_file.name), lines[0]
    assert m["row"] == (None if row is None else str(row)), lines[0]
    if column is None:
        assert m["col"] is None, lines[0]
    else:
        assert m["col"] is not None and column in m["col"], lines[0]
    assert re.search(message, m["msg"]), lines[0]


def test_check_writes_nothing(capsys):
    before = _tree(DATA)
    for case in CASES:
        assert main(["check", str(BROKEN / case / "quakefolio.toml")]) == 2
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
