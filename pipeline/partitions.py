"""Partitions of work that depend on the data alone: consecutive slices, and a space-filling
curve that puts nearby points next to each other.

A pure calculation module. Stages cut their work with these before handing it to an executor
(:mod:`pipeline.execution`), so the pieces — and the order their results are combined in —
are the same in every execution mode.

References
----------
Morton, G. M. (1966), "A computer oriented geodetic data base and a new technique in file
sequencing", IBM Technical Report (Z-order; from memory).
"""

from __future__ import annotations

import numpy as np

__all__ = ["morton_key", "partition_slices", "spatial_partitions"]


def partition_slices(n: int, size: int) -> list[slice]:
    """Consecutive slices of at most ``size`` items covering ``range(n)`` (none when n = 0)."""
    size = max(1, int(size))
    return [slice(i, min(n, i + size)) for i in range(0, n, size)]


def morton_key(xy: np.ndarray) -> np.ndarray:
    """Z-order (Morton) key of points on a 65,536² grid over their bounding box: nearby
    points get nearby keys, so consecutive sources form compact partitions."""
    xy = np.asarray(xy, dtype=float).reshape(-1, 2)
    if xy.shape[0] == 0:
        return np.zeros(0, dtype=np.uint64)
    lo = xy.min(axis=0)
    span = np.maximum(xy.max(axis=0) - lo, 1e-9)
    q = np.clip(((xy - lo) / span * 65535.0).astype(np.uint64), 0, 65535)

    def spread(v: np.ndarray) -> np.ndarray:
        v = (v | (v << np.uint64(8))) & np.uint64(0x00FF00FF)
        v = (v | (v << np.uint64(4))) & np.uint64(0x0F0F0F0F)
        v = (v | (v << np.uint64(2))) & np.uint64(0x33333333)
        return (v | (v << np.uint64(1))) & np.uint64(0x55555555)

    return spread(q[:, 0]) | (spread(q[:, 1]) << np.uint64(1))


def spatial_partitions(xy: np.ndarray, size: int) -> list[np.ndarray]:
    """Row numbers of ``xy`` in partitions of at most ``size`` rows along a Morton curve (rows
    with a non-finite coordinate come last); each partition's rows ascending. One empty
    partition when there are no rows."""
    xy = np.asarray(xy, dtype=float).reshape(-1, 2)
    n = xy.shape[0]
    ok = np.isfinite(xy).all(axis=1)
    key = np.full(n, np.iinfo(np.uint64).max, dtype=np.uint64)
    key[ok] = morton_key(xy[ok])
    order = np.argsort(key, kind="stable")
    return [np.sort(order[sl]) for sl in partition_slices(n, size)] or [np.zeros(0, np.int64)]
