"""The vectorised ingest path gives what the general one gives: frames, rows, values and errors.

The general reader (standard-library CSV parser for record lines, pandas for cells, a
Python loop over identifiers) is the reference; the vectorised reader
(:mod:`quakefolio.pipeline.io.csv_fast`) must agree with it on every file of the
hostile-input corpus, on variants of a small exposure file (line ends, blank lines,
quotes, control characters, white space, missing-value words, ...) and on odd numeric
and identifier cells.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from quakefolio.core.errors import InputError
from quakefolio.fragility import load_library
from quakefolio.pipeline.io import csv_fast, ingest

from conftest import DEMO, MINI, REPO

CSV_FILES = sorted(p for p in {*(REPO / "tests" / "data").rglob("*.csv"), *DEMO.glob("*.csv")} if p.is_file())
FORMULA = ("=", "+", "@", "\t", "\r")


def _outcome(call):
    try:
        return call()
    except InputError as exc:
        return str(exc)


def _same(a, b):
    if isinstance(a, str) or isinstance(b, str):
        return a == b
    if isinstance(a, tuple):
        pd.testing.assert_frame_equal(a[0], b[0], check_exact=True)
        return np.array_equal(a[1], b[1])
    pd.testing.assert_frame_equal(a, b, check_exact=True)
    return True


@pytest.mark.parametrize("path", CSV_FILES, ids=lambda p: str(p.relative_to(REPO)))
def test_every_corpus_file_reads_the_same(path):
    fast = _outcome(lambda: ingest._read_csv(path))
    general = _outcome(lambda: ingest._read_csv(path, fast=False))
    assert _same(fast, general)


def test_the_demo_and_mini_files_take_the_vectorised_path():
    for path in (DEMO / "exposure.csv", DEMO / "hazard_curves.csv", MINI / "exposure.csv"):
        assert csv_fast.read_regular_csv(path, path.read_bytes()) is not None


HEADER = "asset_id,lon,lat,building_class,replacement_value,vs30_mps,occupants,deductible,limit"
ROWS = ["B1,10.001,20.001,TST-A,1000000,400,10,20000,900000", "B2,10.029,20.002,TST-A,2500000,300,25,,",
        "B3,10.002,20.028,TST-B,800000,,4,10000,800000", "B4,10.031,19.999,TST-B,1200000,500,0,,"]
VARIANTS = {
    "plain": "\n".join([HEADER, *ROWS]) + "\n",
    "crlf": "\r\n".join([HEADER, *ROWS]) + "\r\n",
    "no final newline": "\n".join([HEADER, *ROWS]),
    "blank lines inside and after": "\n".join([HEADER, ROWS[0], "", ROWS[1], "", "", *ROWS[2:], "", ""]),
    "blank line before the header": "\n" + "\n".join([HEADER, *ROWS]),
    "white-space line": "\n".join([HEADER, ROWS[0], "   ", *ROWS[1:]]),
    "lone carriage return": HEADER + "\r" + "\n".join(ROWS),
    "byte-order mark": "\ufeff" + "\n".join([HEADER, *ROWS]),
    "quoted field": "\n".join([HEADER, '"B1",10.001,20.001,TST-A,1000000,400,10,20000,900000', *ROWS[1:]]),
    "field over two lines": "\n".join([HEADER, '"B\n1",10.001,20.001,TST-A,1000000,400,10,20000,900000', *ROWS[1:]]),
    "extra field": "\n".join([HEADER, ROWS[0] + ",x", *ROWS[1:]]),
    "empty extra field": "\n".join([HEADER, ROWS[0] + ",", *ROWS[1:]]),
    "missing field": "\n".join([HEADER, ROWS[0].rsplit(",", 1)[0], *ROWS[1:]]),
    "trailing comma everywhere": "\n".join(r + "," for r in [HEADER, *ROWS]),
    "NUL in a cell": "\n".join([HEADER, ROWS[0].replace("TST-A", "TST\x00A"), *ROWS[1:]]),
    "tab in an id": "\n".join([HEADER, ROWS[0].replace("B1", "B\t1"), *ROWS[1:]]),
    "tab before an id": "\n".join([HEADER, ROWS[0].replace("B1", "\tB1"), *ROWS[1:]]),
    "formula id": "\n".join([HEADER, ROWS[0].replace("B1", "=B1"), *ROWS[1:]]),
    "spaces around numbers": "\n".join([HEADER, ROWS[0].replace(",400,", ", 400 ,"), *ROWS[1:]]),
    "missing-value words": "\n".join([HEADER, ROWS[0].replace(",400,", ",NaN,"), ROWS[1].replace(",300,", ",n/a,"),
                                      *ROWS[2:]]),
    "nan in a required column": "\n".join([HEADER, ROWS[0].replace("1000000", "nan"), *ROWS[1:]]),
    "negative zero": "\n".join([HEADER, ROWS[0].replace(",10,", ",-0,"), *ROWS[1:]]),
    "not a number": "\n".join([HEADER, ROWS[0].replace("1000000", "1,000,000"), *ROWS[1:]]),
    "comma decimal": "\n".join([HEADER, ROWS[0].replace("10.001", "10;001"), *ROWS[1:]]),
    "duplicate id": "\n".join([HEADER, *ROWS, ROWS[2].replace("B3", "B1")]),
    "duplicate column": "\n".join([HEADER + ",lon", *(r + ",1" for r in ROWS)]),
    "unknown class": "\n".join([HEADER, ROWS[0].replace("TST-A", "TST-Z"), *ROWS[1:]]),
    "long id": "\n".join([HEADER, ROWS[0].replace("B1", "B" * 129), *ROWS[1:]]),
    "non-ASCII id": "\n".join([HEADER, ROWS[0].replace("B1", "Bé1"), *ROWS[1:]]),
    "empty id": "\n".join([HEADER, ROWS[0].replace("B1", ""), *ROWS[1:]]),
    "id none": "\n".join([HEADER, ROWS[0].replace("B1", "None"), *ROWS[1:]]),
    "header only": HEADER + "\n",
    "infinite value": "\n".join([HEADER, ROWS[0].replace("1000000", "inf"), *ROWS[1:]]),
}


@pytest.mark.parametrize("name", sorted(VARIANTS))
def test_exposure_variants_read_the_same(name, tmp_path, monkeypatch):
    path = tmp_path / "exposure.csv"
    path.write_bytes(VARIANTS[name].encode("utf-8"))
    library = load_library(MINI / "fragility.toml")
    assert _same(_outcome(lambda: ingest._read_csv(path)), _outcome(lambda: ingest._read_csv(path, fast=False)))
    fast = _outcome(lambda: ingest.read_exposure(path, library))
    monkeypatch.setattr(ingest, "read_regular_csv", lambda *a: None)
    monkeypatch.setattr(ingest, "parse_numbers", lambda *a: None)
    general = _outcome(lambda: ingest.read_exposure(path, library))
    assert _same(fast, general), (fast, general)


ODD_NUMBERS = ["1e5", "+5", ".5", "5.", "inf", "-inf", "Infinity", "nan", "NaN", "nan(1)", "1_000", "0x10", "1,5",
               "3e", "e5", "--1", " 1", "1 ", "1d5", "\u0661", "1.5.2", "+.5", "-.5e-3", "1E5", "0.", "-0", "-0.0",
               "-00", "1e400", "1e-400", "00012", "9007199254740993", "18446744073709551617", "", "NA", "null",
               "\xa08", "\uff11", "0.1", "-140.63362", "2.2250738585072014e-308", "4.9e-324"]


@pytest.mark.parametrize("cells", [[c] for c in ODD_NUMBERS] + [ODD_NUMBERS, ["-0", "1.5"], ["-0", "1"], ["1", ""]])
def test_numeric_cells_parse_as_pandas_does(cells):
    raw = pd.Series(cells, dtype="str")
    quick = csv_fast.parse_numbers(raw)
    text = raw.astype(str).str.strip().fillna("")
    empty = (text.eq("") | text.str.lower().isin(["nan", "none", "null", "na", "n/a"])).to_numpy()
    values = pd.to_numeric(text.where(~empty, None), errors="coerce").to_numpy(dtype=float)
    got_values, got_empty, _ = ingest._parse_cells(raw)
    assert np.array_equal(got_values, values, equal_nan=True) and np.array_equal(np.signbit(got_values),
                                                                                  np.signbit(values))
    assert np.array_equal(got_empty, empty)
    if quick is not None:
        assert np.array_equal(quick[0], values, equal_nan=True) and np.array_equal(quick[1], empty)


def test_random_numeric_cells_parse_as_pandas_does():
    rng = np.random.default_rng(20261203)
    alphabet = list("0123456789.+-eEinfaINFA_ xd,")
    for _ in range(300):
        cells = ["".join(rng.choice(alphabet, int(rng.integers(0, 6)))) for _ in range(int(rng.integers(1, 5)))]
        test_numeric_cells_parse_as_pandas_does(cells)


def test_identifier_checks_match_the_cell_by_cell_rules():
    rng = np.random.default_rng(7)
    alphabet = ["a", "N", "n", "A", "o", "O", "e", "E", "=", "+", "@", "\t", "\x01", "\x1f", "é", "x", "-", "€", "\x7f"]
    for _ in range(200):
        cells = ["".join(rng.choice(alphabet, int(rng.integers(0, 6)))) for _ in range(int(rng.integers(1, 8)))]
        cells += ["nan", "NONE", "x" * 129, "é" * 100, "é" * 129]
        ids = pd.Series(cells, dtype="str").str.strip()
        missing, formula, long = csv_fast.identifier_problems(ids, FORMULA)
        assert list(missing) == [not v or v.lower() in ("nan", "none") for v in ids]
        assert list(formula) == [v.startswith(FORMULA) or any(ord(ch) < 32 for ch in v) for v in ids]
        assert list(long) == [len(v) > 128 for v in ids]


def test_first_line_as_splitlines_finds_it():
    for text in ["", "\n\n", "  \nab,c\n", "x" * 70000 + "\nsecond", "\n" * 70000 + " head \nrest", "a\u2028b",
                 "\r\nh,1\r\n"]:
        lines = [ln for ln in text.splitlines() if ln.strip()]
        assert csv_fast.first_line(text, window=64) == (lines[0].strip() if lines else None)
