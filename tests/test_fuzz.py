"""Property-based fuzzing of the two places where outside text enters: the station table and the
run config.

Station tables (``read_station_table`` + ``validate_stations``, the pure ingest path): random
column subsets (standard names, aliases, junk), random cells (numbers, numbers written badly,
dates, empties, arbitrary Unicode including control characters, quotes, delimiters and line
breaks), random delimiters, encodings, line endings and quoting. Configs: random values at every
key the config model has, unknown keys, and random edits of valid TOML text.

Properties: only :class:`~pipeline.errors.AltigradeError` subclasses escape (file- or
config-level problems, one line each); otherwise every row read is accepted or rejected exactly
once (rows in = accepted + rejected), every rejected row has a one-line reason, and accepted
rows satisfy the documented contract. Examples are derandomised so CI is deterministic.
"""

from __future__ import annotations

import csv
import datetime as dt
import io
import math
import re
from pathlib import Path
from typing import Any, Literal, get_args, get_origin

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from pydantic import BaseModel

from pipeline.config import RunConfig, load_config, parse_config
from pipeline.errors import AltigradeError, ConfigError
from pipeline.ingest import NUMERIC_RANGES, REQUIRED, validate_stations
from pipeline.io import read_station_table

TODAY = dt.date(2026, 6, 1)


def fuzz(max_examples: int) -> settings:
    """Deterministic hypothesis settings for CI (no deadline: GDAL/pandas timings vary)."""
    return settings(
        max_examples=max_examples,
        deadline=None,
        derandomize=True,
        suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture],
    )


# ------------------------------------------------------------------------- station tables

STANDARD = (
    "station_id",
    "name",
    "operator",
    "lon",
    "lat",
    "x",
    "y",
    "regular_aki",
    "midgrade_aki",
    "premium_aki",
    "volume_l_per_month",
    "regular_share",
    "last_inspection_date",
    "field_test_aki",
    "field_test_date",
    "past_test_failures",
    "complaints",
)
ALIASES = ("Longitude", "LAT", "ID", "Station Name", "lng", "Regular", "fid", "source_row")
ALL_TEXT = st.text(alphabet=st.characters(codec="utf-8", exclude_categories=("Cs",)), max_size=24)
NASTY = st.sampled_from(
    [
        "",
        " ",
        "inf",
        "-inf",
        "nan",
        "NaN",
        "1e999",
        "-0",
        "85,5",
        "1.250,75",
        "1\u00a0200",
        "\u2212135.5",
        "0x55",
        "87 AKI",
        '"',
        '""',
        "a,b",
        "a;b",
        "a\tb",
        "a|b",
        "line\nbreak",
        "cr\rhere",
        "\ufeff",
        "\x00",
        "\x1b[31m",
        "\u202e",
        "<img src=x onerror=alert(1)>",
        "2025-02-30",
        "2025-05-01T08:00+02:00",
        "2099-01-01",
        "0205-03-01",
        "sep=;",
        "=1+1",
    ]
)


def _number(lo: float, hi: float) -> st.SearchStrategy[str]:
    """Mostly inside [lo, hi], sometimes around it, as a float or an integer."""
    inside = st.floats(lo, hi).map(lambda v: f"{v:.6g}")
    around = st.floats(lo - (hi - lo), hi + (hi - lo), allow_nan=False).map(lambda v: f"{v:.6g}")
    return st.one_of(inside, inside, inside, around, st.integers(int(lo) - 5, int(hi) + 5).map(str))


def _cell(column: str, plausible_weight: int = 12) -> st.SearchStrategy[str]:
    plausible: st.SearchStrategy[str]
    if column in ("lon", "Longitude", "lng", "x"):
        plausible = _number(-140.0, -130.0) | _number(-200.0, 380.0)
    elif column in ("lat", "LAT", "y"):
        plausible = _number(35.0, 45.0) | _number(-100.0, 100.0)
    elif column in NUMERIC_RANGES:
        plausible = _number(*NUMERIC_RANGES[column])
    elif column.endswith("_date"):
        plausible = st.one_of(
            st.dates(dt.date(1990, 1, 1), TODAY), st.dates(dt.date(1900, 1, 1), dt.date(2100, 1, 1))
        ).map(dt.date.isoformat)
    elif column in ("station_id", "ID"):
        plausible = st.integers(1, 40).map(lambda k: f"S{k}") | st.sampled_from(["S1 ", ""])
    else:
        plausible = ALL_TEXT
    # (st.one_of would merge repeated branches: pick the branch with an integer draw instead.)
    return st.integers(0, plausible_weight + 1).flatmap(
        lambda k: (
            plausible if k < plausible_weight else (NASTY if k == plausible_weight else ALL_TEXT)
        )
    )


