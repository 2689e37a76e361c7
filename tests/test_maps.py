"""What each audience map shows at scale (pipeline.maps), and how the maps and the corridors
stage read large vector inputs (pipeline.io).

Plain behaviour checks on invented lines: which rows a thinned layer keeps, and that its label
says so.
"""

from __future__ import annotations

import geopandas as gpd
import numpy as np
import pandas as pd
import pytest
from shapely.geometry import LineString

from pipeline.errors import InputFileError
from pipeline.io import read_vector, read_vector_top
from pipeline.maps import busiest, corridor_layer, road_layer


def lines(values: dict[str, list[float]]) -> gpd.GeoDataFrame:
    n = len(next(iter(values.values())))
    geoms = [LineString([(i, 0), (i, 1)]) for i in range(n)]
    return gpd.GeoDataFrame(values, geometry=geoms, crs="EPSG:32608")


def test_busiest_keeps_the_largest_rows_in_input_order():
    g = lines({"aadt": [5.0, np.nan, 900.0, 40.0, 900.0, 7.0]})
    kept, total = busiest(g, 3, ("aadt",))
    assert total == 6
    assert kept.index.tolist() == [2, 3, 4]  # 900, 40, 900 — in input order


def test_busiest_breaks_ties_by_the_next_column_then_input_order():
    g = lines({"risk": [0.0, 0.0, 3.0, 0.0], "flow": [10.0, 30.0, 1.0, 30.0]})
    kept, _ = busiest(g, 2, ("risk", "flow"))
    assert kept.index.tolist() == [1, 2]  # risk 3 first, then the first of the flow-30 tie


def test_a_layer_within_budget_is_untouched_and_unlabelled():
    g = lines({"aadt": [1.0, 2.0]})
    kept, total = busiest(g, 10, ("aadt",))
    assert kept is g and total == 2
    assert road_layer(kept, total).name == "Roads"


def test_thinned_layers_say_how_many_they_show():
    g = lines({"aadt": np.arange(50.0)})
    kept, total = busiest(g, 20, ("aadt",))
    assert road_layer(kept, total).name == "Roads (busiest 20 of 50)"
    c = lines({"risk_l_aki_per_month": np.arange(30.0), "flow_l_per_month": np.ones(30)})
    kc, tc = busiest(c, 10, ("risk_l_aki_per_month", "flow_l_per_month"))
    assert corridor_layer(kc, tc).name == "Corridors (riskiest 10 of 30)"
    assert kc["risk_l_aki_per_month"].min() == 20.0


@pytest.mark.parametrize("driver,suffix", [("GPKG", ".gpkg"), ("ESRI Shapefile", ".shp")])
@pytest.mark.parametrize("budget", [1, 7, 40, 100])
def test_reading_only_the_busiest_rows_matches_thinning_the_whole_file(
    tmp_path, driver, suffix, budget
):
    # the file read back by GDAL is the reference: same rows, same order, same attributes
    rng = np.random.default_rng(5)
    aadt = rng.choice([np.nan, 10.0, 250.0, 4000.0], size=60)  # many ties and gaps
    g = lines({"aadt": aadt, "road_class": [f"c{i % 4}" for i in range(60)]})
    path = tmp_path / f"roads{suffix}"
    g.to_file(path, driver=driver)
    expect, total = busiest(read_vector(path, what="roads"), budget, ("aadt",))
    got, got_total = read_vector_top(path, what="roads", budget=budget, by=("aadt",))
    assert got_total == total == 60
    assert got.crs == expect.crs
    pd.testing.assert_frame_equal(
        pd.DataFrame(got.drop(columns="geometry")),
        pd.DataFrame(expect.drop(columns="geometry")).reset_index(drop=True),
    )
    assert got.geometry.geom_equals_exact(expect.geometry.reset_index(drop=True), tolerance=0).all()


