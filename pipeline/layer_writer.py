"""Write the GeoPackage's layers in a process of its own, beside the documents being drawn.

Where stages overlap ``publish`` writes the GeoPackage while the maps and report are drawn.
Where they are drawn on the run's own threads (``threads`` mode off Linux; elsewhere they
are drawn in forked children or on the cluster, and the run's process writes the GeoPackage
itself) it is written here. GDAL's writers, feature by feature or in Arrow batches, hold the
interpreter lock for most of their time (measured: a pure-Python loop run beside the state
scenario's corridor layer being written waited as long as the write), so on a thread they
only take turns with the documents. Here the layers, already in the output CRS, are handed
to a child interpreter as Arrow IPC files (``GeoDataFrame.to_feather``: columns and
geometries as they are, WKB geometries, the CRS as PROJJSON); the child reads them back and
writes them with :func:`pipeline.io.write_gpkg_layer`, the same call the run's own process
makes in ``local`` mode, so the GeoPackage is the same (checked by the tests that compare the
modes' outputs).

A layer set Arrow cannot hold (a column of mixed Python objects, say) is written in this
process instead. The child dies with the run's process (``PR_SET_PDEATHSIG`` on Linux): a
killed run leaves at most the temporary file, as it would without the child.

Run as ``python -m pipeline.layer_writer JOB.json``; exit status 2 with one line on stderr is
an :class:`pipeline.errors.OutputError` of the child, reraised here.
"""

from __future__ import annotations

import ctypes
import json
import os
import signal
import subprocess
import sys
import tempfile
from pathlib import Path

import geopandas as gpd

from pipeline.errors import OutputError

__all__ = ["write_gpkg_layers_in_child", "main"]

#: prctl option of Linux (linux/prctl.h): the signal a process gets when its parent ends.
_PR_SET_PDEATHSIG = 1


def write_gpkg_layers_in_child(
    path: Path, layers: dict[str, gpd.GeoDataFrame], crs, *, final: Path
) -> bool:
    """:func:`pipeline.io.write_gpkg_layers_into` with the writing done by a child process.

    Returns True when the child wrote the layers, False when they were written in this
    process (a layer Arrow cannot hold).

    Raises
    ------
    ConfigError
        ``crs`` is not a CRS pyproj knows.
    OutputError
        The file cannot be written (folder, permissions, disk full).
    """
    from pipeline import io

    prepared = io.layers_in_crs(layers, crs)
    with tempfile.TemporaryDirectory(prefix="altigrade-layers-") as scratch:
        files: dict[str, str] = {}
        try:
            for i, (name, g) in enumerate(prepared.items()):
                f = Path(scratch) / f"layer-{i}.arrow"
                g.to_feather(f, compression="uncompressed")
                files[name] = str(f)
        except (ValueError, TypeError, NotImplementedError, OSError):
            # a column Arrow cannot hold (pyarrow's errors derive from these), or no room
            # for the scratch files: write in this process instead
            for name, g in prepared.items():
                io.write_gpkg_layer(path, name, g, final=final)
            return False
        job = Path(scratch) / "job.json"
        job.write_text(
            json.dumps(
                {"path": str(path), "final": str(final), "layers": files, "parent": os.getpid()}
            ),
            encoding="utf-8",
        )
        env = dict(os.environ)
        root = str(Path(__file__).resolve().parent.parent)
        env["PYTHONPATH"] = os.pathsep.join(p for p in (root, env.get("PYTHONPATH")) if p)
        proc = subprocess.run(
            [sys.executable, "-m", "pipeline.layer_writer", str(job)],
            capture_output=True,
            text=True,
            env=env,
            check=False,
        )
    if proc.returncode == 2 and proc.stderr.strip():
        raise OutputError(proc.stderr.strip().splitlines()[-1])
    if proc.returncode != 0:
        tail = " ".join(proc.stderr.strip().splitlines()[-3:])
        raise RuntimeError(f"the GeoPackage writer process failed (exit {proc.returncode}): {tail}")
    return True


def _die_with_parent(parent: int) -> bool:
    """Ask Linux to kill this process when its parent ends; False if the parent already has."""
    if sys.platform.startswith("linux"):
        try:
            ctypes.CDLL("libc.so.6").prctl(_PR_SET_PDEATHSIG, int(signal.SIGKILL), 0, 0, 0)
        except (OSError, AttributeError):
            pass
    return os.getppid() == parent


def main(argv: list[str] | None = None) -> int:
    args = sys.argv[1:] if argv is None else argv
    job = json.loads(Path(args[0]).read_text(encoding="utf-8"))
    if not _die_with_parent(int(job["parent"])):
        return 1
    from pipeline import io

    final = Path(job["final"])
    try:
        for name, f in job["layers"].items():
            io.write_gpkg_layer(Path(job["path"]), name, gpd.read_feather(f), final=final)
    except OutputError as exc:
        print(str(exc), file=sys.stderr)
        return 2
    return 0


if __name__ == "__main__":
    sys.exit(main())
