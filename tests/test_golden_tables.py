"""Every table of the demo is byte-identical to the one written by the reference code
(:data:`BASE_COMMIT`): refactors must not move a number.

The reference tables are regenerated on this machine: the test extracts the packages of
:data:`BASE_COMMIT` from the repository's history into a temporary folder, puts them first
on ``PYTHONPATH`` (so ``quakefolio.*`` resolves to the old code) and runs the same CLI
command on the same inputs.  Comparing with tables computed here, rather than with
committed files, keeps the check exact across machines whose numpy kernels differ in the
last bit.  Table content is compared as Arrow IPC bytes without schema metadata (the
metadata holds the run id); column names, types, order and every value must match bit
for bit, NaNs included.  A table whose layout changed on purpose is listed in
:data:`RESHAPED` with the function that lays the new table out as the old one, so its
values are still compared bit for bit (none since the current base commit).  A table whose values
moved at round-off by a documented change of summation order is listed in :data:`ROUNDOFF`
and compared to 1e-12 relative instead (schema, rows and non-float values still exact).

The reference runs on the plain library path (``--no-flow``).  The demo in compute mode
runs here end to end as a user runs it: ``quakefolio run`` on the default flow path (a
local Prefect server in a state folder of its own), with its report and cache; its tables
must equal the reference's, and its output, report and assets are checked.  The tabulated
mode runs on the plain path.  The flow and Dask paths are also held to the plain path by
``test_flow.py`` and ``test_operations.py`` (every table, ``check_exact``).
The demo's event set is shortened to 5,000 years and its hazard sites are laid on a 4 km grid
instead of 2 km (a quarter of the sites: the hazard, disaggregation and spectrum stages take
most of a demo run) to keep the suite fast; every stage runs exactly the same code for any
length and any grid.
"""
from __future__ import annotations

import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from quakefolio.pipeline.io.store import latest_run, read_table

from conftest import DEMO, REPO, seed_state

#: the reference code: the commit that merged the report work of issue 14 and the multi-region fractiles, whose
#: code reproduced, bit for bit, the tables of the earlier reference (47135e5, the last commit before the demo
#: gained its invented subduction zone) on the same demo inputs; before that, the commit that landed the
#: portfolio-loss work, and before it the last commit before the pipeline redesign.  A newer reference keeps
#: the suite fast (its code has the speed work) and the lists below short.
BASE_COMMIT = "e44d79c0c168a7dae29ccfd7476c8e0f9b566f93"
BASE_SHORT = BASE_COMMIT[:7]
YEARS = 5000
#: hazard-site spacing of the demo copies [km] (the demo's own: 2 km)
SITE_SPACING_KM = 4.0
CONFIGS = {"compute": "quakefolio.toml", "tabulated": "quakefolio_tabulated.toml"}
PACKAGES = ("core", "fragility", "pipeline")
#: Columns added to existing tables since the base commit (compared without them), by table file; new
#: tables are additions.
ADDED_COLUMNS = {}
#: Demo inputs the base commit's code does not know, removed from its copy: (file, regex).
NEW_INPUTS = ()
#: Tables whose layout changed since the base commit on purpose, with the function giving the new table in
#: the old layout (every value then compared bit for bit as for the other tables).
RESHAPED = {}
#: Tables whose floating-point values moved at round-off since the base commit, by a documented change of
#: summation order: compared with the same schema, rows and non-float values, and every float within
#: :data:`ROUNDOFF_RTOL` of the base's (relative to the larger magnitude; NaN where the base has NaN) or
#: within :data:`ROUNDOFF_ATOL` absolute.  The damage kernel's telescoped sums (core/risk_pieces.py; on the
#: demo at most 1.3e-15 relative, up to 1.2e-13 against the per-segment form on random curves), and the
#: segment pieces it leaves out as negligible (at most 2**-60 of a rate), move the damage-state rates and
#: what is computed from them.
ROUNDOFF = frozenset({
    "asset_consequences.parquet", "asset_damage.parquet", "asset_event_loss.parquet", "asset_loss.parquet",
    "asset_loss_curve.parquet", "collapse_screening.parquet", "consequence_event_summary.parquet",
    "portfolio_consequences.parquet", "portfolio_summary.parquet", "site_risk_targeted_im.parquet",
    "whatif_people_portfolio.parquet",
})
#: the largest relative difference accepted for the tables of :data:`ROUNDOFF`
ROUNDOFF_RTOL = 1e-12
#: ... or absolute: the share of a rate that comes from below the lowest hazard level is of order 1e-20 and
#: smaller for the severe states (a fraction in [0, 1]); there both forms are at round-off (on the demo
#: 2e-27 absolute, 6e-6 relative), far below any figure a run reports
ROUNDOFF_ATOL = 1e-18