@st.composite
def station_tables(draw, plausible_weight: int = 12) -> tuple[bytes, int | None]:
    """(file bytes, expected record count or None when the layout may legitimately regroup
    records). ``plausible_weight``: odds of a plausible cell against one nasty/random cell."""
    names = st.sampled_from(STANDARD + ALIASES)
    if plausible_weight < 20:
        names = names | ALL_TEXT
    columns = draw(st.lists(names, max_size=10, unique=True))
    if draw(st.integers(0, 3)):  # mostly a usable table, so that row validation is reached
        for c in (*REQUIRED, "lon", "lat"):
            if c not in columns:
                columns.insert(draw(st.integers(0, len(columns))), c)
    n = draw(st.integers(0, 8))
    rows = [[draw(_cell(c, plausible_weight)) for c in columns] for _ in range(n)]
    if rows and draw(st.booleans()):  # a duplicate row, or a ragged one
        rows.append(list(draw(st.sampled_from(rows))))
    if rows and draw(st.booleans()):
        k = draw(st.integers(0, len(rows) - 1))
        rows[k] = rows[k][: draw(st.integers(0, len(columns)))] + draw(
            st.lists(ALL_TEXT, max_size=2)
        )
    delim = draw(st.sampled_from([",", ";", "\t", "|"]))
    end = draw(st.sampled_from(["\n", "\r\n"]))
    quoting = draw(st.sampled_from(["minimal", "all", "raw"]))
    buf = io.StringIO()
    if quoting == "raw":  # written by hand, no quoting: may be broken on purpose
        buf.write(end.join(delim.join(r) for r in [columns, *rows]))
        if draw(st.booleans()):
            buf.write(end)
    else:
        w = csv.writer(
            buf,
            delimiter=delim,
            lineterminator=end,
            quoting=csv.QUOTE_ALL if quoting == "all" else csv.QUOTE_MINIMAL,
        )
        w.writerow(columns)
        w.writerows(rows)
    text = buf.getvalue()
    enc = draw(st.sampled_from(["utf-8", "utf-8-sig", "utf-16", "cp1252", "latin-1"]))
    try:
        data = text.encode(enc)
    except UnicodeEncodeError:
        enc, data = "utf-8", text.encode("utf-8")
    expected = None
    header_ok = any(str(c).strip() for c in columns) and not re.fullmatch(
        r"\s*\"?sep=.\"?\s*", text.split("\n", 1)[0]
    )
    # Exact record count is known for quoted files whose text has no NUL and no byte
    # sequence that could be read back in another encoding with other line breaks.
    if quoting != "raw" and header_ok and enc in ("utf-8", "utf-8-sig", "utf-16"):
        expected = sum(1 for r in rows if any(c.strip() for c in r))
    return data, expected


def _check_ingest(path: Path, data: bytes, expected: int | None) -> None:
    path.write_bytes(data)
    try:
        table = read_station_table(path)
        res = validate_stations(table, source=str(path), default_crs="EPSG:4326", today=TODAY)
    except AltigradeError as exc:  # a file-level problem: allowed, but one line
        assert "\n" not in str(exc) and "\r" not in str(exc), str(exc)
        return
    n = len(table.frame)
    if expected is not None:
        assert n == expected, (n, expected)
    # rows in = accepted + rejected, each source row exactly once
    assert n == len(res.accepted) + len(res.rejected)
    rows = sorted(
        [int(v) for v in res.accepted["source_row"]] + [int(v) for v in res.rejected["source_row"]]
    )
    assert rows == sorted(int(v) for v in table.source_rows)
    assert len(set(rows)) == n
    # every rejected row says why, on one line
    for reason in res.rejected["reject_reason"]:
        assert reason and "\n" not in reason and "\r" not in reason, repr(reason)
    # accepted rows satisfy the documented contract
    acc = res.accepted
    if len(acc):
        lon = acc["lon"].to_numpy(float)
        lat = acc["lat"].to_numpy(float)
        assert np.all(np.isfinite(lon)) and np.all(np.abs(lon) <= 180)
        assert np.all(np.isfinite(lat)) and np.all(np.abs(lat) <= 90)
        aki = acc["regular_aki"].to_numpy(float)
        lo, hi = NUMERIC_RANGES["regular_aki"]
        assert np.all((aki >= lo) & (aki <= hi))
        ids = acc["station_id"].astype(str)
        assert (ids != "").all() and ids.is_unique
        assert (acc["name"].astype(str) != "").all()
        for c, (lo, hi) in NUMERIC_RANGES.items():
            if c in acc.columns:
                v = acc[c].to_numpy(float)
                ok = np.isnan(v) | ((v >= lo) & (v <= hi))
                assert ok.all(), (c, v)


