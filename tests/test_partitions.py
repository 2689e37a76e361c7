"""Partitions fixed by the data (pipeline.partitions).

Plain behaviour checks: every row in exactly one partition, sizes, rows without coordinates
last, and the Z-order of a 2 × 2 grid (Morton 1966: x bits in the even places, y in the odd).
"""

from __future__ import annotations

import numpy as np

from pipeline.partitions import morton_key, partition_slices, spatial_partitions


def test_slices_cover_the_range_once():
    assert partition_slices(0, 4) == []
    assert partition_slices(10, 4) == [slice(0, 4), slice(4, 8), slice(8, 10)]


def test_morton_key_of_a_two_by_two_grid_is_the_z_order():
    xy = np.array([[0.0, 0.0], [1.0, 0.0], [0.0, 1.0], [1.0, 1.0]])
    assert np.argsort(morton_key(xy)).tolist() == [0, 1, 2, 3]


def test_spatial_partitions_cover_every_row_once_with_unplaced_rows_last():
    rng = np.random.default_rng(1)
    xy = rng.uniform(0, 100, (103, 2))
    xy[[5, 50], 0] = np.nan
    parts = spatial_partitions(xy, 10)
    assert [len(p) for p in parts] == [10] * 10 + [3]
    assert sorted(np.concatenate(parts).tolist()) == list(range(103))
    assert all((np.diff(p) > 0).all() for p in parts)  # rows ascending within a partition
    assert {5, 50} <= set(parts[-1].tolist())


def test_spatial_partitions_keep_neighbours_together():
    # two clusters far apart: a partition never mixes them
    xy = np.r_[np.full((8, 2), 1.0), np.full((8, 2), 1000.0)] + np.arange(16)[:, None] * 1e-3
    parts = spatial_partitions(xy, 8)
    assert [sorted(p.tolist()) for p in parts] == [list(range(8)), list(range(8, 16))]


def test_no_rows_give_one_empty_partition():
    parts = spatial_partitions(np.zeros((0, 2)), 5)
    assert len(parts) == 1 and parts[0].size == 0
