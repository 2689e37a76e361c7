"""Config loading: validation messages name the file and the key path."""

from __future__ import annotations

from pathlib import Path

import pytest
from pydantic import ValidationError

from pipeline.config import load_config
from pipeline.errors import ConfigError

MINIMAL = """
name = "t"
[inputs]
stations = "st.csv"
dem = "dem.tif"
"""


def _write(tmp_path: Path, text: str) -> Path:
    p = tmp_path / "run.toml"
    p.write_text(text, encoding="utf-8")
    return p


def test_minimal_config_resolves_relative_paths(tmp_path):
    cfg = load_config(_write(tmp_path, MINIMAL))
    assert cfg.inputs.stations == tmp_path / "st.csv"
    assert cfg.inputs.dem == tmp_path / "dem.tif"
    assert cfg.design_day.temperature_offset_k == 10.0  # default design day: 25 °C at sea level


def test_config_is_frozen(tmp_path):
    cfg = load_config(_write(tmp_path, MINIMAL))
    with pytest.raises(ValidationError):
        cfg.name = "other"  # type: ignore[misc]


def test_unknown_key_names_path_and_suggests(tmp_path):
    p = _write(tmp_path, MINIMAL + "[design_day]\ntemperature_ofset_k = 3\n")
    with pytest.raises(ConfigError) as e:
        load_config(p)
    msg = str(e.value)
    assert str(p) in msg
    assert "design_day.temperature_ofset_k" in msg
    assert "temperature_offset_k" in msg


def test_wrong_type_names_key(tmp_path):
    p = _write(tmp_path, MINIMAL + '[zones]\nresolution_m = "fine"\n')
    with pytest.raises(ConfigError, match=r"zones\.resolution_m"):
        load_config(p)


def test_wrong_units_out_of_range(tmp_path):
    # relative humidity given as a fraction-of-100 mistake (3000 %) is refused
    p = _write(tmp_path, MINIMAL + "[design_day]\nrelative_humidity_pct = 3000\n")
    with pytest.raises(ConfigError, match=r"design_day\.relative_humidity_pct"):
        load_config(p)


def test_missing_required_key(tmp_path):
    p = _write(tmp_path, "name='x'\n[inputs]\nstations='a.csv'\n")
    with pytest.raises(ConfigError, match=r"missing key 'inputs\.dem'"):
        load_config(p)


def test_not_toml(tmp_path):
    p = _write(tmp_path, "name = = 3\n")
    with pytest.raises(ConfigError, match="not valid TOML"):
        load_config(p)


def test_missing_file(tmp_path):
    with pytest.raises(ConfigError, match="cannot read"):
        load_config(tmp_path / "nope.toml")


def test_demo_placeholder_needs_demo_folder(tmp_path):
    p = _write(tmp_path, "[inputs]\nstations='{demo}/s.csv'\ndem='{demo}/d.tif'\n")
    with pytest.raises(ConfigError, match="demo"):
        load_config(p)
    cfg = load_config(p, demo_dir=tmp_path / "cache")
    assert cfg.inputs.stations == tmp_path / "cache" / "s.csv"


def test_shipped_demo_config_is_valid(tmp_path):
    root = Path(__file__).resolve().parents[1]
    cfg = load_config(root / "config" / "demo.toml", demo_dir=tmp_path)
    assert cfg.name == "demo"
