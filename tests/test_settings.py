"""Frozen settings objects of the run config: attribute access equals mapping access.

``cfg.hazard.mode`` and ``cfg["hazard"]["mode"]`` must give the same value for every key
of every demo config; the settings objects are read-only.
"""
from __future__ import annotations

import dataclasses
from pathlib import Path
from types import MappingProxyType

import pytest

from quakefolio.pipeline.io.config import SCHEMA, SETTINGS_CLASSES, load_config

REPO = Path(__file__).resolve().parents[1]
CONFIGS = sorted((REPO / "demo_portfolio").glob("quakefolio*.toml")) + sorted(
    (REPO / "tests" / "data" / "mini").glob("quakefolio*.toml"))


def _thawed(value):
    """Tuples back to lists and read-only mappings back to dicts, recursively."""
    if isinstance(value, tuple):
        return [_thawed(v) for v in value]
    if isinstance(value, MappingProxyType):
        return {k: _thawed(v) for k, v in value.items()}
    return value


def test_there_are_demo_configs():
    assert len(CONFIGS) >= 3


def test_settings_classes_declare_every_schema_key():
    assert list(SETTINGS_CLASSES) == list(SCHEMA)
    for section, cls in SETTINGS_CLASSES.items():
        assert [f.name for f in dataclasses.fields(cls)] == list(SCHEMA[section]), section


@pytest.mark.parametrize("path", CONFIGS, ids=lambda p: f"{p.parent.name}/{p.name}")
def test_attribute_access_equals_mapping_access(path):
    cfg = load_config(path)
    for section, keys in SCHEMA.items():
        settings = getattr(cfg, section)
        assert settings == cfg.settings(section)
        for key in keys:
            attr = getattr(settings, key)
            assert _thawed(attr) == cfg[section][key], f"{section}.{key}"
            assert type(_thawed(attr)) is type(cfg[section][key]), f"{section}.{key}"


@pytest.mark.parametrize("path", CONFIGS[:1], ids=lambda p: p.name)
def test_settings_are_frozen_and_mapping_access_is_unchanged(path):
    cfg = load_config(path)
    with pytest.raises(dataclasses.FrozenInstanceError):
        cfg.hazard.mode = "ingest"
    assert isinstance(cfg.portfolio.return_periods_yr, tuple)
    assert cfg.sections["hazard"] is cfg["hazard"]
    assert cfg.base == cfg.path.parent
    assert cfg.resolved()["execution"]["block_size"] == cfg.execution.block_size
    assert isinstance(cfg.raw, dict) and len(cfg.sha256) == 64


def test_readme_config_table_names_every_section_and_key():
    # The README's configuration table is the user's reference: every key of every section.
    import re

    from quakefolio.pipeline.io.config import SCHEMA

    readme = (Path(__file__).resolve().parents[1] / "README.md").read_text()
    rows = {}
    for line in readme.splitlines():
        m = re.match(r"^\| `\[(\w+)\]`", line)
        if m:
            rows[m.group(1)] = rows.get(m.group(1), "") + line
    missing = {sec: [k for k in keys if f"`{k}`" not in rows.get(sec, "")] for sec, keys in SCHEMA.items()}
    assert not {s: m for s, m in missing.items() if m}, missing
