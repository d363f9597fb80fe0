"""``[fragility] crossing = "envelope"``: what ``check`` accepts, the run computes.

The rates are the risk integral of the enveloped fragility (core.risk, checked there against
scipy.integrate.quad); here the run over the mini inputs with curves that cross inside the hazard's
range, and over the demo library, must give finite, ordered rates equal to the kernel's.
"""
import shutil

import numpy as np
from numpy.testing import assert_allclose

from quakefolio.pipeline import stages
from quakefolio.pipeline.cli import main
from quakefolio.pipeline.io.ingest import curves_for_im
from quakefolio.pipeline.io.store import read_table
from quakefolio.pipeline.runner import run_pure

from conftest import DEMO, REPO

DATA = REPO / "tests" / "data"
CROSSING_LIBRARY = DATA / "broken" / "fragility_crossing_curves" / "fragility.toml"


def _set_crossing(config, value):
    text = config.read_text()
    assert 'crossing = "reject"' in text or "[fragility]" in text
    if "crossing = " in text:
        text = text.replace('crossing = "reject"', f'crossing = "{value}"')
    else:
        text = text.replace("[fragility]\n", f'[fragility]\ncrossing = "{value}"\n')
    config.write_text(text)


def _damage_rates(run):
    return read_table(run, "asset_damage").sort_values(["asset_id", "damage_state_index"])


def _assert_rates_are_the_kernels(run, inputs):
    damage = _damage_rates(run)
    rates = damage.annual_rate_exceed.to_numpy()
    assert np.all(np.isfinite(rates)) and np.all(rates > 0)
    loss = read_table(run, "asset_loss")
    assert np.all(np.isfinite(loss.eal))
    for code in inputs.exposure.building_class.unique():
        dss = inputs.library[code]
        levels, curves = curves_for_im(inputs.hazard, dss.im)
        expected = dss.annual_rates(levels, curves, tail=inputs.config.fragility.tail, envelope=True)
        assets = inputs.exposure[inputs.exposure.building_class == code]
        for asset_id, site in zip(assets.asset_id, inputs.site_index[assets.index]):
            got = damage[damage.asset_id == asset_id].annual_rate_exceed.to_numpy()
            assert np.all(np.diff(got) <= 0)
            assert_allclose(got, expected[site], rtol=1e-12)


def test_curves_crossing_inside_the_range_check_and_run_agree(tmp_path, capsys):
    folder = tmp_path / "mini"
    shutil.copytree(DATA / "mini", folder, ignore=shutil.ignore_patterns("output"))
    shutil.copy(CROSSING_LIBRARY, folder / "fragility.toml")
    config = folder / "quakefolio.toml"
    assert main(["check", str(config)]) == 2  # rejected by default: the curves cross in the range
    _set_crossing(config, "envelope")
    assert main(["check", str(config)]) == 0
    capsys.readouterr()
    inputs = stages.load_inputs(config)
    run = run_pure(inputs)
    _assert_rates_are_the_kernels(run, inputs)


def test_demo_library_runs_with_the_envelope(tmp_path, capsys):
    folder = tmp_path / "demo"
    folder.mkdir()
    for name in ("quakefolio_tabulated.toml", "hazard_curves.csv", "fragility_library.toml"):
        shutil.copy(DEMO / name, folder / name)
    # a short portfolio: the first 6 buildings of every class of the demo (every class, many sites)
    lines = (DEMO / "exposure.csv").read_text().splitlines()
    head = lines[0].split(",").index("building_class")
    kept, seen = [lines[0]], {}
    for line in lines[1:]:
        code = line.split(",")[head]
        seen[code] = seen.get(code, 0) + 1
        if seen[code] <= 6:
            kept.append(line)
    (folder / "exposure.csv").write_text("\n".join(kept) + "\n")
    config = folder / "quakefolio_tabulated.toml"
    config.write_text(config.read_text().replace('folder = "output/tabulated"', 'folder = "output"\nreport = false'))
    plain = run_pure(stages.load_inputs(config))
    _set_crossing(config, "envelope")
    assert main(["check", str(config)]) == 0
    capsys.readouterr()
    inputs = stages.load_inputs(config)
    run = run_pure(inputs)
    _assert_rates_are_the_kernels(run, inputs)
    # every crossing of the demo library lies far below the hazard's levels: the envelope adds only
    # the lower tail's sliver, it never lowers a rate
    a, b = _damage_rates(plain).annual_rate_exceed.to_numpy(), _damage_rates(run).annual_rate_exceed.to_numpy()
    assert np.all(b >= a * (1 - 1e-12))
    assert_allclose(b, a, rtol=1e-6)
