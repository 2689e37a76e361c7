"""Determinism: the same inputs and config give the same outputs.

Compared across two real CLI runs of the reduced demo into different folders, with different
``PYTHONHASHSEED`` values (so that no result depends on set/dict hash order):

* every layer of ``altigrade.gpkg``, read back with GDAL (pyogrio): attribute table (column
  names, types, values) and WKB geometries, hashed with SHA-256 — the GeoPackage file bytes
  themselves differ (GDAL stores a write timestamp), their contents must not;
* ``stations.csv`` byte for byte;
* every ``*.html`` byte for byte; where a difference appears it may only be the documented
  ``generated_note`` line (it holds the run date, see pipeline.webmap), nothing else;
* the manifest's stage keys, input hashes and counts.

Plain regression checks (no outside reference applies): equality with a clean run.
"""

from __future__ import annotations

import difflib
import hashlib
import json
from pathlib import Path

import numpy as np
import pandas as pd
import pyogrio
import pytest
import shapely
from conftest import SMALL_DEMO, run_cli

#: The line of an HTML output allowed to differ between runs (the run date; pipeline.webmap).
GENERATED_NOTE_MARK = 'class="ag-generated"'


def layer_hashes(gpkg: Path) -> dict[str, str]:
    """SHA-256 per layer of a GeoPackage: column names and types, every attribute value, and
    the WKB of every geometry, in row order (read back with GDAL through pyogrio)."""
    out = {}
    for name, _gtype in pyogrio.list_layers(gpkg):
        df = pyogrio.read_dataframe(gpkg, layer=name)
        h = hashlib.sha256()
        geom = df.geometry if hasattr(df, "geometry") and "geometry" in df.columns else None
        attrs = pd.DataFrame(df.drop(columns=["geometry"], errors="ignore"))
        h.update(json.dumps([[c, str(attrs[c].dtype)] for c in attrs.columns]).encode())
        for c in attrs.columns:
            for v in attrs[c].tolist():
                if isinstance(v, float) and np.isnan(v):
                    v = "NaN"
                h.update(repr(v).encode("utf-8", "surrogatepass"))
                h.update(b"\x1f")
        if geom is not None:
            for w in shapely.to_wkb(np.asarray(geom.values, dtype=object), hex=True):
                h.update((w or "EMPTY").encode())
                h.update(b"\x1e")
        out[str(name)] = h.hexdigest()
    return out


def output_digest(out: Path) -> dict[str, object]:
    """What must be identical between equivalent runs (see the module docstring)."""
    digest: dict[str, object] = {"gpkg": layer_hashes(out / "altigrade.gpkg")}
    for p in sorted(out.glob("[!.]*.csv")) + sorted(out.glob("[!.]*.html")):
        digest[p.name] = hashlib.sha256(p.read_bytes()).hexdigest()
    m = json.loads((out / "manifest.json").read_text(encoding="utf-8"))
    digest["manifest"] = {k: m.get(k) for k in ("stage_keys", "inputs_sha256", "counts")}
    return digest


def html_differences(a: str, b: str) -> list[str]:
    """Changed lines between two HTML texts (both sides), as a list."""
    return [
        ln
        for ln in difflib.unified_diff(a.splitlines(), b.splitlines(), lineterm="", n=0)
        if ln[:1] in "+-" and not ln.startswith(("+++", "---"))
    ]


@pytest.fixture(scope="module")
def second_run(small_demo_run, demo_cache, tmp_path_factory) -> Path:
    out = tmp_path_factory.mktemp("determinism") / "other-folder"
    proc = run_cli(
        "demo",
        *SMALL_DEMO,
        "--out",
        str(out),
        "--cache-dir",
        str(demo_cache),
        env={"PYTHONHASHSEED": "12345"},
    )
    assert proc.returncode == 0, proc.stderr
    return out


def test_every_geopackage_layer_identical(small_demo_run, second_run) -> None:
    first, _ = small_demo_run
    a, b = layer_hashes(first / "altigrade.gpkg"), layer_hashes(second_run / "altigrade.gpkg")
    assert set(a) >= {"stations", "rejected_stations"}
    assert a == b


def test_station_csv_identical(small_demo_run, second_run) -> None:
    first, _ = small_demo_run
    assert (first / "stations.csv").read_bytes() == (second_run / "stations.csv").read_bytes()


def test_every_html_identical_but_for_the_generated_note(small_demo_run, second_run) -> None:
    first, _ = small_demo_run
    pages = sorted(p.name for p in first.glob("[!.]*.html"))
    assert "map.html" in pages
    assert pages == sorted(p.name for p in second_run.glob("[!.]*.html"))
    for name in pages:
        a = (first / name).read_text(encoding="utf-8")
        b = (second_run / name).read_text(encoding="utf-8")
        if a == b:
            continue
        diff = html_differences(a, b)
        assert diff and all(GENERATED_NOTE_MARK in ln for ln in diff), (name, diff[:6])


def test_html_does_not_name_the_output_folder(small_demo_run, second_run) -> None:
    # A page that embedded its own folder would differ between equal runs.
    for out in (small_demo_run[0], second_run):
        for p in out.glob("*.html"):
            assert str(out) not in p.read_text(encoding="utf-8"), p


def test_manifest_keys_inputs_and_counts_identical(small_demo_run, second_run) -> None:
    first, _ = small_demo_run
    assert output_digest(first)["manifest"] == output_digest(second_run)["manifest"]


def test_rerun_reusing_stages_equals_clean_run(small_demo_run, second_run, demo_cache) -> None:
    """A second run into the same folder reuses every cached stage and writes the same."""
    before = output_digest(second_run)
    proc = run_cli("demo", *SMALL_DEMO, "--out", str(second_run), "--cache-dir", str(demo_cache))
    assert proc.returncode == 0, proc.stderr
    m = json.loads((second_run / "manifest.json").read_text(encoding="utf-8"))
    assert "ingest" in m["stages_reused"]
    assert output_digest(second_run) == before


def test_layer_hash_sees_a_changed_value(small_demo_run, tmp_path) -> None:
    """The comparison is not vacuous: one changed attribute changes the layer hash."""
    first, _ = small_demo_run
    st = pyogrio.read_dataframe(first / "altigrade.gpkg", layer="stations")
    p = tmp_path / "x.gpkg"
    pyogrio.write_dataframe(st, p, layer="stations")
    h0 = layer_hashes(p)["stations"]
    st.loc[0, "elevation_m"] = st.loc[0, "elevation_m"] + 0.01
    pyogrio.write_dataframe(st, p, layer="stations")
    assert layer_hashes(p)["stations"] != h0
