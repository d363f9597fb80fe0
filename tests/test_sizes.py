"""Size of the work: rupture counts against the ruptures built, the memory budget, and the
peak-memory estimates against peaks measured with ``tracemalloc`` on small runs.

The memory estimates (:mod:`quakefolio.pipeline.stages.sizes`) are sums of the arrays each
stage holds at its largest moment; the stated accuracy, checked here, is a factor of 2 of
the ``tracemalloc`` peak of the same work (allocations through Python and numpy).
"""
from __future__ import annotations

import shutil
import tracemalloc

import numpy as np
import pytest

from quakefolio.core.errors import InputError
from quakefolio.core.sources import counts
from quakefolio.core.sources.counts import fault_rupture_count, point_rupture_count, polygon_point_count
from quakefolio.core.sources.mfd import truncated_gr
from quakefolio.core.sources.faults import fault_ruptures
from quakefolio.core.sources.ruptures import area_source_ruptures, planar_fault_ruptures, polygon_grid
from quakefolio.pipeline.io.source_model import RuptureLimit, count_source_model, load_source_model
from quakefolio.pipeline.stages import load_inputs
from quakefolio.pipeline.stages import sizes
from quakefolio.pipeline.stages.hazard import hazard_block

from conftest import DEMO, MINI

#: Stated accuracy of the memory estimates: measured / 2 <= estimate <= 2 x measured.
FACTOR = 2.0


# ---- rupture counts equal the ruptures built ------------------------------------------------------

@pytest.mark.parametrize("seed", range(4))
def test_fault_count_equals_ruptures_built(seed):
    rng = np.random.default_rng(seed)
    for _ in range(15):
        mfd = truncated_gr(b_value=1.0, mmin=5.0, mmax=float(rng.choice([6.0, 7.0, 8.0])), bin_width=0.1,
                           rate_above_mmin=0.1)
        kw = dict(dip_deg=rng.uniform(5, 90), upper_depth_km=rng.uniform(0, 3), lower_depth_km=rng.uniform(8, 25),
                  rake_deg=rng.uniform(-180, 180))
        trace = [[10.0, 20.0], [10.0 + rng.uniform(-0.5, 0.5), 20.0 + rng.uniform(-0.5, 0.5)]]
        step = rng.uniform(0.3, 5.0)
        built = planar_fault_ruptures("f", trace, mfd=mfd, rupture_step_km=step, **kw)
        count = fault_rupture_count("f", trace, mags=mfd.mag, rupture_step_km=step, **kw)
        assert count.n_ruptures == len(built)
        assert count.n_magnitudes == len(mfd.mag)


@pytest.mark.parametrize("seed", range(3))
def test_bent_fault_count_equals_ruptures_built(seed):
    # ruptures float along the whole trace: the count of the planar fault over the trace length
    rng = np.random.default_rng(100 + seed)
    for _ in range(10):
        mfd = truncated_gr(b_value=1.0, mmin=5.0, mmax=float(rng.choice([6.5, 7.5])), bin_width=0.1,
                           rate_above_mmin=0.1)
        kw = dict(dip_deg=rng.uniform(20, 90), upper_depth_km=rng.uniform(0, 3), lower_depth_km=rng.uniform(8, 20),
                  rake_deg=rng.uniform(-180, 180))
        n = int(rng.integers(3, 6))
        trace = np.c_[10.0 + np.cumsum(rng.uniform(0.05, 0.2, n)), 20.0 + np.cumsum(rng.uniform(-0.1, 0.1, n))]
        step = rng.uniform(0.5, 4.0)
        built = fault_ruptures("f", trace, mfd=mfd, rupture_step_km=step, **kw)
        count = fault_rupture_count("f", trace, mags=mfd.mag, rupture_step_km=step, **kw)
        assert count.n_ruptures == len(built) and built.piece_rupture.size > 0