@fuzz(500)
@given(table=station_tables())
def test_fuzz_station_tables(table, tmp_path) -> None:
    data, expected = table
    _check_ingest(tmp_path / "stations.csv", data, expected)


@fuzz(250)
@given(table=station_tables(plausible_weight=60))
def test_fuzz_mostly_valid_station_tables(table, tmp_path) -> None:
    """Mostly plausible cells, so that the contract on accepted rows is exercised often."""
    data, expected = table
    _check_ingest(tmp_path / "stations.csv", data, expected)


@fuzz(150)
@given(
    raw=st.binary(max_size=300),
    suffix=st.sampled_from([".csv", ".txt", ".tsv"]),
)
def test_fuzz_station_table_bytes(raw, suffix, tmp_path) -> None:
    """Arbitrary bytes as a station table: a clear error or a valid row split, nothing else."""
    _check_ingest(tmp_path / f"stations{suffix}", raw, None)


# ------------------------------------------------------------------------------- configs


def _leaf_paths(
    model: type[BaseModel], prefix: tuple[str, ...] = ()
) -> list[tuple[tuple[str, ...], Any]]:
    """Every (key path, annotation) of the config model, found by introspection so keys added
    by other modules are fuzzed too."""
    out = []
    for name, f in model.model_fields.items():
        if name == "source":
            continue
        ann = f.annotation
        sub = ann if isinstance(ann, type) and issubclass(ann, BaseModel) else None
        if sub is None:
            for arg in get_args(ann):
                if isinstance(arg, type) and issubclass(arg, BaseModel):
                    sub = arg
        if sub is not None and get_origin(ann) is None:
            out += _leaf_paths(sub, (*prefix, name))
        else:
            out.append(((*prefix, name), ann))
    return out


LEAVES = _leaf_paths(RunConfig)
TOML_SCALARS = st.one_of(
    ALL_TEXT,
    st.integers(-(2**63), 2**63 - 1),
    st.floats(allow_nan=True, allow_infinity=True),
    st.booleans(),
    st.dates(),
    st.datetimes(),
    st.sampled_from(["EPSG:4326", "EPSG:99999", "", "{demo}/x", "../../x", "nonsense", "local"]),
)
TOML_VALUES = st.recursive(
    TOML_SCALARS,
    lambda inner: st.lists(inner, max_size=4) | st.dictionaries(ALL_TEXT, inner, max_size=3),
    max_leaves=6,
)


def _base_config() -> dict[str, Any]:
    return {"name": "fuzz", "inputs": {"stations": "s.csv", "dem": "d.tif"}}


def _typed(ann: Any) -> st.SearchStrategy[Any]:
    """Values of roughly the annotated type (so that deep validators are reached)."""
    origin, args = get_origin(ann), get_args(ann)
    if ann is bool:
        return st.booleans()
    if ann is int:
        return st.integers(-10, 10_000)
    if ann is float:
        return st.floats(-50, 5000, allow_nan=False) | st.sampled_from([0.0, 1.0, 0.5, 100.0])
    if ann is str:
        return st.sampled_from(["EPSG:4326", "EPSG:32608", "stations", "x"]) | ALL_TEXT
    if ann is Path:
        return st.sampled_from(["st.csv", "dem.tif", "rules/x.toml", "{demo}/a"])
    if origin is Literal:
        return st.sampled_from(args)
    if origin in (tuple, list):
        inner = _typed(args[0]) if args else TOML_SCALARS
        return st.lists(inner, max_size=4)
    if origin is dict:
        inner = _typed(args[1]) if len(args) == 2 else TOML_SCALARS
        return st.dictionaries(
            st.sampled_from(["legacy", "modern", "boosted", "x"]), inner, max_size=3
        )
    if args:
        return st.one_of([_typed(a) for a in args if a is not type(None)] or [st.none()])
    return TOML_SCALARS


@st.composite
def config_dicts(draw) -> dict[str, Any]:
    data = _base_config()
    for _ in range(draw(st.integers(0, 6))):
        path, ann = draw(st.sampled_from(LEAVES))
        node = data
        for part in path[:-1]:
            if not isinstance(node.get(part), dict):
                node[part] = {}
            node = node[part]
        value = draw(st.one_of(_typed(ann), _typed(ann), TOML_VALUES))
        if value is None:
            continue
        node[path[-1]] = value
    for _ in range(draw(st.integers(0, 2))):  # unknown keys, at the top or one level down
        key = draw(ALL_TEXT)
        where = draw(st.sampled_from([None, "inputs", "zones", "design_day"]))
        target = data if where is None else data.setdefault(where, {})
        if isinstance(target, dict):
            target[key] = draw(TOML_VALUES)
    if draw(st.integers(0, 9)) == 0:
        data.pop(draw(st.sampled_from(["name", "inputs"])), None)
    return data


