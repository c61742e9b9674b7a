"""The ``impactline`` command.

Exit codes: 0 success; 1 some input files failed (the others completed); 2 invalid pipeline, arguments or
plugin; 3 nothing to do (no input file matched).
"""

from __future__ import annotations

import argparse
import importlib
import os
import sys
import time
from collections.abc import Sequence
from pathlib import Path

import numpy as np

from . import __version__
from .errors import ImpactlineError, PipelineError
from .units import format_quantity

EXIT_OK, EXIT_FILES_FAILED, EXIT_USAGE, EXIT_NOTHING = 0, 1, 2, 3

#: Modules that add their own sub-commands through ``register_cli(subparsers)``.
_TOOL_MODULES = ("impactline.simulate", "impactline.noise", "impactline.compare", "impactline.shapes_cli")


# ------------------------------------------------------------------------------------------------ progress
class Progress:
    """Progress on stderr: an updating bar on a terminal, one line per file otherwise."""

    def __init__(self, total_files: int, stream=None, quiet: bool = False):
        self.total = total_files
        self.stream = stream or sys.stderr
        self.tty = hasattr(self.stream, "isatty") and self.stream.isatty()
        self.quiet = quiet
        self.started = time.perf_counter()
        self.current = ""
        self._last = 0.0

    def file_done(self, result, done: int, total: int) -> None:
        if self.quiet:
            return
        row = result.row
        status = row["status"]
        detail = f"{row.get('n_events')} events" if status != "failed" else str(row.get("error", "")).splitlines()[0]
        line = f"[{done}/{total}] {status:7s} {Path(row['file']).name}: {detail}"
        if self.tty:
            self.stream.write("\r\033[K" + line + "\n")
        else:
            self.stream.write(line + "\n")
        self.stream.flush()

    def samples(self, done: int, total: int | None) -> None:
        if self.quiet or not self.tty:
            return
        now = time.perf_counter()
        if now - self._last < 0.2:
            return
        self._last = now
        if total:
            fraction = min(done / total, 1.0)
            bar = "#" * int(30 * fraction)
            self.stream.write(f"\r  [{bar:30s}] {100 * fraction:5.1f}%  {done / max(now - self.started, 1e-9):.3g}"
                              " samples/s")
        else:
            self.stream.write(f"\r  {done} samples")
        self.stream.flush()


# ------------------------------------------------------------------------------------------------ commands
def _cmd_run(args: argparse.Namespace) -> int:
    from .pipeline import load_pipeline
    from .runner import expand_inputs, reader_extensions, run

    pipeline = load_pipeline(args.pipeline)
    paths = expand_inputs(args.inputs, reader_extensions(pipeline))
    if not paths:
        print(f"impactline: no input file matches {' '.join(args.inputs)}", file=sys.stderr)
        return EXIT_NOTHING
    progress = Progress(len(paths), quiet=args.quiet)
    started = time.perf_counter()
    result = run(pipeline, paths, args.out, jobs=args.jobs, resume=not args.no_resume, overwrite=args.overwrite,
                 command=sys.argv, on_file=progress.file_done, on_progress=progress.samples)
    print(summarize_run(result, pipeline.name, time.perf_counter() - started))
    return EXIT_FILES_FAILED if result.n_failed else EXIT_OK