def test_count_of_bent_faults_and_strike_distributions_equals_the_ruptures(tmp_path):
    text = (MINI / "sources.toml").read_text()
    text = text.replace("trace = [[9.86, 19.95], [10.14, 19.97]]",
                        "trace = [[9.86, 19.95], [9.95, 19.97], [10.05, 19.96], [10.14, 19.97]]")
    text = text.replace("mechanisms = [[0.0, 90.0, 0.0, 1.0]]",
                        "mechanisms = [[90.0, 0.0, 0.5], [45.0, 90.0, 0.5]]\nuniform_strikes = 6")
    text += """
[[areas]]
id = "zone"
polygon = [[9.9, 19.9], [10.1, 19.9], [10.1, 20.1], [9.9, 20.1]]
spacing_km = 5.0
upper_depth_km = 0.0
lower_depth_km = 15.0
hypo_depths = [[5.0, 0.5], [10.0, 0.5]]
mechanisms = [[60.0, -90.0, 1.0]]
strikes = [[0.0, 0.2], [45.0, 0.3], [90.0, 0.5]]
mfd = { kind = "truncated_gr", b_value = 1.0, min_mag = 4.5, max_mag = 6.0, bin_width = 0.1, rate_above_min = 0.1 }
"""
    path = tmp_path / "sources.toml"
    path.write_text(text)
    model = load_source_model(path)
    assert count_source_model(path) == len(model.ruptures)
    assert model.ruptures.piece_rupture.size > 0 and set(model.ruptures.strike_deg[model.ruptures.source_index == 2]) \
        == {0.0, 60.0, 120.0, 180.0, 240.0, 300.0}


@pytest.mark.parametrize("seed", range(4))
def test_polygon_count_equals_grid_points(seed):
    # convex, concave and self-intersecting polygons: the row sweep keeps exactly the grid
    # points the ray-casting test keeps, at many spacings
    rng = np.random.default_rng(seed)
    for k in range(25):
        n = int(rng.integers(3, 12))
        if k % 3:
            ang = np.sort(rng.uniform(0, 2 * np.pi, n))
            r = rng.uniform(0.05, 0.5, n)
            poly = np.c_[10 + r * np.cos(ang), 20 + r * np.sin(ang)]
        else:
            poly = rng.uniform([9.8, 19.8], [10.2, 20.2], (n, 2))
        spacing = rng.uniform(0.5, 8.0)
        try:
            expected = len(polygon_grid(poly, spacing)[0])
        except ValueError:  # no point inside
            expected = 0
        got = polygon_point_count(poly, spacing)
        assert got.exact and got.n_points == expected


def test_area_count_and_its_estimate_beyond_the_sweep(monkeypatch):
    poly = [[9.9, 19.9], [10.1, 19.9], [10.1, 20.1], [9.9, 20.1]]
    mfd = truncated_gr(b_value=1.0, mmin=4.5, mmax=6.0, bin_width=0.1, rate_above_mmin=0.05)
    built = area_source_ruptures("a", poly, spacing_km=1.0, mfd=mfd, hypo_depths=[(5.0, 0.5), (10.0, 0.5)],
                                 mechanisms=[(0.0, 90.0, 0.0, 1.0)], upper_depth_km=0.0, lower_depth_km=15.0)
    exact = polygon_point_count(poly, 1.0)
    assert exact.n_points * point_rupture_count(len(mfd.mag), 2, 1) == len(built)
    monkeypatch.setattr(counts, "MAX_SWEEP_ROWS", 5)
    estimate = polygon_point_count(poly, 1.0)
    assert not estimate.exact
    assert abs(estimate.n_points / exact.n_points - 1) < 0.05  # area / cell area: within 5 % here


@pytest.mark.parametrize("path", [MINI / "sources.toml", MINI / "sources_alt.toml", DEMO / "sources.toml",
                                  DEMO / "sources_high_mmax.toml"])
def test_source_model_count_equals_its_ruptures(path):
    assert count_source_model(path) == len(load_source_model(path).ruptures)


def test_limit_refuses_before_building_and_names_the_key(tmp_path):
    text = (MINI / "sources.toml").read_text().replace('name = "mini test sources"\n',
                                                       'name = "mini test sources"\n\n[settings]\nrupture_step_km = 0.5\n')
    path = tmp_path / "sources.toml"
    path.write_text(text)
    n = count_source_model(path)
    assert count_source_model(path, RuptureLimit(n, "why")) == n
    with pytest.raises(InputError, match=r"source 'test_fault': [\d,]+ ruptures .*; why$") as exc:
        count_source_model(path, RuptureLimit(100, "why"))
    assert (exc.value.row, exc.value.column) == (6, "settings.rupture_step_km")


# ---- the memory budget ---------------------------------------------------------------------------