@pytest.mark.parametrize("arrow_fails", [False, True])
def test_the_ranking_columns_are_read_by_arrow_or_the_usual_way_alike(
    tmp_path, monkeypatch, arrow_fails
):
    """Integer ranks with ties: the rows kept are those of thinning the layer read back by
    GDAL, whether the ranking column comes through GDAL's Arrow stream or, where that read
    fails, the usual way."""
    import pipeline.io as io_mod

    g = lines({"aadt": np.r_[np.arange(15), np.arange(15)], "road_class": ["x"] * 30})
    path = tmp_path / "r.gpkg"
    g.to_file(path)
    plain = io_mod._read_frame
    arrow_calls = []

    def probe(path, layer, what, **kw):
        if kw.get("use_arrow"):
            arrow_calls.append(kw)
            if arrow_fails:
                raise InputFileError(f"{path}: cannot read the {what} (no Arrow stream)")
        return plain(path, layer, what, **kw)

    monkeypatch.setattr(io_mod, "_read_frame", probe)
    got, total = read_vector_top(path, what="roads", budget=9, by=("aadt",))
    want, _ = busiest(read_vector(path, what="roads"), 9, ("aadt",))
    assert total == 30 and len(arrow_calls) == 1
    assert got["aadt"].tolist() == want["aadt"].tolist()
    assert got.geometry.geom_equals_exact(want.geometry.reset_index(drop=True), 0).all()


def test_reading_the_busiest_rows_without_the_ranking_column_keeps_the_first(tmp_path):
    g = lines({"road_class": [f"c{i}" for i in range(9)]})
    g.to_file(tmp_path / "r.gpkg")
    got, total = read_vector_top(tmp_path / "r.gpkg", what="roads", budget=4, by=("aadt",))
    assert total == 9 and got["road_class"].tolist() == ["c0", "c1", "c2", "c3"]


def test_arrow_read_equals_a_plain_read_and_falls_back_on_a_bad_file(tmp_path):
    # reference: the layer read back by GDAL the usual way (pyogrio, no Arrow)
    g = lines({"aadt": np.arange(30.0), "road_class": [f"c{i % 3}" for i in range(30)]})
    path = tmp_path / "roads.gpkg"
    g.to_file(path)
    got = read_vector(path, what="roads", arrow=True)
    want = read_vector(path, what="roads")
    pd.testing.assert_frame_equal(
        pd.DataFrame(got.drop(columns="geometry")), pd.DataFrame(want.drop(columns="geometry"))
    )
    assert got.geometry.geom_equals_exact(want.geometry, tolerance=0).all()
    assert got.crs == want.crs
    bad = tmp_path / "bad.gpkg"
    bad.write_bytes(b"not a geopackage")
    with pytest.raises(InputFileError, match="bad.gpkg"):
        read_vector(bad, what="roads", arrow=True)


def test_reading_the_busiest_rows_without_reads_by_id_falls_back(tmp_path, monkeypatch):
    """A driver that cannot read by feature id: the whole layer is read, the same rows kept
    (reference: thinning the layer read back by GDAL)."""
    import pipeline.io as io_mod

    g = lines({"aadt": np.r_[np.arange(20.0), np.arange(20.0)]})
    path = tmp_path / "r.gpkg"
    g.to_file(path)
    plain = io_mod._read_frame

    def no_fids(path, layer, what, **kw):
        if "fids" in kw:
            raise InputFileError(f"{path}: cannot read the {what} (no random reads)")
        return plain(path, layer, what, **kw)

    monkeypatch.setattr(io_mod, "_read_frame", no_fids)
    got, total = read_vector_top(path, what="roads", budget=7, by=("aadt",))
    want, _ = busiest(read_vector(path, what="roads"), 7, ("aadt",))
    assert total == 40
    assert got["aadt"].tolist() == want["aadt"].tolist()
    assert got.geometry.geom_equals_exact(want.geometry.reset_index(drop=True), 0).all()
