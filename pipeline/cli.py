"""Command line: ``altigrade demo | run | validate | compare``.

Exit status: 0 success; 2 bad input or configuration (one clear message, no traceback);
1 internal error.
"""

from __future__ import annotations

import argparse
import gc
import os
import sys
from collections.abc import Sequence
from pathlib import Path

from pipeline import __version__
from pipeline.cautions import CAUTION_LINE as CAUTION
from pipeline.errors import AltigradeError

__all__ = ["main", "command", "build_parser", "small_pages_for_numpy"]


EPILOG = f"""Exit status: 0 done, 2 bad input or configuration, 1 internal error.

{CAUTION}"""


def _repo_config(name: str) -> Path:
    """The shipped config ``config/<name>`` next to the package (editable install / checkout)."""
    return Path(__file__).resolve().parent.parent / "config" / name


def default_cache_dir() -> Path:
    env = os.environ.get("ALTIGRADE_CACHE_DIR")
    if env:
        return Path(env)
    base = os.environ.get("XDG_CACHE_HOME") or str(Path.home() / ".cache")
    return Path(base) / "altigrade"


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="altigrade",
        description="Station elevation, barometric pressure, justified minimum gasoline AKI, "
        "compliance and maps for mountain regions.",
        epilog=EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("--version", action="version", version=f"altigrade {__version__}")
    p.add_argument(
        "--run-date",
        metavar="YYYY-MM-DD",
        default=None,
        help="evaluate as of this date (days since inspection, future-date checks); "
        "default $ALTIGRADE_RUN_DATE or today",
    )
    verbosity = p.add_mutually_exclusive_group()
    verbosity.add_argument("-q", "--quiet", action="store_true", help="print only errors")
    verbosity.add_argument(
        "-v", "--verbose", action="store_true", help="print each stage's details"
    )
    sub = p.add_subparsers(dest="command", metavar="COMMAND")

    d = sub.add_parser(
        "demo",
        help="build the invented demo region (if absent) and run it",
        description="Build the invented demo region's inputs into a cache folder "
        "(once) and run the whole pipeline on them.",
        epilog=EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    d.add_argument(
        "--out",
        type=Path,
        default=Path("outputs/demo"),
        help="output folder (default: outputs/demo)",
    )
    d.add_argument(
        "--cells", type=int, default=2000, help="DEM size in cells per side (default 2000, ≈90 m)"
    )
    d.add_argument(
        "--stations", type=int, default=200, help="number of demo stations (default 200)"
    )
    d.add_argument(
        "--cache-dir",
        type=Path,
        default=None,
        help="where demo inputs are kept (default: $ALTIGRADE_CACHE_DIR or ~/.cache/altigrade)",
    )
    d.add_argument(
        "--config", type=Path, default=None, help="demo config (default: config/demo.toml)"
    )

    r = sub.add_parser(
        "run",
        help="run the pipeline on a config file",
        epilog=EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    r.add_argument("config", type=Path, help="run config (TOML)")
    r.add_argument(
        "--out", type=Path, default=None, help="output folder (default: outputs/<run name>)"
    )

    c = sub.add_parser(
        "compare",
        help="what changes between two finished runs (verdicts, plan, cost)",
        description="Compare two run folders, e.g. today's rule against a proposed one, or "
        "today's fleet against a shifted one: verdict changes, plan and cost deltas, and a map "
        "of the stations that change.",
        epilog=EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    c.add_argument("run_a", type=Path, help="first run folder (the baseline)")
    c.add_argument("run_b", type=Path, help="second run folder")
    c.add_argument(
        "--out", type=Path, default=None, help="output folder (default: outputs/compare-<A>-vs-<B>)"
    )

    v = sub.add_parser(
        "validate",
        help="check a config and every input it names; run nothing",
        epilog=EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    v.add_argument("config", type=Path, help="run config (TOML)")
    return p


class _Console:
    def __init__(self, quiet: bool, verbose: bool):
        from rich.console import Console

        self.quiet, self.verbose = quiet, verbose
        self.out = Console(stderr=False, highlight=False)
        self.err = Console(stderr=True, highlight=False)

    def info(self, msg: str) -> None:
        if not self.quiet:
            self.out.print(msg, markup=False)

    def detail(self, msg: str) -> None:
        if self.verbose:
            self.out.print(msg, markup=False)

    def error(self, msg: str) -> None:
        self.err.print(f"altigrade: error: {msg}", markup=False, soft_wrap=True)


def _progress_factory(con: _Console):
    """A rich progress display for long stages; silent when quiet or not a terminal."""
    if con.quiet or not con.out.is_terminal:
        return None, (lambda label, frac: None)
    from rich.progress import BarColumn, Progress, TextColumn, TimeElapsedColumn

    prog = Progress(
        TextColumn("{task.description:<14}"),
        BarColumn(),
        TimeElapsedColumn(),
        console=con.out,
        transient=True,
    )
    tasks: dict[str, int] = {}

    def update(label: str, frac: float) -> None:
        if label not in tasks:
            tasks[label] = prog.add_task(label, total=1.0)
        prog.update(tasks[label], completed=frac)

    return prog, update


def _summary(con: _Console, result) -> None:
    m = result.manifest
    c = m["counts"]
    con.info(
        f"station rows read {c.get('rows_in')}: {c.get('stations_out')} in layer stations, "
        f"{c.get('rejected_out')} in layer rejected_stations (each with its reason)"
    )
    for line in m.get("summary_lines", []):
        con.info(line)
    con.info(f"outputs in {result.out_dir}:")
    for f in m.get("outputs", []):
        con.info(f"  {f}")
    con.info(CAUTION)


def small_pages_for_numpy(environ: dict[str, str] | None = None) -> bool:
    """Ask NumPy not to request transparent huge pages for its large arrays, unless the user
    chose otherwise (``NUMPY_MADVISE_HUGEPAGE`` already set). Returns whether it was set here.

    NumPy reads ``NUMPY_MADVISE_HUGEPAGE`` once, when it is imported ("Global state", NumPy
    reference manual), so this only acts before the first import of NumPy in this process;
    the variable is inherited by worker processes started later (Dask workers). On Linux with
    the transparent huge page policy ``madvise`` and defragmentation on ``madvise``, every
    fresh large array is faulted in as a 2 MiB page that the kernel compacts memory to find:
    measured on the state benchmark scenario (2 cores, ``mode = "local"``), system time fell
    from 6.9 s to 2.1 s and the run from 30.5 s to 24.9 s with it set to 0. Results are the
    same either way; only where the pages come from changes.
    """
    env = os.environ if environ is None else environ
    if "numpy" in sys.modules or "NUMPY_MADVISE_HUGEPAGE" in env:
        return False
    env["NUMPY_MADVISE_HUGEPAGE"] = "0"
    return True


def main(argv: Sequence[str] | None = None) -> int:
    small_pages_for_numpy()
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return 2
    con = _Console(args.quiet, args.verbose)
    if args.run_date:
        os.environ["ALTIGRADE_RUN_DATE"] = args.run_date
    try:
        return _dispatch(args, con)
    except AltigradeError as exc:
        con.error(str(exc))
        return 2
    except KeyboardInterrupt:
        con.error("interrupted; previous outputs are left as they were")
        return 130
    except Exception as exc:  # internal error: say so plainly, keep the traceback for -v
        if args.verbose:
            import traceback

            traceback.print_exc()
        con.error(f"internal error ({type(exc).__name__}: {exc}); rerun with -v for details")
        return 1


def command() -> int:
    """The ``altigrade`` program (and ``python -m pipeline.cli``): :func:`main`, then the
    objects it made are left for the process's end to reclaim.

    When the command returns, every output is written, closed and renamed into place. What
    is left is the interpreter's shutdown, whose garbage collections would traverse every
    object the run still holds: about a second on the benchmark scenarios, on one core,
    after the work is done (measured on the national subset, 1.1-1.3 s of an 18 s run).
    ``gc.freeze`` moves them to the permanent generation, which those collections skip; the
    operating system takes the memory back when the process ends, as it would anyway. Exit
    handlers still run and files are still flushed. Only for the process's own command:
    :func:`main` called from Python code (tests, notebooks) leaves the collector alone.
    """
    code = main()
    gc.freeze()
    return code


def _dispatch(args, con: _Console) -> int:
    from pipeline.config import load_config
    from pipeline.stages import run, validate_inputs

    if args.command == "compare":
        return _compare(args, con)
    if args.command == "validate":
        cfg = load_config(args.config)
        report = validate_inputs(cfg)
        for line in report:
            con.info(line)
        con.info(f"{args.config}: configuration and inputs are usable")
        return 0
    prog, update = _progress_factory(con)
    if args.command == "demo":
        from pipeline.demo import build_demo_region

        cache = (args.cache_dir or default_cache_dir()) / f"demo-v2-{args.cells}c-{args.stations}s"
        if args.cells < 100 or args.stations < 10:
            con.error("--cells must be ≥ 100 and --stations ≥ 10")
            return 2
        if not (cache / "README.txt").exists():
            con.info(f"building the invented demo region in {cache} (once) ...")
            build_demo_region(cache, size_cells=args.cells, n_stations=args.stations)
        cfg_path = args.config or _repo_config("demo.toml")
        cfg = load_config(cfg_path, demo_dir=cache)
        out = args.out
    else:
        cfg = load_config(args.config)
        out = args.out or Path("outputs") / cfg.name
    if prog is not None:
        with prog:
            result = run(cfg, out, progress=update, log=con.detail)
    else:
        result = run(cfg, out, progress=update, log=con.detail)
    _summary(con, result)
    return 0


def _compare(args, con: _Console) -> int:
    from pipeline import io
    from pipeline.compare import compare_runs, comparison_report_html, read_run
    from pipeline.webmap import MapLayer, MapSpec, build_map_html

    a, b = read_run(args.run_a), read_run(args.run_b)
    cmp = compare_runs(a, b)
    out = args.out or Path("outputs") / f"compare-{args.run_a.name}-vs-{args.run_b.name}"
    out.mkdir(parents=True, exist_ok=True)
    io.write_gpkg_layers(out / "compare.gpkg", {"station_changes": cmp.stations}, "EPSG:4326")
    io.write_text_atomic(
        out / "station_changes.csv", cmp.stations.drop(columns="geometry").to_csv(index=False)
    )
    io.write_text_atomic(
        out / "compare.html", comparison_report_html(cmp, args.run_a.name, args.run_b.name)
    )
    from pipeline.cautions import CAUTIONS
    from pipeline.maps import VERDICT_STYLE

    changed = cmp.stations[cmp.stations["changed"] & cmp.stations.geometry.notna()]
    if len(changed):
        style = (
            VERDICT_STYLE.__class__(
                column="verdict_b", colors=VERDICT_STYLE.colors, labels=VERDICT_STYLE.labels
            )
            if "verdict_b" in changed
            else None
        )
        spec = MapSpec(
            title=f"Stations that change: {args.run_a.name} → {args.run_b.name}",
            subtitle="Colour: verdict in the second run; the popup says what changes",
            layers=[
                MapLayer(
                    name="Changed stations",
                    gdf=changed,
                    style=style,
                    popup_fields=(("station_id", "Station"), ("change", "What changes")),
                    tooltip_field="name",
                    searchable_fields=("station_id", "name"),
                )
            ],
            cautions=CAUTIONS,
        )
        io.write_text_atomic(out / "compare_map.html", build_map_html(spec))
    n = int(cmp.stations["changed"].sum())
    con.info(f"{n} of {len(cmp.stations)} stations change; see {out / 'compare.html'}")
    for _, r in cmp.totals.iterrows():
        con.info(
            f"  {r['quantity']}: {r['run_a']:,.1f} → {r['run_b']:,.1f} ({r['difference']:+,.1f})"
        )
    con.info(CAUTION)
    return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(command())