def test_available_memory_reads_meminfo_and_the_cgroup_limit(tmp_path):
    meminfo = tmp_path / "meminfo"
    meminfo.write_text("MemTotal:       32000000 kB\nMemFree:         1000000 kB\nMemAvailable:   20000000 kB\n")
    none = tmp_path / "no-cgroup"
    assert sizes.available_memory_bytes(str(meminfo), str(none)) == 20000000 * 1024
    v2 = tmp_path / "v2"
    v2.mkdir()
    (v2 / "memory.max").write_text(f"{4 << 30}\n")
    (v2 / "memory.current").write_text(f"{1 << 30}\n")
    assert sizes.available_memory_bytes(str(meminfo), str(v2)) == 3 << 30  # the container's room
    (v2 / "memory.max").write_text("max\n")  # no limit
    assert sizes.available_memory_bytes(str(meminfo), str(v2)) == 20000000 * 1024
    v1 = tmp_path / "v1" / "memory"
    v1.mkdir(parents=True)
    (v1 / "memory.limit_in_bytes").write_text(f"{2 << 30}\n")
    (v1 / "memory.usage_in_bytes").write_text(f"{1 << 29}\n")
    assert sizes.available_memory_bytes(str(meminfo), str(v1.parent)) == (2 << 30) - (1 << 29)


def test_budget_is_three_quarters_of_what_is_available_or_the_override(tmp_path):
    meminfo = tmp_path / "meminfo"
    meminfo.write_text("MemAvailable:   16777216 kB\n")  # 16 GiB
    budget = sizes.memory_budget({}, meminfo=str(meminfo), cgroup=str(tmp_path))
    assert budget.bytes == 0.75 * (16 << 30)
    assert "16.0 GiB available" in budget.text and "(12.0 GiB)" in budget.text
    assert sizes.memory_budget({sizes.MEMORY_ENV: "2.5"}).bytes == 2.5 * (1 << 30)
    with pytest.raises(InputError, match=r"QUAKEFOLIO_MEMORY_GIB: expected a positive number of GiB, got 'lots'"):
        sizes.memory_budget({sizes.MEMORY_ENV: "lots"})


def test_unknown_memory_checks_nothing_but_still_estimates(tmp_path, monkeypatch):
    monkeypatch.setattr(sizes, "available_memory_bytes", lambda **_: None)
    monkeypatch.delenv(sizes.MEMORY_ENV)
    budget = sizes.memory_budget()
    assert budget.bytes is None
    assert sizes.rupture_limit(None, 3, budget) is None
    inputs = load_inputs(MINI / "quakefolio_compute.toml")
    assert "available memory unknown" in inputs.work.summary()


# ---- estimates against measured peaks --------------------------------------------------------------

def _peak(call):
    """``tracemalloc`` peak [bytes] of ``call()`` above what was allocated before it, and its result."""
    tracemalloc.start()
    try:
        base = tracemalloc.get_traced_memory()[0]
        out = call()
        peak = tracemalloc.get_traced_memory()[1] - base
    finally:
        tracemalloc.stop()
    return peak, out


def _mini_compute(tmp_path, step_km=None, **sections):
    """The mini compute-mode inputs in ``tmp_path`` with a rupture step and config keys changed."""
    folder = tmp_path / "mini"
    shutil.copytree(MINI, folder, ignore=shutil.ignore_patterns("output"))
    if step_km is not None:
        for name in ("sources.toml", "sources_alt.toml"):
            p = folder / name
            text = p.read_text()
            head, rest = text.split("\n[[faults]]", 1)
            p.write_text(f"{head}\n[settings]\nrupture_step_km = {step_km}\n\n[[faults]]{rest}")
    cfg = folder / "quakefolio_compute.toml"
    text = cfg.read_text()
    for section, body in sections.items():
        for line in body.splitlines():  # a key given replaces the file's
            key = line.split("=")[0].strip()
            text = "\n".join(ln for ln in text.splitlines() if not ln.startswith(f"{key} =")) + "\n"
        text = text.replace(f"[{section}]\n", f"[{section}]\n{body}\n") if f"[{section}]\n" in text \
            else text + f"\n[{section}]\n{body}\n"
    cfg.write_text(text)
    return cfg


