"""The [[corner]] list of a config: one library per corner, each error naming its key."""

from __future__ import annotations

import tomllib
from pathlib import Path

import pytest

from charflow.config import library as config
from charflow.config.resources import MODEL_DIR
from charflow.records.errors import ConfigError

ROOT = Path(__file__).resolve().parents[1]
SMALL = ROOT / "tests" / "data" / "small_l1.toml"


def _parse(corners: list[dict], models: list | None = None) -> config.LibraryConfig:
    doc = tomllib.loads(SMALL.read_text(encoding="utf-8"))
    doc["corner"] = corners
    if models is not None:
        doc["process"]["models"] = models
    return config.parse(doc, SMALL)


def test_no_corners_is_the_library_itself() -> None:
    cfg = config.load(SMALL)
    assert cfg.corners == () and cfg.libraries() == (cfg,)


def test_each_corner_is_a_library_of_its_own() -> None:
    cfg = _parse(
        [
            {"name": "ff", "section": "ff", "vdd": 1.32, "temperature": -40},
            {"name": "hot", "temperature": 125},
        ]
    )
    ff, hot = cfg.libraries()
    assert (ff.name, hot.name) == ("small_l1_ff", "small_l1_hot")
    assert [m.section for m in ff.process.models] == ["ff"]
    assert (ff.process.vdd, ff.process.temperature) == (1.32, -40.0)
    # What a corner leaves out comes from [process].
    assert [m.section for m in hot.process.models] == ["tt"]
    assert (hot.process.vdd, hot.process.temperature) == (1.2, 125.0)
    assert ff.corners == () and ff.cells == cfg.cells


@pytest.mark.parametrize(
    ("corners", "key", "message"),
    [
        ([{"name": "ff", "speed": 1}], "corner[0].speed", "unknown key"),
        ([{"section": "ff"}], "corner[0].name", "missing key"),
        ([{"name": "f f"}], "corner[0].name", "letters, digits and _"),
        ([{"name": "ff"}, {"name": "ff"}], "corner[1].name", "declared twice"),
        ([{"name": "ff", "vdd": 0}], "corner[0].vdd", "greater than 0"),
        ([{"name": "ff", "section": 3}], "corner[0].section", "must be str"),
    ],
)
def test_corner_errors_name_their_key(corners, key, message) -> None:
    with pytest.raises(ConfigError, match=message) as info:
        _parse(corners)
    assert info.value.context["key"] == key
    assert str(SMALL) in str(info.value)


def test_a_corner_section_needs_a_model_read_by_section() -> None:
    model = str(MODEL_DIR / "vellum90_l1.lib")
    with pytest.raises(ConfigError, match="no model file is read by section") as info:
        _parse([{"name": "ff", "section": "ff"}], models=[model])
    assert info.value.context["key"] == "corner[0].section"
