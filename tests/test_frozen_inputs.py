"""Read-only run inputs: cached settings, hazard curves prepared once at input time, frozen
event model, library lines read at most once (pipeline/io, pipeline/stages/checks.py).

Runs on copies of tests/data/mini (hazard tabulated at PGA, SA_0.3 and SA_1.0; class TST-C
on SA_0.6 is interpolated across periods).
"""
import dataclasses
import pickle
from pathlib import Path

import numpy as np
import pytest
from numpy.testing import assert_array_equal

from quakefolio.core.errors import InputError
from quakefolio.pipeline import stages
from quakefolio.pipeline.io.config import load_config
from quakefolio.pipeline.io.ingest import HazardCurves, UnavailableIM, curves_for_im
from quakefolio.pipeline.stages import checks
from quakefolio.pipeline.stages.events import EventModel

from conftest import MINI

# An invented class on an untabulated period of the mini hazard (interpolated between SA_0.3 and SA_1.0).
NEW_CLASS = """format = "quakefolio-fragility-1"

[classes.TST-MID]
im = "SA_0.5"

[[classes.TST-MID.states]]
name = "collapse"
median = 1.0
beta = 0.6
mean_damage_ratio = 1.0
"""

ALTERNATIVE = """
[[scenario.alternatives]]
id = "mid"
assets = ["B1"]
new_class = "TST-MID"
fragility_library = "new.toml"
retrofit_cost = 1
"""


def test_settings_are_built_once_and_the_config_pickles():
    cfg = load_config(MINI / "quakefolio.toml")
    assert cfg.hazard is cfg.hazard and cfg.settings("output") is cfg.output
    back = pickle.loads(pickle.dumps(cfg))
    assert back.hazard == cfg.hazard and back.sections == cfg.sections


def test_interpolated_curves_are_prepared_at_input_time_and_read_only():
    inputs = stages.load_inputs(MINI / "quakefolio.toml")
    hz = inputs.hazard
    assert hz.interpolated == frozenset({"SA_0.6"}) and "SA_0.6" in hz.curves
    with pytest.raises(TypeError):
        hz.curves["SA_0.6"] = hz.curves["SA_0.3"]
    with pytest.raises(dataclasses.FrozenInstanceError):
        hz.interpolated = frozenset()
    # a look-up of another period interpolates without storing
    levels, rates = curves_for_im(hz, "SA_0.5")
    assert levels.shape == hz.curves["SA_0.3"][0].shape and "SA_0.5" not in hz.curves
    again = hz.with_im("SA_0.5")
    assert again is not hz and again.interpolated == {"SA_0.5", "SA_0.6"} and hz.interpolated == {"SA_0.6"}
    assert_array_equal(again.curves["SA_0.5"][1], rates)
    assert again.with_im("SA_0.5") is again


def test_untabulated_im_without_interpolation_raises_from_the_look_up():
    hz = HazardCurves(site_id=np.array(["S1"]), lon=np.zeros(1), lat=np.zeros(1),
                      curves={"PGA": (np.array([[0.1, 0.2]]), np.array([[1e-2, 1e-3]]))}, source="curves.csv")
    with pytest.raises(UnavailableIM, match="SA_0.3 is not tabulated in curves.csv .* period interpolation is off"):
        hz.with_im("SA_0.3", allow_interpolation=False)


def test_alternative_im_is_prepared_once_and_not_in_the_class_warning(mini_config):
    (mini_config.parent / "new.toml").write_text(NEW_CLASS)
    text = mini_config.read_text()
    mini_config.write_text(text.replace("[hazard]", ALTERNATIVE + "\n[hazard]", 1))
    inputs = stages.load_inputs(mini_config)
    assert inputs.hazard.interpolated == {"SA_0.5", "SA_0.6"}
    assert any("interpolated across periods for SA_0.6 (" in w for w in inputs.warnings)
    (alt,) = stages.whatif.validate(inputs)
    assert alt.dss.im == "SA_0.5"


def test_library_text_is_read_at_most_once_per_file(tmp_path, monkeypatch):
    lib = tmp_path / "lib.toml"
    lib.write_text(NEW_CLASS)
    reads = []
    original = Path.read_text

    def counting(self, *args, **kwargs):
        reads.append(self)
        return original(self, *args, **kwargs)

    monkeypatch.setattr(Path, "read_text", counting)
    lines = checks.LibraryLines()
    assert lines.row(lib, ("classes", "TST-MID"), "im") == 4
    assert lines.row(str(lib), ("classes", "TST-MID", "states"), "beta", 0) == 9
    assert reads == [lib]


def test_class_check_names_the_library_line(tmp_path):
    from quakefolio.fragility import load_library

    lib = tmp_path / "lib.toml"
    lib.write_text(NEW_CLASS)
    dss = load_library(lib)["TST-MID"]

    def unavailable(im):
        raise UnavailableIM(f"{im} is not here")

    with pytest.raises(InputError, match=r"lib.toml:4: column 'classes.TST-MID.im': class 'TST-MID' "
                                         r"\(new_class of alternative 'x'\): SA_0.5 is not here"):
        checks.check_class_hazard(dss, unavailable, lib, checks.LibraryLines(), reject_crossing=True,
                                  alternative="x")
    levels = np.array([0.1, 1.0])
    assert checks.check_class_hazard(dss, lambda im: levels, lib, checks.LibraryLines(),
                                     reject_crossing=True) is levels


def test_event_model_is_frozen():
    assert EventModel.__dataclass_params__.frozen
    assert "extra" not in {f.name for f in dataclasses.fields(EventModel)}