def _git(*args):
    return subprocess.run(["git", "-C", str(REPO), *args], capture_output=True, text=True, timeout=60)


def _base_commit():
    """The full hash of the base commit, or None where the history is not available."""
    if shutil.which("git") is None:
        return None
    proc = _git("rev-parse", "--verify", "--quiet", f"{BASE_COMMIT}^{{commit}}")
    return proc.stdout.strip() if proc.returncode == 0 else None


def _old_code(root):
    """Extract the base commit's packages under ``root``; return the folder to put on PYTHONPATH."""
    commit = _base_commit()
    if commit is None:
        pytest.skip(f"base commit {BASE_SHORT} not in this checkout's history (shallow clone?)")
    src, shim = root / "src", root / "shim" / "quakefolio"
    src.mkdir(parents=True)
    shim.mkdir(parents=True)
    archive = subprocess.run(["git", "-C", str(REPO), "archive", commit, *PACKAGES], capture_output=True,
                             timeout=60, check=True).stdout
    subprocess.run(["tar", "-x", "-C", str(src)], input=archive, check=True, timeout=60)
    for name in PACKAGES:
        (shim / name).symlink_to(src / name, target_is_directory=True)
    return root / "shim"


def _demo_copy(dst, config_name, old=False, as_shipped=False):
    """The demo inputs under ``dst`` with a shorter event set and a coarser site grid, no report and no cache
    (``old``: without new inputs; ``as_shipped``: with its report and cache)."""
    shutil.copytree(DEMO, dst, ignore=shutil.ignore_patterns("output", "__pycache__"))
    for pattern, regex in NEW_INPUTS if old else ():
        for path in dst.glob(pattern):
            path.write_text(re.sub(regex, "", path.read_text(encoding="utf-8")), encoding="utf-8")
    cfg = dst / config_name
    text = cfg.read_text(encoding="utf-8")
    if "years = 50000" in text:
        text = text.replace("years = 50000", f"years = {YEARS}")
    if "site_spacing_km = 2.0" in text:
        text = text.replace("site_spacing_km = 2.0", f"site_spacing_km = {SITE_SPACING_KM}")
    if not as_shipped:
        text = text.replace("[output]\n", "[output]\nreport = false\n", 1)
        text = text.replace("[execution]\n", "[execution]\ncache = false\n", 1)
    cfg.write_text(text, encoding="utf-8")
    return cfg


def _run_cli_flow(cfg, state):
    """The demo through the command as a user runs it: default flow path (a local Prefect server of its own
    state folder, left running for later commands, stopped here), report and cache on."""
    env = dict(os.environ, QUAKEFOLIO_STATE=str(state))
    env.pop("PREFECT_API_URL", None)
    seed_state(state)  # a migrated Prefect database: the command's server starts without migrating
    try:
        proc = subprocess.run([sys.executable, "-m", "quakefolio.pipeline", "run", str(cfg)],
                              capture_output=True, text=True, env=env, timeout=900, cwd=str(cfg.parent))
        assert (state / "server" / "server.json").exists()  # the server is left for the next command
    finally:
        subprocess.run([sys.executable, "-m", "quakefolio.pipeline", "server", "stop"], env=env, timeout=120)
    assert proc.returncode == 0, proc.stderr[-3000:]
    out = proc.stdout + proc.stderr
    assert out.startswith("CAUTION: screening-level results")
    assert "ERROR" not in out and "Traceback" not in out and "error" not in proc.stderr.lower()
    assert "portfolio EAL" in out and "highest collapse probability" in out
    run = latest_run(cfg.parent / "output")
    assert run is not None
    assert (run / "report.html").read_text(encoding="utf-8").startswith("<!DOCTYPE html>")
    loss = read_table(run, "asset_loss")
    assert len(loss) >= 400 and loss.building_class.nunique() >= 6 and (loss.eal > 0).all()
    return run


def _run(cfg, pythonpath=None):
    env = dict(os.environ)
    if pythonpath is not None:
        env["PYTHONPATH"] = str(pythonpath)
    proc = subprocess.run([sys.executable, "-m", "quakefolio.pipeline", "run", str(cfg), "--no-flow", "--quiet"],
                          capture_output=True, text=True, env=env, timeout=900, cwd=str(cfg.parent))
    assert proc.returncode == 0, proc.stderr[-3000:]
    return Path(proc.stdout.strip().splitlines()[-1])