def _check_config(data: dict[str, Any], base: Path) -> None:
    try:
        cfg = parse_config(data, base_dir=base, source="fuzz.toml")
    except ConfigError:
        return
    assert isinstance(cfg, RunConfig)
    # a config that parses has usable numbers where it promises them
    assert math.isfinite(cfg.design_day.relative_humidity_pct)
    assert 0 <= cfg.design_day.relative_humidity_pct <= 100


@fuzz(400)
@given(data=config_dicts())
def test_fuzz_config_mappings(data, tmp_path) -> None:
    _check_config(data, tmp_path)


def _assert_names_file_or_key(msg: str, path: Path) -> None:
    """A config error names the file, or at least the key (the {demo} message names only the
    key: see test_bad_inputs case config_demo_placeholder_outside_demo, xfail)."""
    assert str(path) in msg or "key '" in msg, msg


def _toml_key(k: str) -> str:
    return '"' + _toml_escape(k) + '"'


def _toml_escape(s: str) -> str:
    out = []
    for ch in s:
        o = ord(ch)
        if ch in '"\\':
            out.append("\\" + ch)
        elif o < 0x20 or o == 0x7F:
            out.append(f"\\u{o:04x}")
        else:
            out.append(ch)
    return "".join(out)


def _toml_value(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        if math.isnan(v):
            return "nan"
        if math.isinf(v):
            return "inf" if v > 0 else "-inf"
        return repr(v)
    if isinstance(v, dt.datetime):
        return v.isoformat()
    if isinstance(v, dt.date):
        return v.isoformat()
    if isinstance(v, str):
        return '"' + _toml_escape(v) + '"'
    if isinstance(v, list):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{" + ", ".join(f"{_toml_key(k)} = {_toml_value(x)}" for k, x in v.items()) + "}"
    raise TypeError(type(v))  # pragma: no cover


def to_toml(data: dict[str, Any]) -> str:
    """A small TOML writer (inline tables for nested mappings; enough for fuzzing)."""
    return "".join(f"{_toml_key(k)} = {_toml_value(v)}\n" for k, v in data.items())


@fuzz(150)
@given(data=config_dicts())
def test_fuzz_config_files(data, tmp_path) -> None:
    """The same mappings written as TOML files and loaded with load_config."""
    p = tmp_path / "run.toml"
    try:
        text = to_toml(data)
    except ValueError:  # pragma: no cover - e.g. a datetime TOML cannot hold
        return
    p.write_text(text, encoding="utf-8")
    try:
        cfg = load_config(p)
    except ConfigError as exc:
        _assert_names_file_or_key(str(exc), p)
        return
    assert isinstance(cfg, RunConfig)


VALID_TOML = (
    'name = "t"\n[inputs]\nstations = "st.csv"\ndem = "dem.tif"\n'
    "[design_day]\nrelative_humidity_pct = 30.0\n[zones]\nresolution_m = 900.0\n"
)


@fuzz(150)
@given(
    pos=st.integers(0, len(VALID_TOML)),
    cut=st.integers(0, 8),
    insert=st.text(max_size=6) | st.sampled_from(["=", "[", "]", '"', "\n", "inf", "\x00"]),
)
def test_fuzz_config_text_edits(pos, cut, insert, tmp_path) -> None:
    """Random edits of a valid config file: it loads, or fails with a ConfigError."""
    p = tmp_path / "run.toml"
    p.write_text(VALID_TOML[:pos] + insert + VALID_TOML[pos + cut :], encoding="utf-8")
    try:
        load_config(p)
    except ConfigError as exc:
        _assert_names_file_or_key(str(exc), p)


@pytest.mark.parametrize(
    "text",
    [
        "station_id,name,lon,lat,regular_aki\n" + "S1,a,-135,40,85\n" * 3,
        "station_id;name;lon;lat;regular_aki\nS1;\x1b[2J;-135,0;40,0;85\n",
    ],
)
def test_check_ingest_helper_detects_lost_rows(tmp_path, text) -> None:
    """The fuzz property is not vacuous: a wrong expected count fails it."""
    with pytest.raises(AssertionError):
        _check_ingest(tmp_path / "s.csv", text.encode(), 99)