def summarize_run(result, name: str, seconds: float) -> str:
    """A short, readable end-of-run summary computed from the run's tables."""
    files = result.files.to_pylist()
    ok = sum(f["status"] == "ok" for f in files)
    skipped = sum(f["status"] == "skipped" for f in files)
    failed = [f for f in files if f["status"] == "failed"]
    n_events = result.events.num_rows
    duration = sum(f["duration_s"] or 0.0 for f in files if f["status"] != "failed")
    samples = sum(f["n_samples"] or 0 for f in files if f["status"] == "ok")
    lines = [f"pipeline {name} ({result.pipeline_hash[:12]})",
             f"files: {ok} ok, {skipped} skipped (already done), {len(failed)} failed",
             f"recorded time: {format_quantity(duration, 's')}; events: {n_events}"]
    if duration > 0:
        lines.append(f"event rate: {n_events / duration:.4g} per s")
    if n_events:
        charge = np.abs(result.events.column("charge_C").to_numpy(zero_copy_only=False))
        peak = np.abs(result.events.column("peak_A").to_numpy(zero_copy_only=False))
        lines.append(f"median |charge|: {format_quantity(float(np.median(charge)), 'C')}; "
                     f"median |peak|: {format_quantity(float(np.median(peak)), 'A')}")
        if "diameter_m" in result.events.column_names:
            diameters = np.asarray(result.events.column("diameter_m").to_numpy(zero_copy_only=False), dtype=float)
            diameters = diameters[np.isfinite(diameters)]
            if diameters.size:
                q25, q50, q75 = np.percentile(diameters, [25, 50, 75])
                lines.append(f"median diameter: {format_quantity(q50, 'm')} (IQR {format_quantity(q25, 'm')} - "
                             f"{format_quantity(q75, 'm')}, {diameters.size} anodic events)")
    if samples and seconds > 0:
        lines.append(f"time: {seconds:.2f} s ({samples / seconds:.3g} samples/s)")
    for f in failed:
        lines.append(f"FAILED {f['file']}: {f['error']}")
    if result.out_dir is not None:
        lines.append(f"results: {result.out_dir}")
    return "\n".join(lines)


def _cmd_check(args: argparse.Namespace) -> int:
    from .pipeline import load_pipeline

    pipeline = load_pipeline(args.pipeline)
    print(f"{args.pipeline}: valid (hash {pipeline.hash[:12]})")
    print(f"  reader:   {pipeline.reader_spec.name}")
    for spec in pipeline.filter_specs:
        print(f"  filter:   {spec.name} {_format_params(spec.params)}")
    print(f"  detector: {pipeline.detector_spec.name} {_format_params(pipeline.detector_spec.params)}")
    for spec in pipeline.measure_specs:
        print(f"  measure:  {spec.name} {_format_params(spec.params)}")
    if pipeline.classifier_spec:
        print(f"  classifier: {pipeline.classifier_spec.name} {_format_params(pipeline.classifier_spec.params)}")
    if pipeline.sizing:
        material = pipeline.material()
        print(f"  sizing:   {material.name} (n = {material.electrons:g})")
    if pipeline.collision_rate:
        rate = pipeline.collision_rate
        print(f"  collision rate: disc radius {format_quantity(rate['electrode_radius'], 'm')}, "
              f"{format_quantity(rate['concentration'] * 1e-3, 'M')} particles, {rate['temperature']:g} K")
    return EXIT_OK


def _format_params(params: dict) -> str:
    return " ".join(f"{k}={v}" for k, v in params.items())


def _cmd_plugins(args: argparse.Namespace) -> int:
    from .registry import default_registry
    from .stages import KINDS

    registry = default_registry()
    kinds = [args.kind] if args.kind else list(KINDS)
    for kind in kinds:
        entries = registry.stages(kind)
        print(f"{kind} ({len(entries)})")
        for entry in entries:
            print(f"  {entry.name:16s} {entry.cls.summary}  [{entry.plugin} {entry.plugin_version}]")
            if args.brief:
                continue
            for key, param in entry.cls.params.items():
                default = "(not set)" if param.default is None else param.default
                unit = f" {param.unit}" if param.unit and param.default is not None else ""
                print(f"      {key:18s} = {default}{unit}  ({param.describe_allowed()}) {param.doc}")
            for key, column in getattr(entry.cls, "columns", {}).items():
                unit = f" [{column.unit}]" if column.unit else ""
                print(f"      -> {key}{unit}: {column.doc}")
    return EXIT_OK


def _cmd_demo(args: argparse.Namespace) -> int:
    from impactline_pipelines import pipeline_path

    from .pipeline import load_pipeline
    from .runner import run
    from .simulate import copper_ink_demo_specs, simulate

    out = Path(args.out)
    recordings = out / "recordings"
    recordings.mkdir(parents=True, exist_ok=True)
    print(f"Copper-ink batch check: simulating recordings in {recordings}")
    written = [simulate(spec, recordings / f"{name}.bin").data_path
               for name, spec in copper_ink_demo_specs().items()]
    pipeline = load_pipeline(pipeline_path("default"))
    progress = Progress(len(written), quiet=args.quiet)
    started = time.perf_counter()
    result = run(pipeline, sorted(written), out / "run", jobs=args.jobs, overwrite=True,
                 resume=False, command=sys.argv, on_file=progress.file_done, on_progress=progress.samples)
    print(summarize_run(result, pipeline.name, time.perf_counter() - started))
    print(_demo_truth_table(result, recordings))
    return EXIT_FILES_FAILED if result.n_failed else EXIT_OK