@pytest.fixture(scope="module")
def old_code(tmp_path_factory):
    return _old_code(tmp_path_factory.mktemp("base-code"))


def _ipc_bytes(table):
    table = table.replace_schema_metadata(None).combine_chunks()
    sink = pa.BufferOutputStream()
    with pa.ipc.new_stream(sink, table.schema) as writer:
        writer.write_table(table)
    return sink.getvalue().to_pybytes()


def _difference(old, new):
    """A short description of how two tables differ (for the failure message)."""
    if old.schema.remove_metadata() != new.schema.remove_metadata():
        return f"schema {old.schema.remove_metadata()} != {new.schema.remove_metadata()}"
    if old.num_rows != new.num_rows:
        return f"{old.num_rows} rows != {new.num_rows}"
    parts = []
    for name in old.column_names:
        a, b = old[name].to_numpy(zero_copy_only=False), new[name].to_numpy(zero_copy_only=False)
        if a.dtype.kind == "f":
            diff = ~((a == b) | (np.isnan(a) & np.isnan(b)))
            if diff.any():
                parts.append(f"{name}: {int(diff.sum())} values, max |d| {np.nanmax(np.abs(a - b)):.3g}, "
                             f"max relative {np.nanmax(_relative(a, b)):.3g}")
        elif not np.array_equal(a, b):
            parts.append(f"{name}: values differ")
    return "; ".join(parts) or "identical values, different encoding"


def _relative(a, b):
    """|a - b| relative to the larger magnitude (0 where both are 0, inf where only one is NaN)."""
    with np.errstate(invalid="ignore", divide="ignore"):
        rel = np.abs(a - b) / np.maximum(np.abs(a), np.abs(b))
    rel[a == b] = 0.0
    both_nan = np.isnan(a) & np.isnan(b)
    rel[both_nan] = 0.0
    rel[np.isnan(a) != np.isnan(b)] = np.inf
    return rel


def _equal_to_roundoff(old, new):
    """Same schema, rows and non-float values; floats within ROUNDOFF_RTOL or ROUNDOFF_ATOL (see :data:`ROUNDOFF`)."""
    if old.schema.remove_metadata() != new.schema.remove_metadata() or old.num_rows != new.num_rows:
        return False
    for name in old.column_names:
        a, b = old[name].to_numpy(zero_copy_only=False), new[name].to_numpy(zero_copy_only=False)
        if a.dtype.kind == "f":
            with np.errstate(invalid="ignore"):
                off = (_relative(a, b) > ROUNDOFF_RTOL) & ~(np.abs(a - b) <= ROUNDOFF_ATOL)
            if off.any():
                return False
        elif not np.array_equal(a, b):
            return False
    return True


@pytest.mark.slow
@pytest.mark.parametrize("mode", sorted(CONFIGS))
def test_demo_tables_identical_to_base_commit(mode, old_code, tmp_path):
    old_run = _run(_demo_copy(tmp_path / "old", CONFIGS[mode], old=True), pythonpath=old_code)
    if mode == "compute":  # also the demo end to end: the command's default flow path, report and cache
        new_run = _run_cli_flow(_demo_copy(tmp_path / "new", CONFIGS[mode], as_shipped=True), tmp_path / "state")
    else:
        new_run = _run(_demo_copy(tmp_path / "new", CONFIGS[mode]))
    old_tables = sorted(p.name for p in old_run.glob("*.parquet"))
    new_tables = {p.name for p in new_run.glob("*.parquet")}
    assert len(old_tables) >= 5
    assert not set(old_tables) - new_tables, f"tables missing: {sorted(set(old_tables) - new_tables)}"
    differ = []
    for name in old_tables:
        old, new = pq.read_table(old_run / name), pq.read_table(new_run / name)
        new = new.drop_columns([c for c in ADDED_COLUMNS.get(name, ()) if c in new.column_names])
        if name in RESHAPED:
            new = RESHAPED[name](new)
        if name in ROUNDOFF and _equal_to_roundoff(old, new):
            continue
        if _ipc_bytes(old) != _ipc_bytes(new):
            differ.append(f"{name}: {_difference(old, new)}")
    assert not differ, "tables differ from the base commit's:\n" + "\n".join(differ)