def test_source_model_build_peak(tmp_path):
    cfg = _mini_compute(tmp_path, step_km=0.25)
    path = cfg.parent / "sources.toml"
    peak, model = _peak(lambda: load_source_model(path))
    estimate = len(model.ruptures) * sizes.RUPTURE_BUILD_BYTES
    assert len(model.ruptures) > 10_000
    assert peak / FACTOR <= estimate <= FACTOR * peak, (estimate, peak)


def test_hazard_task_peak(tmp_path):
    cfg = _mini_compute(tmp_path, step_km=0.5, execution="max_workers = 1\nsite_block_size = 5")
    inputs = load_inputs(cfg)
    stage = next(s for s in inputs.work.stages if s.name == "hazard stage")
    task = next(t for t in stage.terms if t.key == "execution.site_block_size")
    model = inputs.hazard_model
    peak, _ = _peak(lambda: hazard_block(model, inputs.hazard, (0, 5)))
    assert peak / FACTOR <= task.bytes <= FACTOR * peak, (task.bytes, peak)


def test_event_tables_peak(tmp_path):
    # years dominate: the run's peak is the event-based tables and their storage
    from quakefolio.pipeline.runner import run_pure

    cfg = _mini_compute(tmp_path, portfolio="years = 50000", hazard="disaggregation = false",
                        execution="max_workers = 1\ncache = false")
    inputs = load_inputs(cfg)
    work = inputs.work
    assert work.peak.name == "event-based tables"
    tracemalloc.start()
    try:
        run_pure(inputs)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert peak / FACTOR <= work.peak.bytes <= FACTOR * peak, (work.peak.bytes, peak)


# ---- what check prints and refuses -----------------------------------------------------------------

def test_check_prints_the_size_of_the_work(capsys):
    from quakefolio.pipeline.cli import main

    assert main(["check", str(MINI / "quakefolio_compute.toml")]) == 0
    out = capsys.readouterr().out
    assert "size: 1,052 ruptures in 2 source models; 5 sites x 527 ruptures = 2,635 (site, rupture) pairs per " \
           "model; 5 (site, class) pairs; 10,000 years, about 7" in out
    assert "peak memory about " in out and "of 8.0 GiB" in out


def test_expected_events_match_the_event_set(tmp_path):
    from quakefolio.pipeline.stages.events import prepare_events
    from quakefolio.pipeline.stages.inputs import with_hazard

    inputs = load_inputs(_mini_compute(tmp_path, portfolio="years = 20000"))
    em = prepare_events(with_hazard(inputs, inputs.hazard_model, inputs.hazard))
    expected = inputs.work.n_events
    assert abs(em.events.n_events - expected) <= 4 * np.sqrt(expected)  # Poisson count


def test_refusal_names_the_key_and_what_would_fit(tmp_path, monkeypatch):
    monkeypatch.setenv(sizes.MEMORY_ENV, "0.05")
    cfg = _mini_compute(tmp_path, portfolio="years = 1000000")
    with pytest.raises(InputError, match=r"years = 1,000,000 \(about [\d,]+ events\) need about [\d.]+ MiB for the "
                                         r"event-based tables .*; the memory budget is 51\.2 MiB "
                                         r"\(QUAKEFOLIO_MEMORY_GIB\); at most years = ([\d,]+) would fit") as exc:
        load_inputs(cfg)
    assert exc.value.column == "portfolio.years"
    fits = int(str(exc.value).rsplit("= ", 1)[1].split()[0].replace(",", ""))
    cfg.write_text(cfg.read_text().replace("years = 1000000", f"years = {fits}"))
    assert load_inputs(cfg).work.peak.bytes <= 0.05 * (1 << 30)


def test_more_sites_than_the_correlated_fields_accept_is_refused(tmp_path):
    from types import SimpleNamespace

    from quakefolio.core.events.gmf import EIGEN_MAX_SITES

    cfg = _mini_compute(tmp_path)
    config = load_inputs(cfg).config
    n = EIGEN_MAX_SITES + 1
    hazard = SimpleNamespace(lon=10.0 + np.arange(n) * 1e-3, lat=np.full(n, 20.0))
    inputs = SimpleNamespace(config=config, hazard_model=object(), hazard=hazard)
    with pytest.raises(InputError, match=r"20,001 hazard sites exceed the 20,000 the spatially correlated") as exc:
        sizes._check_field_sites(inputs)
    assert exc.value.column == "hazard.site_spacing_km"