def _demo_truth_table(result, recordings: Path) -> str:
    """Set found events beside the simulator's ground truth, batch by batch."""
    import pyarrow.parquet as pq

    lines = ["batch            true events  found  true median d   found median d   rate/predicted"]
    for row in result.files.to_pylist():
        truth_path = recordings / (Path(row["file"]).stem + ".truth.parquet")
        if not truth_path.exists() or row["status"] == "failed":
            continue
        truth = pq.read_table(truth_path)
        true_d = np.asarray(truth.column("diameter_m").to_numpy(zero_copy_only=False), dtype=float)
        found_d = row.get("median_diameter_m")
        lines.append(f"{Path(row['file']).stem:16s} {truth.num_rows:11d}  {row['n_events']:5d}   "
                     f"{format_quantity(float(np.median(true_d)), 'm'):>12s}   "
                     f"{format_quantity(found_d, 'm') if found_d is not None else 'n/a':>12s}   "
                     f"{_ratio_text(row.get('rate_ratio'))}")
    return "\n".join(lines)


def _ratio_text(ratio) -> str:
    return f"{ratio:14.2f}" if ratio is not None and np.isfinite(ratio) else f"{'n/a':>14s}"


# ------------------------------------------------------------------------------------------------ parser
def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="impactline",
        description="Turn long current recordings of particle collisions into a verified catalogue of events.")
    parser.add_argument("--version", action="version", version=f"impactline {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")

    p = sub.add_parser("run", help="run a pipeline file over recordings")
    p.add_argument("pipeline", help="pipeline file (TOML)")
    p.add_argument("inputs", nargs="+", metavar="INPUT", help="recordings, folders or glob patterns")
    p.add_argument("--out", required=True, help="run folder for the results")
    p.add_argument("--jobs", type=int, default=1, help="worker processes (default 1)")
    p.add_argument("--no-resume", action="store_true", help="process every file again")
    p.add_argument("--overwrite", action="store_true", help="replace a run folder made by another pipeline")
    p.add_argument("--quiet", action="store_true", help="no progress output")
    p.set_defaults(func=_cmd_run)

    p = sub.add_parser("check", help="validate a pipeline file without running it")
    p.add_argument("pipeline")
    p.set_defaults(func=_cmd_check)

    p = sub.add_parser("plugins", help="list installed stages and their parameters")
    p.add_argument("kind", nargs="?", choices=["reader", "filter", "detector", "measure", "classifier"])
    p.add_argument("--brief", action="store_true", help="names and summaries only")
    p.set_defaults(func=_cmd_plugins)

    p = sub.add_parser("demo", help="simulate copper-ink recordings and run the default pipeline on them")
    p.add_argument("--out", default="impactline-demo", help="folder for recordings and results")
    p.add_argument("--jobs", type=int, default=2, help="worker processes (default 2)")
    p.add_argument("--quiet", action="store_true")
    p.set_defaults(func=_cmd_demo)

    for module_name in _TOOL_MODULES:
        importlib.import_module(module_name).register_cli(sub)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``impactline`` command; returns the exit code."""
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "func", None):
        parser.print_help()
        return EXIT_USAGE
    try:
        return int(args.func(args) or 0)
    except PipelineError as exc:
        print("impactline: invalid pipeline:", file=sys.stderr)
        for problem in exc.problems:
            print(f"  {problem}", file=sys.stderr)
        return EXIT_USAGE
    except ImpactlineError as exc:
        print(f"impactline: {exc}", file=sys.stderr)
        return EXIT_USAGE
    except BrokenPipeError:  # output piped into `head` and the like: not an error
        sys.stdout = open(os.devnull, "w")  # noqa: SIM115 - keep Python from complaining at exit
        return EXIT_OK
    except KeyboardInterrupt:
        print("impactline: interrupted; finished files are kept, run again to resume", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
