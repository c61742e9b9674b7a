"""Comparison runs: several detectors (or whole stage chains) over the same recordings, each file read once.

Declaring variants
------------------
Either one comparison file (TOML) with a shared reader, shared filters and a list of variants::

    [comparison]
    name = "small-particles"          # free text, shown in summaries (default: the file name)
    chunk_samples = 1048576           # optional: samples per streaming chunk

    [plugins]
    local = ["labreader.py"]          # optional, as in a pipeline file

    [reader]                          # shared by every variant (a comparison reads each file once)
    use = "auto"

    [[filter]]                        # shared filters, applied first in every variant
    use = "bessel"
    cutoff = "25 kHz"

    [[measure]]                       # optional measures every variant runs
    use = "pulse-shape"

    [sizing]                          # optional, as in a pipeline file
    material = "Cu"

    [[variant]]
    name = "threshold-5"              # letters, digits, '.', '_', '-' (used as a file name)
    [variant.detector]
    use = "threshold"
    k_sigma = 5

    [[variant]]
    name = "cusum-10k"
    inherit_filters = true            # default true: the shared filters come first
    inherit_measures = true           # default true: the shared measures come first
    [[variant.filter]]                # this variant's own filters, after the shared ones
    use = "bessel"
    cutoff = "10 kHz"
    [variant.detector]
    use = "cusum"
    [[variant.measure]]               # this variant's own measures, after the shared ones
    use = "baseline-context"
    # [variant.classifier] and [variant.sizing] are allowed too (a variant's sizing replaces the shared one)

or several ordinary pipeline files, each a variant named after its file (``threshold.toml`` -> ``threshold``).
Both may be mixed: every ``.toml`` file holding ``[[variant]]`` tables is a comparison file, any other is a
pipeline file. Every variant must end up with the same reader settings. ``truth`` is reserved for ground truth.

Each variant is a complete pipeline of its own (``variants/NAME.toml`` in the comparison folder): running it
with ``impactline run`` gives the same events and the same pipeline hash.

Sharing work
------------
Each file is read once. The variants' filter chains form a tree: chains that start with the same stages
(same plugin, version and resolved parameters) share those stages, so each distinct filter prefix runs once
per file and its output fans out to the variants and longer chains below it. A stage that fails (or a
variant's detector that fails) fails only the variants below it; the others go on.

Matching events across variants
-------------------------------
Two variants' events of one file are matched one to one on interval overlap, at the resolution of one
sample (times ``start_s``/``end_s`` rounded to the sample grid). Only pairs that overlap (by at least one
sample, intervals half-open) may match; among all one-to-one matchings the one with the largest total
overlap is taken, ties broken by the smallest total onset difference. The overlap graph falls apart into
groups of intervals chained by overlaps (found by one sweep in time order); each group is solved exactly
with the Hungarian method (Kuhn 1955, "The Hungarian method for the assignment problem", Naval Research
Logistics Quarterly 2; here :func:`scipy.optimize.linear_sum_assignment`) on integer weights
``overlap * K - |onset difference|``, with ``K`` larger than any possible sum of onset differences in the
group, so the total overlap is maximised first and the tie-break never trades overlap away.

Ground truth is matched to each variant by the same rule (truth = side A, the variant = side B).

Public API
----------
Variant, Comparison                      declared variants; ``Comparison.filter_tree_summary()``
load_comparison, comparison_from_pipelines
compare_recording                        one file, read once, fanned out to every variant
compare, ComparisonResult                many files, the comparison folder, the tables
match_intervals, match_events, agreement_table
GroundTruth, load_truth, find_truth, score_against_truth
parse_sweep_values, sweep_comparison, sweep, SweepResult
format_comparison, format_sweep          the printed side-by-side tables
register_cli                             the ``compare`` and ``sweep`` sub-commands
"""

from __future__ import annotations

import argparse
import copy
import difflib
import hashlib
import json
import math
import os
import re
import shutil
import sys
import time
import tomllib
from collections.abc import Callable, Iterable, Mapping, Sequence
from concurrent.futures import ProcessPoolExecutor, as_completed
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa

from . import __version__
from .errors import ImpactlineError, InputError, PipelineError
from .output import file_fingerprint, schema_for, table_from_rows, write_json_atomic, write_table_atomic
from .params import Param, ParameterError, resolve_params
from .pipeline import DEFAULT_CHUNK_SAMPLES, Pipeline, parse_pipeline, stage_array
from .registry import PluginRegistry, default_registry
from .runner import (
    EventBranch,
    NoiseMeter,
    chain_figures,
    describe_error,
    events_schema,
    expand_inputs,
    package_versions,
    read_checked,
)
from .stages import Column
from .units import format_quantity

__all__ = [
    "TRUTH", "Variant", "VariantRecipe", "Comparison", "load_comparison", "comparison_from_pipelines",
    "RecordingComparison", "compare_recording", "ComparisonResult", "compare", "IntervalMatch",
    "match_intervals", "match_events", "agreement_table", "GroundTruth", "load_truth", "find_truth",
    "score_against_truth", "DEFAULT_SNR_EDGES", "parse_sweep_values", "sweep_comparison", "SweepResult", "sweep",
    "format_comparison", "format_sweep", "register_cli", "MATCH_COLUMNS", "AGREEMENT_COLUMNS", "SUMMARY_COLUMNS",
    "SCORE_COLUMNS", "SWEEP_COLUMNS", "COMPARE_FILE_COLUMNS",
]

#: Name under which ground truth appears in match tables (reserved: no variant may use it).
TRUTH = "truth"
#: Default SNR band edges for scores (bands [0, 3), [3, 5), ... [20, inf)).
DEFAULT_SNR_EDGES: tuple[float, ...] = (0.0, 3.0, 5.0, 8.0, 12.0, 20.0, math.inf)

EXIT_OK, EXIT_FILES_FAILED, EXIT_USAGE = 0, 1, 2

COMPARISON_JSON = "comparison.json"
SWEEP_JSON = "sweep.json"
_OUTPUT_FILES = (COMPARISON_JSON, SWEEP_JSON, "files.parquet", "matches.parquet", "agreement.parquet",
                 "summary.parquet", "scores.parquet", "sweep.parquet")
_OUTPUT_DIRS = ("events", "variants")

_NAME_RE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]{0,63}$")
_COMPARISON_TOP = ("comparison", "plugins", "reader", "filter", "measure", "sizing", "variant")
_VARIANT_KEYS = ("name", "description", "inherit_filters", "inherit_measures", "filter", "detector", "measure",
                 "classifier", "sizing")
_COMPARISON_KEYS = {
    "name": Param("", kind=str, doc="name shown in summaries"),
    "description": Param("", kind=str, doc="free text"),
    "chunk_samples": Param(DEFAULT_CHUNK_SAMPLES, kind=int, low=256, high=1 << 28, doc="samples per streaming chunk"),
}

# ------------------------------------------------------------------------------------------------ table schemas
COMPARE_FILE_COLUMNS: dict[str, Column] = {
    "file": Column("string", "", "input file path"),
    "variant": Column("string", "", "comparison variant"),
    "status": Column("string", "", "ok or failed (a failure may hit one variant only)"),
    "error": Column("string", "", "what went wrong"),
    "reader": Column("string", "", "reader used"),
    "fingerprint": Column("string", "", "content fingerprint of the input (and its sidecar)"),
    "sample_rate_hz": Column("float64", "Hz", "sampling rate"),
    "n_samples": Column("int64", "", "samples read"),
    "duration_s": Column("float64", "s", "recording length"),
    "noise_rms_A": Column("float64", "A", "robust rms noise of the variant's filtered signal"),
    "n_events": Column("int64", "", "events the variant found in the file"),
    "event_rate_per_s": Column("float64", "1/s", "n_events / duration_s"),
    "seconds": Column("float64", "s", "time spent in the variant's own detector and measures"),
}
MATCH_COLUMNS: dict[str, Column] = {
    "file": Column("string", "", "input file path"),
    "variant_a": Column("string", "", "first side of the pair ('truth' for ground truth)"),
    "variant_b": Column("string", "", "second side of the pair"),
    "outcome": Column("string", "", "matched, only_a or only_b"),
    "group": Column("int64", "", "overlap group within the file and pair (events chained by overlaps)"),
    "event_id_a": Column("int64", "", "event_id on side A (truth: row number within the file); null if only_b"),
    "event_id_b": Column("int64", "", "event_id on side B; null if only_a"),
    "start_s_a": Column("float64", "s", "event start on side A"),
    "end_s_a": Column("float64", "s", "event end on side A"),
    "start_s_b": Column("float64", "s", "event start on side B"),
    "end_s_b": Column("float64", "s", "event end on side B"),
    "overlap_s": Column("float64", "s", "overlap of the matched intervals (on the sample grid)"),
    "onset_diff_s": Column("float64", "s", "start_s_b - start_s_a"),
    "charge_C_a": Column("float64", "C", "charge on side A"),
    "charge_C_b": Column("float64", "C", "charge on side B"),
    "charge_diff_C": Column("float64", "C", "charge_C_b - charge_C_a"),
}
AGREEMENT_COLUMNS: dict[str, Column] = {
    "variant_a": Column("string", "", "first variant"),
    "variant_b": Column("string", "", "second variant"),
    "n_files": Column("int64", "", "files where both variants succeeded"),
    "n_a": Column("int64", "", "events of variant A in those files"),
    "n_b": Column("int64", "", "events of variant B in those files"),
    "matched": Column("int64", "", "events matched one to one"),
    "only_a": Column("int64", "", "events found by A only"),
    "only_b": Column("int64", "", "events found by B only"),
    "jaccard": Column("float64", "", "matched / (matched + only_a + only_b)"),
    "onset_diff_median_s": Column("float64", "s", "median of start_s_b - start_s_a over matched events"),
    "onset_diff_iqr_s": Column("float64", "s", "interquartile range of the onset differences"),
    "charge_diff_median_C": Column("float64", "C", "median of charge_C_b - charge_C_a over matched events"),
    "charge_diff_iqr_C": Column("float64", "C", "interquartile range of the charge differences"),
}
SUMMARY_COLUMNS: dict[str, Column] = {
    "variant": Column("string", "", "comparison variant"),
    "detector": Column("string", "", "detector stage"),
    "filters": Column("string", "", "filter chain, in order"),
    "pipeline_hash": Column("string", "", "hash of the variant's pipeline (same as impactline run on it)"),
    "files_ok": Column("int64", "", "files the variant processed"),
    "files_failed": Column("int64", "", "files where the variant failed"),
    "duration_s": Column("float64", "s", "recorded time of the files processed"),
    "n_events": Column("int64", "", "events found"),
    "event_rate_per_s": Column("float64", "1/s", "n_events / duration_s"),
    "median_abs_charge_C": Column("float64", "C", "median |charge_C|"),
    "median_abs_peak_A": Column("float64", "A", "median |peak_A|"),
    "median_duration_s": Column("float64", "s", "median event duration"),
    "median_snr": Column("float64", "", "median measured snr"),
    "noise_rms_A": Column("float64", "A", "median over files of the filtered-signal rms noise"),
    "seconds": Column("float64", "s", "time in the variant's own detector and measures"),
    "n_truth": Column("int64", "", "ground-truth events in the scored files (null without truth)"),
    "precision": Column("float64", "", "true positives / detections, scored files (NaN without truth)"),
    "recall": Column("float64", "", "true positives / truth events (NaN without truth)"),
    "f1": Column("float64", "", "harmonic mean of precision and recall (NaN without truth)"),
    "false_per_s": Column("float64", "1/s", "false detections per second of scored recording (NaN without truth)"),
}
SCORE_COLUMNS: dict[str, Column] = {
    "variant": Column("string", "", "comparison variant"),
    "stratum": Column("string", "", "all, class (truth shape/label) or snr (band)"),
    "value": Column("string", "", "class name or SNR band"),
    "snr_low": Column("float64", "", "lower SNR edge of the band (inclusive); NaN for other strata"),
    "snr_high": Column("float64", "", "upper SNR edge of the band (exclusive); NaN for other strata"),
    "n_files": Column("int64", "", "files scored"),
    "duration_s": Column("float64", "s", "recorded time scored"),
    "n_truth": Column("int64", "", "truth events in the stratum"),
    "tp": Column("int64", "", "truth events matched by a detection"),
    "fn": Column("int64", "", "truth events missed"),
    "fp": Column("int64", "", "detections matching no truth event (all: every one; snr: by measured snr; "
                             "class: null, a false alarm has no true class)"),
    "precision": Column("float64", "", "all: tp / detections; snr band: matched / all detections whose measured "
                                       "snr is in the band; class: NaN"),
    "recall": Column("float64", "", "tp / n_truth (by the truth's class or true snr)"),
    "f1": Column("float64", "", "2 precision recall / (precision + recall)"),
    "false_per_s": Column("float64", "1/s", "fp / duration_s"),
    "onset_error_median_s": Column("float64", "s", "median of detected onset_s - true start_s (matched; the "
                                                    "detection's start_s where it has no onset_s)"),
    "onset_error_iqr_s": Column("float64", "s", "interquartile range of the onset errors"),
    "start_error_median_s": Column("float64", "s", "median of detected start_s - true start_s (matched)"),
    "start_error_iqr_s": Column("float64", "s", "interquartile range of the start errors"),
    "charge_error_median_C": Column("float64", "C", "median of detected charge_C - true charge_C (matched)"),
    "charge_error_rel_median": Column("float64", "", "median of (detected - true) / |true| charge"),
}
SWEEP_COLUMNS: dict[str, Column] = {
    "variant": Column("string", "", "variant swept"),
    "parameter": Column("string", "", "parameter path, e.g. detector.k_sigma"),
    "value": Column("float64", "", "parameter value (SI; unit in this field's metadata)"),
    "value_text": Column("string", "", "the value as written"),
    "n_files": Column("int64", "", "files processed"),
    "duration_s": Column("float64", "s", "recorded time"),
    "n_events": Column("int64", "", "events found"),
    "events_per_s": Column("float64", "1/s", "n_events / duration_s"),
    "n_truth": Column("int64", "", "truth events in the scored files (null without truth)"),
    "tp": Column("int64", "", "truth events detected"),
    "fp": Column("int64", "", "false detections"),
    "fn": Column("int64", "", "truth events missed"),
    "recall": Column("float64", "", "detection rate tp / n_truth"),
    "precision": Column("float64", "", "tp / detections"),
    "f1": Column("float64", "", "harmonic mean of precision and recall"),
    "false_per_s": Column("float64", "1/s", "false detections per second of scored recording"),
}
TRUTH_COLUMNS: dict[str, Column] = {
    "file": Column("string", "", "recording the truth event belongs to (as given to compare)"),
    "truth_id": Column("int64", "", "row number within the file, in time order"),
    "start_s": Column("float64", "s", "true start"),
    "end_s": Column("float64", "s", "true end (exclusive)"),
    "charge_C": Column("float64", "C", "true charge (NaN when not known)"),
    "class": Column("string", "", "event class (simulator shape or hand label); null when not given"),
    "snr": Column("float64", "", "true signal-to-noise ratio (NaN when not known)"),
}


# ================================================================================================ variants
@dataclass
class VariantRecipe:
    """The raw stage tables of one variant, as they would be written in a pipeline file.

    Values are kept as written (``"25 kHz"``), so the generated pipeline text reads like a hand-written one.
    """

    name: str
    description: str = ""
    chunk_samples: int = DEFAULT_CHUNK_SAMPLES
    local_plugins: list[str] = field(default_factory=list)
    reader: tuple[str, dict[str, Any]] = ("auto", {})
    filters: list[tuple[str, dict[str, Any]]] = field(default_factory=list)
    detector: tuple[str, dict[str, Any]] | None = None
    measures: list[tuple[str, dict[str, Any]]] = field(default_factory=list)
    classifier: tuple[str, dict[str, Any]] | None = None
    sizing: dict[str, Any] | None = None

    def text(self) -> str:
        """A complete, standalone pipeline file for this variant."""
        lines = [f"# variant {self.name!r} of an impactline comparison (generated)", "", "[pipeline]",
                 f"name = {_toml_value(self.name)}"]
        if self.description:
            lines.append(f"description = {_toml_value(self.description)}")
        lines.append(f"chunk_samples = {int(self.chunk_samples)}")
        if self.local_plugins:
            lines += ["", "[plugins]", f"local = {_toml_value(list(self.local_plugins))}"]
        lines += ["", "[reader]", *_toml_stage(*self.reader)]
        for use, params in self.filters:
            lines += ["", "[[filter]]", *_toml_stage(use, params)]
        if self.detector is not None:
            lines += ["", "[detector]", *_toml_stage(*self.detector)]
        for use, params in self.measures:
            lines += ["", "[[measure]]", *_toml_stage(use, params)]
        if self.classifier is not None:
            lines += ["", "[classifier]", *_toml_stage(*self.classifier)]
        if self.sizing:
            lines += ["", "[sizing]", *(f"{_toml_key(k)} = {_toml_value(v)}" for k, v in self.sizing.items()
                                        if v is not None)]
        return "\n".join(lines) + "\n"


@dataclass
class Variant:
    """One variant of a comparison: a name and a complete pipeline.

    Parameters
    ----------
    name : str
        Variant name (column ``variant``, file names in the comparison folder).
    pipeline : Pipeline
        The variant's complete pipeline (shared reader and filters included).
    recipe : VariantRecipe
        The same pipeline as raw stage tables (for ``variants/NAME.toml`` and for sweeps).
    origin : str
        Where it was declared (file and key), for messages.
    """

    name: str
    pipeline: Pipeline
    recipe: VariantRecipe
    origin: str

    @property
    def text(self) -> str:
        """Standalone pipeline text of the variant (local plugin paths made absolute)."""
        return self.recipe.text()


@dataclass
class _TreeNode:
    """A filter stage shared by every variant whose chain passes through it (the root holds no filter)."""

    key: str
    spec: Any
    registry: PluginRegistry | None
    children: list[_TreeNode] = field(default_factory=list)
    variants: list[int] = field(default_factory=list)

    def subtree_variants(self) -> list[int]:
        found = list(self.variants)
        for child in self.children:
            found += child.subtree_variants()
        return found

    def count(self) -> int:
        return sum(1 + child.count() for child in self.children)

    def describe(self, names: Sequence[str]) -> dict[str, Any]:
        return {"filter": None if self.spec is None else {"use": self.spec.name, "params": self.spec.params},
                "variants": [names[i] for i in self.variants],
                "children": [c.describe(names) for c in self.children]}


@dataclass
class Comparison:
    """Variants to run over the same recordings, reading each file once.

    Build one with :func:`load_comparison` (files) or :func:`comparison_from_pipelines`.
    """

    name: str
    variants: list[Variant]
    sources: list[str] = field(default_factory=list)
    description: str = ""
    chunk_samples: int = DEFAULT_CHUNK_SAMPLES

    def __post_init__(self) -> None:
        names = [v.name for v in self.variants]
        if not names:
            raise PipelineError([f"{self.name}: a comparison needs at least one variant"])
        duplicates = sorted({n for n in names if names.count(n) > 1})
        if duplicates:
            raise PipelineError([f"{self.name}: variant names must be unique; repeated: {', '.join(duplicates)}"])
        if TRUTH in names:
            raise PipelineError([f"{self.name}: the variant name {TRUTH!r} is reserved for ground truth"])
        _check_shared_reader(self.variants)
        self._tree = _filter_tree(self.variants)
        self._schemas = [events_schema(v.pipeline) for v in self.variants]

    @property
    def names(self) -> list[str]:
        return [v.name for v in self.variants]

    @property
    def hash(self) -> str:
        """SHA-256 over the variants' names and pipeline hashes, in order."""
        canonical = json.dumps([[v.name, v.pipeline.hash] for v in self.variants])
        return hashlib.sha256(canonical.encode()).hexdigest()

    def variant(self, name: str) -> Variant:
        for v in self.variants:
            if v.name == name:
                return v
        raise KeyError(f"no variant named {name!r}; variants: {', '.join(self.names)}")

    def filter_passes(self) -> tuple[int, int]:
        """(filter stages run per file with sharing, filter stages the variants would run separately)."""
        return self._tree.count(), sum(len(v.pipeline.filter_specs) for v in self.variants)

    def filter_tree_summary(self) -> dict[str, Any]:
        """The sharing tree as nested dicts (for ``comparison.json``)."""
        return self._tree.describe(self.names)


def _check_shared_reader(variants: Sequence[Variant]) -> None:
    def reader_of(v: Variant) -> str:
        return json.dumps(v.pipeline.resolved()["reader"], sort_keys=True, default=str)

    reference = reader_of(variants[0])
    problems = [f"{v.origin}: reader settings differ from those of variant {variants[0].name!r} "
                f"({variants[0].origin}); a comparison reads each file once, so give every variant the same "
                "[reader] table" for v in variants[1:] if reader_of(v) != reference]
    if problems:
        raise PipelineError(problems)


def _filter_tree(variants: Sequence[Variant]) -> _TreeNode:
    root = _TreeNode(key="", spec=None, registry=None)
    for index, variant in enumerate(variants):
        node = root
        resolved = variant.pipeline.resolved()["filter"]
        for spec, stage in zip(variant.pipeline.filter_specs, resolved, strict=True):
            key = json.dumps(stage, sort_keys=True, default=str)
            child = next((c for c in node.children if c.key == key), None)
            if child is None:
                child = _TreeNode(key=key, spec=spec, registry=variant.pipeline.registry)
                node.children.append(child)
            node = child
        node.variants.append(index)
    return root


# ------------------------------------------------------------------------------------------------ TOML writing
def _toml_key(key: str) -> str:
    return key if re.fullmatch(r"[A-Za-z0-9_-]+", key) else _toml_value(key)


def _toml_value(value: Any) -> str:
    """TOML text of a value read by ``tomllib`` (or a plain Python scalar, list or dict)."""
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if math.isnan(value):
            return "nan"
        if math.isinf(value):
            return "inf" if value > 0 else "-inf"
        return repr(value)
    if isinstance(value, str):
        # JSON string escapes are a subset of TOML basic-string escapes; TOML also forbids a raw DEL.
        return json.dumps(value, ensure_ascii=False).replace("\x7f", "\\u007f")
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    if isinstance(value, dict):
        return "{" + ", ".join(f"{_toml_key(str(k))} = {_toml_value(v)}" for k, v in value.items()) + "}"
    if hasattr(value, "isoformat"):
        return value.isoformat()
    raise TypeError(f"cannot write {type(value).__name__} {value!r} as TOML")


def _toml_stage(use: str, params: Mapping[str, Any]) -> list[str]:
    return [f"use = {_toml_value(use)}", *(f"{_toml_key(k)} = {_toml_value(v)}" for k, v in params.items())]


# ------------------------------------------------------------------------------------------------ loading
def load_comparison(paths: str | os.PathLike | Sequence[str | os.PathLike],
                    registry: PluginRegistry | None = None) -> Comparison:
    """Load variants from a comparison file, from pipeline files, or from a mix of both.

    Parameters
    ----------
    paths : path-like or sequence of path-like
        ``.toml`` files. A file with ``[[variant]]`` tables is a comparison file; any other is a pipeline
        file and becomes one variant named after the file (``bessel-thr5.toml`` -> ``bessel-thr5``).
    registry : PluginRegistry, optional
        Where stages are looked up (default: the installed plugins).

    Returns
    -------
    Comparison

    Raises
    ------
    PipelineError
        Listing every problem of every file (file and key named), or when the variants' reader settings
        differ or two variants share a name.
    """
    if isinstance(paths, (str, os.PathLike)):
        paths = [paths]
    registry = registry or default_registry()
    variants: list[Variant] = []
    problems: list[str] = []
    meta: dict[str, Any] = {}
    for raw_path in paths:
        path = Path(raw_path)
        try:
            text = path.read_text(encoding="utf-8")
        except OSError as exc:
            problems.append(f"{path}: cannot read ({exc.strerror or exc})")
            continue
        except UnicodeDecodeError as exc:
            problems.append(f"{path}: not UTF-8 text ({exc.reason} at byte {exc.start})")
            continue
        try:
            data = tomllib.loads(text)
        except tomllib.TOMLDecodeError as exc:
            problems.append(f"{path}: TOML syntax error: {exc}")
            continue
        base_dir = path.resolve().parent
        try:
            if "variant" in data or "comparison" in data:
                file_meta, found = _variants_from_comparison_file(data, str(path), base_dir, registry)
                meta = meta or file_meta
                variants += found
            else:
                pipeline = parse_pipeline(text, source=str(path), base_dir=base_dir, registry=registry)
                name = _unique_name(_safe_name(path.stem), {v.name for v in variants})
                variants.append(Variant(name=name, pipeline=pipeline, recipe=_recipe_from_pipeline(name, pipeline),
                                        origin=str(path)))
        except PipelineError as exc:
            problems += exc.problems
    if problems:
        raise PipelineError(list(dict.fromkeys(problems)))
    if not variants:
        raise PipelineError([f"{', '.join(map(str, paths))}: no variant declared"])
    name = meta.get("name") or "+".join(Path(p).stem for p in paths)
    chunk = meta.get("chunk_samples") or variants[0].pipeline.chunk_samples
    return Comparison(name=name, variants=variants, sources=[str(p) for p in paths],
                      description=meta.get("description", ""), chunk_samples=chunk)


def comparison_from_pipelines(pipelines: Mapping[str, Pipeline] | Sequence[Pipeline], name: str = "comparison",
                              chunk_samples: int | None = None) -> Comparison:
    """A comparison of already loaded pipelines (names from the mapping, else each pipeline's name).

    Parameters
    ----------
    pipelines : mapping of name to Pipeline, or sequence of Pipeline
        The variants.
    name : str
        Comparison name.
    chunk_samples : int, optional
        Samples per chunk (default: the first pipeline's).
    """
    items = list(pipelines.items()) if isinstance(pipelines, Mapping) else [(p.name, p) for p in pipelines]
    variants = [Variant(name=n, pipeline=p, recipe=_recipe_from_pipeline(n, p), origin=p.source) for n, p in items]
    return Comparison(name=name, variants=variants, sources=[p.source for _, p in items],
                      chunk_samples=chunk_samples or (items[0][1].chunk_samples if items else DEFAULT_CHUNK_SAMPLES))


def _safe_name(stem: str) -> str:
    name = re.sub(r"[^A-Za-z0-9._-]+", "-", stem).strip("-.") or "variant"
    return name[:64] if name[0].isalnum() else ("v" + name)[:64]


def _unique_name(name: str, taken: set[str]) -> str:
    if name not in taken and name != TRUTH:
        return name
    k = 2
    while f"{name}-{k}" in taken:
        k += 1
    return f"{name}-{k}"


def _recipe_from_pipeline(name: str, pipeline: Pipeline) -> VariantRecipe:
    def stage(spec) -> tuple[str, dict[str, Any]]:
        return spec.name, dict(spec.params)

    sizing = {k: v for k, v in (pipeline.sizing or {}).items() if v is not None} or None
    return VariantRecipe(
        name=name, chunk_samples=pipeline.chunk_samples, local_plugins=[str(p) for p in pipeline.local_plugins],
        reader=stage(pipeline.reader_spec), filters=[stage(s) for s in pipeline.filter_specs],
        detector=stage(pipeline.detector_spec), measures=[stage(s) for s in pipeline.measure_specs],
        classifier=stage(pipeline.classifier_spec) if pipeline.classifier_spec else None, sizing=sizing)


def _variants_from_comparison_file(data: dict, source: str, base_dir: Path,
                                   registry: PluginRegistry) -> tuple[dict[str, Any], list[Variant]]:
    problems: list[str] = []

    def problem(key: str, message: str) -> None:
        problems.append(f"{source}: {key}: {message}")

    for key in data:
        if key not in _COMPARISON_TOP:
            near = difflib.get_close_matches(key, _COMPARISON_TOP, n=1)
            hint = f"did you mean [{near[0]}]? " if near else ""
            problem(f"[{key}]", f"unknown section of a comparison file; {hint}sections are "
                                f"{', '.join(_COMPARISON_TOP)} (detectors go in [[variant]] tables)")
    meta_raw = data.get("comparison", {})
    meta = {k: p.default for k, p in _COMPARISON_KEYS.items()}
    if not isinstance(meta_raw, dict):
        problem("[comparison]", "expected a table")
    else:
        try:
            meta = resolve_params("[comparison]", _COMPARISON_KEYS, meta_raw)
        except ParameterError as exc:
            problem(f"comparison.{exc.key}", exc.reason)

    plugins = data.get("plugins", {})
    local: list[str] = []
    if not isinstance(plugins, dict):
        problem("[plugins]", "expected a table with local = [\"file.py\", ...]")
    else:
        for k in plugins:
            if k != "local":
                problem(f"plugins.{k}", "unknown key; the only key is 'local' (a list of .py files)")
        names = plugins.get("local", [])
        if not isinstance(names, list) or not all(isinstance(n, str) for n in names):
            problem("plugins.local", "expected a list of file names, e.g. local = [\"labreader.py\"]")
        else:
            local = [str(Path(n) if Path(n).is_absolute() else base_dir / n) for n in names]
    reader = _raw_stage(data.get("reader", {"use": "auto"}), "reader", problem, default_use="auto")
    shared_filters = [_raw_stage(t, f"filter[{i}]", problem) for i, t in enumerate(_raw_tables(data, "filter", "",
                                                                                                  problem))]
    shared_measures = [_raw_stage(t, f"measure[{i}]", problem) for i, t in enumerate(_raw_tables(data, "measure", "",
                                                                                                    problem))]
    shared_sizing = data.get("sizing")

    raw_variants = data.get("variant", [])
    if isinstance(raw_variants, dict) or not isinstance(raw_variants, list) or not all(
            isinstance(v, dict) for v in raw_variants):
        problem("[variant]", "write [[variant]] (double brackets: a list of variants), each with a name and a "
                             "[variant.detector] table")
        raw_variants = []
    if not raw_variants:
        problem("[[variant]]", "no variant declared; add [[variant]] tables, each with name = \"...\" and a "
                               "[variant.detector] table")
    variants: list[Variant] = []
    seen: set[str] = set()
    for j, table in enumerate(raw_variants):
        key = f"variant[{j}]"
        for k in table:
            if k not in _VARIANT_KEYS:
                near = difflib.get_close_matches(k, _VARIANT_KEYS, n=1)
                hint = f"did you mean {near[0]!r}? " if near else ""
                problem(f"{key}.{k}", f"unknown key; {hint}keys are {', '.join(_VARIANT_KEYS)}")
        name = table.get("name")
        if not isinstance(name, str) or not _NAME_RE.match(name):
            problem(f"{key}.name", f"expected a name of letters, digits, '.', '_' or '-' (at most 64, used as a file "
                                   f"name), got {name!r}")
            continue
        if name == TRUTH:
            problem(f"{key}.name", f"{TRUTH!r} is reserved for ground truth; choose another name")
            continue
        if name in seen:
            problem(f"{key}.name", f"variant {name!r} is declared twice; names must be unique")
            continue
        seen.add(name)
        flags = {}
        for flag in ("inherit_filters", "inherit_measures"):
            value = table.get(flag, True)
            if not isinstance(value, bool):
                problem(f"{key}.{flag}", f"expected true or false, got {value!r}")
                value = True
            flags[flag] = value
        own_filters = [_raw_stage(t, f"{key}.filter[{i}]", problem)
                       for i, t in enumerate(_raw_tables(table, "filter", f"{key}.", problem))]
        own_measures = [_raw_stage(t, f"{key}.measure[{i}]", problem)
                        for i, t in enumerate(_raw_tables(table, "measure", f"{key}.", problem))]
        if "detector" not in table:
            problem(f"{key}.detector", f"missing; add [variant.detector] with use = \"threshold\" (or another "
                                       f"detector) to variant {name!r}")
            continue
        detector = _raw_stage(table["detector"], f"{key}.detector", problem)
        classifier = _raw_stage(table["classifier"], f"{key}.classifier", problem) if "classifier" in table else None
        filters = (shared_filters if flags["inherit_filters"] else []) + own_filters
        measures = (shared_measures if flags["inherit_measures"] else []) + own_measures
        sizing = table.get("sizing", shared_sizing)
        if None in (reader, detector) or None in filters or None in measures:
            continue
        recipe = VariantRecipe(name=name, description=str(table.get("description", "")),
                               chunk_samples=meta["chunk_samples"], local_plugins=local, reader=reader,
                               filters=filters, detector=detector, measures=measures, classifier=classifier,
                               sizing=sizing if isinstance(sizing, dict) else None)
        if sizing is not None and not isinstance(sizing, dict):
            problem(f"{key}.sizing" if "sizing" in table else "[sizing]", "expected a table")
            continue
        try:
            pipeline = parse_pipeline(recipe.text(), source=source, base_dir=base_dir, registry=registry)
        except PipelineError as exc:
            n_shared = len(shared_filters) if flags["inherit_filters"] else 0
            m_shared = len(shared_measures) if flags["inherit_measures"] else 0
            problems += [_translate_problem(p, source, key, name, n_shared, m_shared, "sizing" in table)
                         for p in exc.problems]
            continue
        variants.append(Variant(name=name, pipeline=pipeline, recipe=recipe, origin=f"{source} {key}"))
    if problems:
        raise PipelineError(list(dict.fromkeys(problems)))
    return meta, variants


def _raw_tables(data: dict, key: str, prefix: str, problem) -> list[dict]:
    """The ``[[key]]`` list of ``data``, checked by the pipeline loader's own rule (keys named with ``prefix``)."""
    table = "variant." if prefix else ""  # how the list is written in TOML

    def named(where: str, message: str) -> None:
        message = message.replace(f"[[{key}]]", f"[[{table}{key}]]").replace(f"not [{key}]", f"not [{table}{key}]")
        problem(f"{prefix}{where.strip('[]')}", message)

    return stage_array(data, key, named)


def _raw_stage(table: Any, key: str, problem, default_use: str | None = None) -> tuple[str, dict] | None:
    if not isinstance(table, dict):
        problem(key, f"expected a table, got {type(table).__name__}")
        return None
    params = dict(table)
    use = params.pop("use", default_use)
    if not isinstance(use, str):
        problem(key, "missing 'use' (which stage to run); see `impactline plugins`")
        return None
    return use, params


_KEY_RE = re.compile(r"^(?P<kind>filter|measure)\[(?P<index>\d+)\](?P<rest>.*)$", re.S)


def _translate_problem(text: str, source: str, variant_key: str, name: str, n_shared_filters: int,
                       n_shared_measures: int, own_sizing: bool) -> str:
    """Map a problem reported on a variant's generated pipeline back to the comparison file's keys."""
    prefix = f"{source}: "
    body = text[len(prefix):] if text.startswith(prefix) else text
    match = _KEY_RE.match(body)
    if match:
        index = int(match["index"])
        shared = n_shared_filters if match["kind"] == "filter" else n_shared_measures
        if index < shared:
            return f"{prefix}{match['kind']}[{index}]{match['rest']}"
        return f"{prefix}{variant_key}.{match['kind']}[{index - shared}]{match['rest']} (variant {name!r})"
    for section in ("detector", "classifier") + (("sizing",) if own_sizing else ()):
        if body.startswith(section):
            return f"{prefix}{variant_key}.{body} (variant {name!r})"
    if body.startswith(("reader", "plugins", "sizing", "pipeline")):
        return prefix + body
    return f"{prefix}{variant_key} (variant {name!r}): {body}"


# ================================================================================================ one recording
@dataclass
class RecordingComparison:
    """Outcome of one recording under every variant.

    Attributes
    ----------
    path : Path
        The recording.
    rows : list of dict
        One ``files.parquet`` row per variant (:data:`COMPARE_FILE_COLUMNS`), in variant order.
    events : dict
        Variant name -> events table (run schema plus ``variant``), None for a failed variant.
    seconds : float
        Wall time for the file (one read, shared filtering, every variant).
    """

    path: Path
    rows: list[dict[str, Any]]
    events: dict[str, pa.Table | None]
    seconds: float = 0.0

    @property
    def ok(self) -> bool:
        return all(row["status"] == "ok" for row in self.rows)


class _LiveNode:
    """A shared filter stage at work on one recording (with the noise meter of the variants fed from it)."""

    __slots__ = ("filter", "state", "children", "variants", "subtree", "alive", "noise")

    def __init__(self, filt, state, variants: list[int], subtree: list[int]):
        self.filter = filt
        self.state = state
        self.children: list[_LiveNode] = []
        self.variants = variants
        self.subtree = subtree
        self.alive = True
        self.noise = NoiseMeter()


class _SharedNoise:
    """Stands in for a branch's own noise meter when its filtered signal is measured once at the tree node.

    The branches fed from one node see the very same samples, so their noise figures are identical; the
    node's meter does the work once (it is a block-wise median, as costly as a cheap detector).
    """

    def __init__(self, meter: NoiseMeter):
        self.meter = meter

    def push(self, samples: np.ndarray) -> None:
        pass

    def result(self) -> float:
        return self.meter.result()


class _FanOut:
    """Feeds one recording's samples through the shared filter tree into every variant's event branch."""

    def __init__(self, comparison: Comparison, path: Path, fs: float):
        self.path = path
        self.fs = fs
        self.errors: dict[int, str] = {}
        self.branches: dict[int, EventBranch] = {}
        self.seconds = [0.0] * len(comparison.variants)
        self.root = self._start(comparison._tree)
        memos = self._memos(self.root, {})
        for index, variant in enumerate(comparison.variants):
            if index in self.errors:
                continue
            try:
                pipeline = variant.pipeline
                # The branch gets samples already filtered by the shared tree: the bandwidth and onset timing
                # are those of the variant's own filters.
                chain, timing = chain_figures(pipeline, fs)
                self.branches[index] = EventBranch(
                    [], pipeline.build_detector(), pipeline.build_measures(), fs, path, comparison._schemas[index],
                    pipeline.material(), chain=chain, timing=timing, memo=memos.get(index))
            except Exception as exc:
                self.errors[index] = describe_error(exc)
        self._share_noise(self.root)

    def _memos(self, node: _LiveNode, out: dict[int, dict]) -> dict[int, dict]:
        """One memo per node, for the detectors of the variants fed its samples (Detector.start_shared)."""
        memo: dict = {}
        for index in node.variants:
            out[index] = memo
        for child in node.children:
            self._memos(child, out)
        return out

    def _share_noise(self, node: _LiveNode) -> None:
        for index in node.variants:
            if index in self.branches:
                self.branches[index].noise = _SharedNoise(node.noise)
        for child in node.children:
            self._share_noise(child)

    def _start(self, node: _TreeNode) -> _LiveNode:
        subtree = node.subtree_variants()
        if node.spec is None:
            live = _LiveNode(None, None, list(node.variants), subtree)
        else:
            try:
                filt = node.registry.create("filter", node.spec.name, node.spec.params)
                live = _LiveNode(filt, filt.start(self.fs), list(node.variants), subtree)
            except ValueError as exc:  # e.g. a cutoff above this file's Nyquist frequency
                error = InputError(self.path, f"filter {node.spec.name!r}: {exc}",
                                   "lower the cutoff or check the file's sample rate")
                self._fail(subtree, str(error))
                live = _LiveNode(None, None, [], subtree)
                live.alive = False
                return live
        live.children = [self._start(child) for child in node.children]
        return live

    def _fail(self, indices: Iterable[int], error: str) -> None:
        for index in indices:
            self.errors.setdefault(index, error)
            self.branches.pop(index, None)

    def _deliver(self, node: _LiveNode, samples: np.ndarray) -> None:
        if any(index in self.branches for index in node.variants):
            node.noise.push(samples)
        for index in node.variants:
            branch = self.branches.get(index)
            if branch is None:
                continue
            started = time.perf_counter()
            try:
                branch.push(samples)
            except Exception as exc:
                self._fail([index], describe_error(exc))
            self.seconds[index] += time.perf_counter() - started

    def _feed(self, node: _LiveNode, samples: np.ndarray) -> None:
        self._deliver(node, samples)
        for child in node.children:
            if not child.alive:
                continue
            try:
                out, child.state = child.filter.process(samples, child.state)
            except Exception as exc:
                child.alive = False
                self._fail(child.subtree, describe_error(exc))
                continue
            if out.size:
                self._feed(child, out)

    def push(self, samples: np.ndarray) -> None:
        """Feed the next chunk of raw samples (A)."""
        self._feed(self.root, samples)

    def _drain(self, node: _LiveNode, carry: np.ndarray) -> None:
        # Same order as the runner's flush: the tail of each stage passes through the stages after it.
        if not node.alive:
            return
        try:
            out = np.empty(0)
            if carry.size:
                out, node.state = node.filter.process(carry, node.state)
            tail = np.asarray(node.filter.finish(node.state), dtype=np.float64)
        except Exception as exc:
            node.alive = False
            self._fail(node.subtree, describe_error(exc))
            return
        out = np.concatenate([out, tail]) if out.size else tail
        if out.size:
            self._deliver(node, out)
        for child in node.children:
            self._drain(child, out)

    def finish(self) -> dict[int, pa.Table]:
        """Drain the filters and every branch; return the events table of each variant that succeeded."""
        for child in self.root.children:
            self._drain(child, np.empty(0))
        tables: dict[int, pa.Table] = {}
        for index in sorted(self.branches):
            started = time.perf_counter()
            try:
                tables[index] = self.branches[index].finish()
            except Exception as exc:
                self.errors[index] = describe_error(exc)
            self.seconds[index] += time.perf_counter() - started
        return tables


def compare_recording(comparison: Comparison, path: str | Path, *,
                      progress: Callable[[int, int | None], None] | None = None) -> RecordingComparison:
    """Read one recording once and run every variant on it.

    Parameters
    ----------
    comparison : Comparison
        The variants.
    path : path-like
        The recording.
    progress : callable, optional
        ``progress(samples_done, n_samples_or_None)`` after each chunk.

    Returns
    -------
    RecordingComparison
        A failure of one variant (its detector, measures or own filters) leaves the others intact; a
        failure to read the file fails every variant.
    """
    path = Path(path)
    started = time.perf_counter()
    names = comparison.names
    try:
        reader = comparison.variants[0].pipeline.build_reader(path)
        recording = reader.open(path)
        fs = float(recording.sample_rate_hz)
        fan = _FanOut(comparison, path, fs)
        n_samples = 0
        for samples in read_checked(recording, comparison.chunk_samples, path, progress):
            n_samples += samples.size
            fan.push(samples)
        tables = fan.finish()
        fingerprint = file_fingerprint(path, recording.extra_files)
    except Exception as exc:
        error = describe_error(exc)
        rows = [{**{k: None for k in COMPARE_FILE_COLUMNS}, "file": str(path), "variant": name, "status": "failed",
                 "error": error} for name in names]
        return RecordingComparison(path, rows, dict.fromkeys(names), time.perf_counter() - started)

    duration = n_samples / fs
    rows, events = [], {}
    for index, name in enumerate(names):
        table = tables.get(index)
        row = {"file": str(path), "variant": name, "reader": reader.name, "fingerprint": fingerprint,
               "sample_rate_hz": fs, "n_samples": n_samples, "duration_s": duration,
               "seconds": fan.seconds[index]}
        if table is None:
            row.update(status="failed", error=fan.errors.get(index, "variant failed"))
            events[name] = None
        else:
            branch = fan.branches[index]
            row.update(status="ok", error=None, noise_rms_A=branch.noise.result(), n_events=table.num_rows,
                       event_rate_per_s=table.num_rows / duration)
            events[name] = _with_variant(table, name)
        rows.append(row)
    return RecordingComparison(path, rows, events, time.perf_counter() - started)


def _with_variant(table: pa.Table, name: str) -> pa.Table:
    column = pa.field("variant", pa.string(), metadata={"unit": "", "doc": "comparison variant"})
    return table.append_column(column, pa.array([name] * table.num_rows, type=pa.string()))


# ================================================================================================ many files
_WORKER: Comparison | None = None


def _portable(comparison: Comparison) -> dict[str, Any]:
    """What a worker process needs to rebuild the comparison (pipeline texts with absolute local paths)."""
    return {"name": comparison.name, "chunk_samples": comparison.chunk_samples,
            "variants": [(v.name, v.text, v.origin) for v in comparison.variants]}


def _rebuild(portable: Mapping[str, Any]) -> Comparison:
    registry = default_registry()
    variants = []
    for name, text, origin in portable["variants"]:
        pipeline = parse_pipeline(text, source=origin, registry=registry)
        variants.append(Variant(name=name, pipeline=pipeline, recipe=_recipe_from_pipeline(name, pipeline),
                                origin=origin))
    return Comparison(name=portable["name"], variants=variants, chunk_samples=portable["chunk_samples"])


def _worker_init(portable: dict[str, Any]) -> None:
    global _WORKER
    _WORKER = _rebuild(portable)


def _worker_task(path: str) -> RecordingComparison:
    assert _WORKER is not None
    return compare_recording(_WORKER, path)


def _run_files(comparison: Comparison, paths: Sequence[Path], jobs: int,
               on_file: Callable[[RecordingComparison, int, int], None] | None,
               on_progress: Callable[[int, int | None], None] | None) -> list[RecordingComparison]:
    results: list[RecordingComparison] = []
    if jobs <= 1 or len(paths) <= 1:
        for path in paths:
            results.append(compare_recording(comparison, path, progress=on_progress))
            if on_file:
                on_file(results[-1], len(results), len(paths))
        return results
    with ProcessPoolExecutor(max_workers=jobs, initializer=_worker_init, initargs=(_portable(comparison),)) as pool:
        futures = {pool.submit(_worker_task, str(p)): p for p in paths}
        for future in as_completed(futures):
            try:
                result = future.result()
            except Exception as exc:  # a worker died (e.g. out of memory): record it, keep going
                error = describe_error(exc)
                rows = [{**{k: None for k in COMPARE_FILE_COLUMNS}, "file": str(futures[future]), "variant": n,
                         "status": "failed", "error": error} for n in comparison.names]
                result = RecordingComparison(futures[future], rows, dict.fromkeys(comparison.names))
            results.append(result)
            if on_file:
                on_file(result, len(results), len(paths))
    order = {str(p): i for i, p in enumerate(paths)}
    results.sort(key=lambda r: order.get(str(r.path), len(order)))
    return results


def _variant_events(comparison: Comparison, results: Sequence[RecordingComparison]) -> dict[str, pa.Table]:
    """Every variant's events over all files, classified when the variant has a classifier."""
    events = {}
    for index, variant in enumerate(comparison.variants):
        tables = [r.events[variant.name] for r in results if r.events.get(variant.name) is not None]
        schema = comparison._schemas[index]
        table = pa.concat_tables(tables) if tables else _with_variant(schema.empty_table(), variant.name)
        classifier = variant.pipeline.build_classifier()
        if classifier is not None and table.num_rows:
            labels = classifier.fit_predict(table)
            label_schema = schema_for(classifier.columns)
            for name in classifier.columns:
                if name in table.column_names:
                    table = table.drop_columns([name])
                table = table.append_column(label_schema.field(name),
                                            pa.array(np.asarray(labels[name]), type=label_schema.field(name).type))
        events[variant.name] = table
    return events


# ================================================================================================ matching
@dataclass
class IntervalMatch:
    """One-to-one matching of two sets of intervals.

    Attributes
    ----------
    a, b : ndarray of int
        Indices of matched pairs (into the A and B inputs), sorted by ``a``.
    overlap : ndarray of int
        Overlap of each pair, in the input's units (samples).
    group_a, group_b : ndarray of int
        Overlap group of every A and every B interval (intervals chained by overlaps share a group).
    """

    a: np.ndarray
    b: np.ndarray
    overlap: np.ndarray
    group_a: np.ndarray
    group_b: np.ndarray


def match_intervals(a_start: Sequence[int], a_end: Sequence[int], b_start: Sequence[int],
                    b_end: Sequence[int]) -> IntervalMatch:
    """Match intervals of A to intervals of B one to one, maximising the total overlap.

    Intervals are half-open ``[start, end)`` on an integer grid (samples). Only overlapping pairs may match.
    Among all one-to-one matchings the one with the largest total overlap is returned; among those, the
    one with the smallest total ``|start_a - start_b|`` (so a split event is matched to the piece that
    begins with it).

    Parameters
    ----------
    a_start, a_end, b_start, b_end : array-like of int
        Interval bounds (any order; intervals of one side may overlap each other).

    Returns
    -------
    IntervalMatch
    """
    from scipy.optimize import linear_sum_assignment

    a_s, a_e = np.asarray(a_start, dtype=np.int64), np.asarray(a_end, dtype=np.int64)
    b_s, b_e = np.asarray(b_start, dtype=np.int64), np.asarray(b_end, dtype=np.int64)
    n_a = a_s.size
    starts = np.concatenate([a_s, b_s])
    ends = np.concatenate([a_e, b_e])
    empty = np.empty(0, dtype=np.int64)
    if starts.size == 0:
        return IntervalMatch(empty, empty, empty, empty, empty)
    # Groups: sweep in start order; a new group begins where an interval starts at or after the furthest end
    # seen so far (half-open intervals touching end-to-start do not overlap).
    order = np.lexsort((ends, starts))
    reach = np.maximum.accumulate(ends[order])
    new = np.ones(order.size, dtype=bool)
    new[1:] = starts[order][1:] >= reach[:-1]
    group = np.empty(order.size, dtype=np.int64)
    group[order] = np.cumsum(new) - 1
    group_a, group_b = group[:n_a], group[n_a:]
    n_groups = int(group.max()) + 1
    count_a = np.bincount(group_a, minlength=n_groups)
    count_b = np.bincount(group_b, minlength=n_groups)

    pairs_a: list[np.ndarray] = []
    pairs_b: list[np.ndarray] = []
    # One A and one B in a group: they overlap unless one is empty (zero length); match directly.
    single = (count_a == 1) & (count_b == 1)
    if single.any():
        ia = np.flatnonzero(single[group_a])
        ib = np.flatnonzero(single[group_b])
        ia = ia[np.argsort(group_a[ia], kind="stable")]
        ib = ib[np.argsort(group_b[ib], kind="stable")]
        pairs_a.append(ia)
        pairs_b.append(ib)
    multi = np.flatnonzero((count_a > 0) & (count_b > 0) & ~single)
    if multi.size:
        members_a = _members(group_a, multi)
        members_b = _members(group_b, multi)
        for g in multi:
            ia, ib = members_a[g], members_b[g]
            overlap = np.minimum(a_e[ia, None], b_e[None, ib]) - np.maximum(a_s[ia, None], b_s[None, ib])
            overlap = np.clip(overlap, 0, None)
            if not overlap.any():
                continue
            onset = np.abs(a_s[ia, None] - b_s[None, ib])
            span = int(max(a_e[ia].max(), b_e[ib].max()) - min(a_s[ia].min(), b_s[ib].min()))
            # Any sum of onset differences over a matching is < K, so one sample more of total overlap always
            # outweighs the tie-break; exact in float64 while the weights stay below 2**52.
            k = min(ia.size, ib.size) * span + 1
            if float(overlap.max()) * k < 2.0 ** 52:
                weight = np.where(overlap > 0, overlap * k - onset, 0).astype(np.float64)
            else:
                weight = overlap.astype(np.float64)
            rows, cols = linear_sum_assignment(weight, maximize=True)
            keep = overlap[rows, cols] > 0
            pairs_a.append(ia[rows[keep]])
            pairs_b.append(ib[cols[keep]])
    a_idx = np.concatenate(pairs_a) if pairs_a else empty
    b_idx = np.concatenate(pairs_b) if pairs_b else empty
    overlap = np.minimum(a_e[a_idx], b_e[b_idx]) - np.maximum(a_s[a_idx], b_s[b_idx])
    keep = overlap > 0
    a_idx, b_idx, overlap = a_idx[keep], b_idx[keep], overlap[keep]
    order = np.argsort(a_idx, kind="stable")
    return IntervalMatch(a_idx[order], b_idx[order], overlap[order], group_a, group_b)


def _members(group: np.ndarray, wanted: np.ndarray) -> dict[int, np.ndarray]:
    """Indices of the intervals of each wanted group (in index order)."""
    mask = np.isin(group, wanted)
    idx = np.flatnonzero(mask)
    idx = idx[np.argsort(group[idx], kind="stable")]
    bounds = np.flatnonzero(np.diff(group[idx])) + 1
    return {int(group[chunk[0]]): chunk for chunk in np.split(idx, bounds) if chunk.size}


def _side(table: pa.Table, id_column: str) -> dict[str, dict[str, np.ndarray]]:
    """Per file: ids, starts, ends and charges of a table's events."""
    files = np.asarray(table.column("file").to_pylist(), dtype=object)
    columns = {
        "id": _floats(table, id_column).astype(np.int64) if table.num_rows else np.empty(0, dtype=np.int64),
        "start": _floats(table, "start_s"),
        "end": _floats(table, "end_s"),
        "charge": _floats(table, "charge_C") if "charge_C" in table.column_names else np.full(table.num_rows, np.nan),
    }
    out: dict[str, dict[str, np.ndarray]] = {}
    for name in dict.fromkeys(files.tolist()):
        mask = files == name
        out[name] = {k: v[mask] for k, v in columns.items()}
        out[name]["row"] = np.flatnonzero(mask)
    return out


def _floats(table: pa.Table, name: str) -> np.ndarray:
    return np.asarray(table.column(name).to_numpy(zero_copy_only=False), dtype=np.float64)


def _take(values: np.ndarray, index: np.ndarray, present: np.ndarray, fill: Any) -> np.ndarray:
    out = np.full(index.size, fill, dtype=values.dtype if values.size else np.asarray(fill).dtype)
    out[present] = values[index[present]]
    return out


def _match_sides(a: dict[str, np.ndarray], b: dict[str, np.ndarray], fs: float) -> dict[str, np.ndarray]:
    """Match one file's events of two sides on the sample grid; return columnar match rows.

    Rows come matched pairs first (in A order), then events of A only, then events of B only.
    """
    def ticks(t: np.ndarray) -> np.ndarray:
        return np.round(t * fs).astype(np.int64)

    m = match_intervals(ticks(a["start"]), ticks(a["end"]), ticks(b["start"]), ticks(b["end"]))
    only_a = np.setdiff1d(np.arange(a["start"].size), m.a)
    only_b = np.setdiff1d(np.arange(b["start"].size), m.b)
    n_m, n_a, n_b = m.a.size, only_a.size, only_b.size
    none = np.zeros(0, dtype=np.int64)
    a_idx = np.concatenate([m.a, only_a, np.zeros(n_b, dtype=np.int64)]).astype(np.int64)
    b_idx = np.concatenate([m.b, np.zeros(n_a, dtype=np.int64), only_b]).astype(np.int64)
    has_a = np.concatenate([np.ones(n_m + n_a, bool), np.zeros(n_b, bool)])
    has_b = np.concatenate([np.ones(n_m, bool), np.zeros(n_a, bool), np.ones(n_b, bool)])
    matched = np.concatenate([np.ones(n_m, bool), np.zeros(n_a + n_b, bool)])
    start_a, start_b = _take(a["start"], a_idx, has_a, np.nan), _take(b["start"], b_idx, has_b, np.nan)
    charge_a, charge_b = _take(a["charge"], a_idx, has_a, np.nan), _take(b["charge"], b_idx, has_b, np.nan)
    group = np.where(has_a, _take(m.group_a if m.group_a.size else none, a_idx, has_a, 0),
                     _take(m.group_b if m.group_b.size else none, b_idx, has_b, 0))
    return {
        "outcome": np.array(["matched"] * n_m + ["only_a"] * n_a + ["only_b"] * n_b, dtype=object),
        "group": group.astype(np.int64),
        "event_id_a": _take(a["id"], a_idx, has_a, 0).astype(np.int64), "has_a": has_a,
        "event_id_b": _take(b["id"], b_idx, has_b, 0).astype(np.int64), "has_b": has_b,
        "row_a": _take(a["row"], a_idx, has_a, -1).astype(np.int64),
        "row_b": _take(b["row"], b_idx, has_b, -1).astype(np.int64),
        "start_s_a": start_a, "end_s_a": _take(a["end"], a_idx, has_a, np.nan),
        "start_s_b": start_b, "end_s_b": _take(b["end"], b_idx, has_b, np.nan),
        "overlap_s": np.concatenate([m.overlap / fs, np.full(n_a + n_b, np.nan)]),
        "onset_diff_s": np.where(matched, start_b - start_a, np.nan),
        "charge_C_a": charge_a, "charge_C_b": charge_b,
        "charge_diff_C": np.where(matched, charge_b - charge_a, np.nan),
    }


def _resolution(sample_rate_hz: Mapping[str, float] | float, file: str) -> float:
    if isinstance(sample_rate_hz, Mapping):
        return float(sample_rate_hz[file])
    return float(sample_rate_hz)


def _match_columns(a: pa.Table, b: pa.Table, sample_rate_hz: Mapping[str, float] | float, files: Iterable[str],
                   a_id: str = "event_id") -> dict[str, np.ndarray]:
    side_a, side_b = _side(a, a_id), _side(b, "event_id")
    blank = {"id": np.empty(0, dtype=np.int64), "start": np.empty(0), "end": np.empty(0), "charge": np.empty(0),
             "row": np.empty(0, dtype=np.int64)}
    parts, names = [], []
    for file in files:
        part = _match_sides(side_a.get(file, blank), side_b.get(file, blank), _resolution(sample_rate_hz, file))
        parts.append(part)
        names.append(np.full(part["outcome"].size, file, dtype=object))
    if not parts:
        parts = [_match_sides(blank, blank, 1.0)]
        names = [np.empty(0, dtype=object)]
    columns = {k: np.concatenate([p[k] for p in parts]) for k in parts[0]}
    columns["file"] = np.concatenate(names)
    return columns


def _match_table(columns: Mapping[str, np.ndarray], name_a: str, name_b: str) -> pa.Table:
    schema = schema_for(MATCH_COLUMNS)
    n = columns["outcome"].size
    arrays = []
    for f in schema:
        if f.name == "variant_a":
            arrays.append(pa.array([name_a] * n, pa.string()))
        elif f.name == "variant_b":
            arrays.append(pa.array([name_b] * n, pa.string()))
        elif f.name in ("event_id_a", "event_id_b"):
            arrays.append(pa.array(columns[f.name], f.type, mask=~columns["has_" + f.name[-1]]))
        else:
            arrays.append(pa.array(columns[f.name], f.type, from_pandas=True))
    return pa.Table.from_arrays(arrays, schema=schema)


def match_events(a: pa.Table, b: pa.Table, sample_rate_hz: Mapping[str, float] | float, *, name_a: str = "a",
                 name_b: str = "b", files: Iterable[str] | None = None) -> pa.Table:
    """Match the events of two tables file by file (see the module docstring for the rule).

    Parameters
    ----------
    a, b : pyarrow.Table
        Events with ``file``, ``event_id``, ``start_s``, ``end_s`` (s) and optionally ``charge_C`` (C).
    sample_rate_hz : float or mapping of file -> float
        Sampling rate of each file, Hz: intervals are compared on that sample grid.
    name_a, name_b : str
        Names written to ``variant_a`` / ``variant_b``.
    files : iterable of str, optional
        Files to match (default: every file in either table).

    Returns
    -------
    pyarrow.Table
        One row per matched pair and per unmatched event (:data:`MATCH_COLUMNS`).
    """
    if files is None:
        files = list(dict.fromkeys(a.column("file").to_pylist() + b.column("file").to_pylist()))
    return _match_table(_match_columns(a, b, sample_rate_hz, files), name_a, name_b)


def _median_iqr(values: np.ndarray) -> tuple[float, float]:
    values = values[np.isfinite(values)]
    if values.size == 0:
        return math.nan, math.nan
    q25, q50, q75 = np.percentile(values, [25, 50, 75])
    return float(q50), float(q75 - q25)


def agreement_table(matches: pa.Table) -> pa.Table:
    """Pairwise agreement from a match table (:data:`MATCH_COLUMNS`): one row per (variant_a, variant_b).

    Returns
    -------
    pyarrow.Table
        :data:`AGREEMENT_COLUMNS`. ``jaccard = matched / (matched + only_a + only_b)``, the Jaccard index
        |A and B| / |A or B| of the two event sets under the matching (Jaccard 1912, "The distribution of the
        flora in the alpine zone", New Phytologist 11), 1 when both found nothing; onset and charge
        differences are B minus A over matched events, median and interquartile range.
    """
    rows = []
    pair_a = np.asarray(matches.column("variant_a").to_pylist(), dtype=object)
    pair_b = np.asarray(matches.column("variant_b").to_pylist(), dtype=object)
    outcome = np.asarray(matches.column("outcome").to_pylist(), dtype=object)
    files = np.asarray(matches.column("file").to_pylist(), dtype=object)
    onset = _floats(matches, "onset_diff_s")
    charge = _floats(matches, "charge_diff_C")
    pairs = list(dict.fromkeys(zip(pair_a.tolist(), pair_b.tolist(), strict=True)))
    for name_a, name_b in pairs:
        mask = (pair_a == name_a) & (pair_b == name_b)
        matched = int(np.sum(mask & (outcome == "matched")))
        only_a = int(np.sum(mask & (outcome == "only_a")))
        only_b = int(np.sum(mask & (outcome == "only_b")))
        total = matched + only_a + only_b
        onset_med, onset_iqr = _median_iqr(onset[mask])
        charge_med, charge_iqr = _median_iqr(charge[mask])
        rows.append({"variant_a": name_a, "variant_b": name_b, "n_files": len(set(files[mask].tolist())),
                     "n_a": matched + only_a, "n_b": matched + only_b, "matched": matched, "only_a": only_a,
                     "only_b": only_b, "jaccard": matched / total if total else 1.0,
                     "onset_diff_median_s": onset_med, "onset_diff_iqr_s": onset_iqr,
                     "charge_diff_median_C": charge_med, "charge_diff_iqr_C": charge_iqr})
    return table_from_rows(rows, schema_for(AGREEMENT_COLUMNS))


# ================================================================================================ ground truth
@dataclass
class GroundTruth:
    """Known events of some recordings.

    Attributes
    ----------
    events : pyarrow.Table
        :data:`TRUTH_COLUMNS`: file, truth_id, start_s, end_s, charge_C, class, snr.
    files : list of str
        Recordings covered (a covered recording may hold no event: then every detection in it is false).
    sources : dict
        Recording -> truth file it came from.
    """

    events: pa.Table
    files: list[str]
    sources: dict[str, str] = field(default_factory=dict)


def _read_table_file(path: Path) -> pa.Table:
    suffix = path.suffix.lower()
    try:
        if suffix in (".csv", ".tsv", ".txt"):
            from pyarrow import csv

            delimiter = "\t" if suffix == ".tsv" else ","
            return csv.read_csv(path, parse_options=csv.ParseOptions(delimiter=delimiter))
        import pyarrow.parquet as pq

        return pq.read_table(path)
    except (OSError, pa.ArrowInvalid) as exc:
        raise InputError(path, f"cannot be read as {'CSV' if suffix in ('.csv', '.tsv', '.txt') else 'Parquet'} "
                               f"({exc})", "give a CSV (.csv) or Parquet file with columns file,start_s,end_s"
                                           "[,label]") from None


def load_truth(path: str | Path, recordings: Sequence[str | Path] | None = None, *,
               recording: str | Path | None = None) -> GroundTruth:
    """Read ground truth from a simulator truth file or a hand-marked events file.

    Parameters
    ----------
    path : path-like
        Parquet or CSV with ``start_s`` and ``end_s`` (s), optionally ``file``, ``charge_C`` (C), ``snr``,
        and a class column ``shape`` (the simulator's) or ``label`` (hand marks). When the file has
        ``signal_charge_C`` (the simulator: the charge the event's current carries) it is used as the true
        charge instead of ``charge_C`` (the whole particle's Faraday charge).
    recordings : sequence of path-like, optional
        The recordings of the comparison. A truth row's ``file`` names one of them by the path as given, the
        absolute path, the file name or the file name without extension.
    recording : path-like, optional
        The one recording this truth belongs to (a simulator's ``NAME.truth.parquet``); then no ``file``
        column is needed.

    Returns
    -------
    GroundTruth

    Raises
    ------
    InputError
        Naming the file, the column or row, and the fix.
    """
    path = Path(path)
    table = _read_table_file(path)
    names = table.column_names
    for required in ("start_s", "end_s"):
        if required not in names:
            raise InputError(path, f"no column {required!r} (columns: {', '.join(names) or 'none'})",
                             "name the event bounds start_s and end_s, in seconds", key=required)
    start, end = _floats(table, "start_s"), _floats(table, "end_s")
    bad = np.flatnonzero(~(np.isfinite(start) & np.isfinite(end) & (end > start)))
    if bad.size:
        i = int(bad[0])
        raise InputError(path, f"row {i}: start_s = {start[i]!r}, end_s = {end[i]!r}; expected finite times with "
                               "end_s > start_s", "fix or remove that row", key=f"row {i}")
    start, end = _on_recording_clock(path, table, start, end)
    n = table.num_rows
    # The simulator's charge_C is the particle's full Faraday charge; signal_charge_C is what the event's
    # current carries (a blip oxidises part of the particle), which is what a detector can measure.
    charge_column = next((c for c in ("signal_charge_C", "charge_C") if c in names), None)
    charge = _floats(table, charge_column) if charge_column else np.full(n, np.nan)
    snr = _floats(table, "snr") if "snr" in names else np.full(n, np.nan)
    klass: list[Any] = [None] * n
    for candidate in ("shape", "label", "class"):
        if candidate in names and pa.types.is_string(table.schema.field(candidate).type):
            klass = table.column(candidate).to_pylist()
            break
    keys = [str(Path(r)) for r in (recordings or [])]
    if recording is not None:
        files = [str(Path(recording))] * n
    elif "file" in names:
        files = [_which_recording(str(f), keys, path, i) for i, f in enumerate(table.column("file").to_pylist())]
    elif len(keys) == 1:
        files = [keys[0]] * n
    else:
        raise InputError(path, "no column 'file' and the comparison has several recordings",
                         "add a column file naming the recording of each event", key="file")
    covered = list(dict.fromkeys(([str(Path(recording))] if recording is not None else []) + files))
    return GroundTruth(_truth_table(files, start, end, charge, klass, snr), covered,
                       {f: str(path) for f in covered})


def _on_recording_clock(path: Path, table: pa.Table, start: np.ndarray,
                        end: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Simulator truth moved onto the recording's clock; other truth as it is.

    The simulator's times are those of the electrode current. Its recording lags them by the amplifier's
    group delay and spreads each event over the amplifier's settling time; both are in the truth file's
    metadata (``amplifier_delay_s``, ``amplifier_settle_s``). Every time is delayed, and each event lasts at
    least the settling time, so that a blip shorter than a sample can still overlap its detection. Hand-marked
    events are taken to be on the recording's clock already.
    """
    meta = table.schema.metadata or {}
    times = []
    for key in (b"amplifier_delay_s", b"amplifier_settle_s"):
        text = meta.get(key, b"0")
        try:
            value = float(text)
        except ValueError:
            value = math.nan
        if not (math.isfinite(value) and value >= 0.0):
            raise InputError(path, f"metadata {key.decode()} = {text.decode(errors='replace')!r}; expected a time "
                                   "in s, 0 or more", "rewrite the truth file with impactline simulate, or drop that "
                                                      "metadata key", key=key.decode())
        times.append(value)
    delay, settle = times
    if delay == 0.0 and settle == 0.0:
        return start, end
    start = start + delay
    return start, np.maximum(end + delay, start + settle)


def _which_recording(given: str, keys: Sequence[str], path: Path, row: int) -> str:
    if not keys:
        return given
    candidates = [k for k in keys if given == k]
    if not candidates:
        try:
            resolved = str(Path(given).resolve())
            candidates = [k for k in keys if str(Path(k).resolve()) == resolved]
        except OSError:
            candidates = []
    for transform in (lambda p: Path(p).name, lambda p: Path(p).stem):
        if not candidates:
            candidates = [k for k in keys if transform(k) == given]
    if len(candidates) != 1:
        problem = (f"row {row}: file {given!r} names none of the recordings" if not candidates else
                   f"row {row}: file {given!r} fits several recordings ({', '.join(candidates)})")
        raise InputError(path, problem, "write the recording's path, file name or stem in the file column; "
                                        f"recordings: {', '.join(Path(k).name for k in keys)}", key="file")
    return candidates[0]


def _truth_table(files, start, end, charge, klass, snr) -> pa.Table:
    files = np.asarray(files, dtype=object)
    order = np.lexsort((start, np.asarray([str(f) for f in files], dtype=object)))
    files, start, end, charge, snr = files[order], start[order], end[order], charge[order], snr[order]
    klass = [klass[i] for i in order]
    truth_id = np.zeros(files.size, dtype=np.int64)
    for name in dict.fromkeys(files.tolist()):
        mask = files == name
        truth_id[mask] = np.arange(int(mask.sum()))
    rows = {"file": files.tolist(), "truth_id": truth_id, "start_s": start, "end_s": end, "charge_C": charge,
            "class": klass, "snr": snr}
    schema = schema_for(TRUTH_COLUMNS)
    return pa.Table.from_arrays([pa.array(rows[f.name], f.type) for f in schema], schema=schema)


def _concat_truth(parts: Sequence[GroundTruth]) -> GroundTruth:
    if not parts:
        return GroundTruth(schema_for(TRUTH_COLUMNS).empty_table(), [])
    events = pa.concat_tables([p.events for p in parts])
    files = list(dict.fromkeys(f for p in parts for f in p.files))
    sources = {k: v for p in parts for k, v in p.sources.items()}
    return GroundTruth(events, files, sources)


def find_truth(recordings: Sequence[str | Path], truth: str | Path | None = None) -> GroundTruth | None:
    """Ground truth for a comparison: a given truth file, else ``NAME.truth.parquet`` beside each recording.

    Returns None when no recording has truth.
    """
    keys = [str(Path(r)) for r in recordings]
    if truth is not None:
        return load_truth(truth, keys)
    parts = []
    for key in keys:
        path = Path(key)
        candidate = path.parent / f"{path.stem}.truth.parquet"
        if candidate.is_file():
            parts.append(load_truth(candidate, recording=key))
    return _concat_truth(parts) if parts else None


def _ratio(num: float, den: float) -> float:
    return num / den if den else math.nan


def _f1(precision: float, recall: float) -> float:
    if not (math.isfinite(precision) and math.isfinite(recall)) or precision + recall == 0:
        return math.nan if not (math.isfinite(precision) and math.isfinite(recall)) else 0.0
    return 2 * precision * recall / (precision + recall)


def score_against_truth(truth: GroundTruth, events: pa.Table, sample_rate_hz: Mapping[str, float] | float, *,
                        durations: Mapping[str, float] | None = None, variant: str = "",
                        snr_edges: Sequence[float] = DEFAULT_SNR_EDGES,
                        files: Iterable[str] | None = None) -> pa.Table:
    """Precision, recall, F1, onset and charge errors of detected events against ground truth.

    Truth events and detections are matched one to one by interval overlap (the rule of
    :func:`match_intervals`); a matched truth event is a true positive, an unmatched one a miss, an
    unmatched detection a false alarm. Precision tp / (tp + fp), recall tp / (tp + fn) and their harmonic
    mean F1 are the usual retrieval measures (van Rijsbergen 1979, Information Retrieval, 2nd ed., ch. 7:
    F with beta = 1).

    Parameters
    ----------
    truth : GroundTruth
        Known events; only the recordings it covers are scored.
    events : pyarrow.Table
        Detections (``file``, ``event_id``, ``start_s``, ``end_s``, ``charge_C``, ``snr``).
    sample_rate_hz : float or mapping of file -> float
        Sample grid of each file, Hz.
    durations : mapping of file -> float, optional
        Recorded time of each file, s (for false alarms per second).
    variant : str
        Written to the ``variant`` column.
    snr_edges : sequence of float
        SNR band edges (recall by the true snr; precision by the detections' measured snr).
    files : iterable of str, optional
        Scored files (default: every file the truth covers).

    Returns
    -------
    pyarrow.Table
        :data:`SCORE_COLUMNS`: one row for all events, one per class, one per SNR band.
    """
    files = list(truth.files if files is None else files)
    columns = _match_columns(truth.events, events, sample_rate_hz, files, a_id="truth_id")
    duration = float(sum(durations[f] for f in files)) if durations else math.nan
    outcome = columns["outcome"]
    matched = outcome == "matched"
    truth_rows = columns["row_a"]
    det_rows = columns["row_b"]
    t_class = np.asarray(truth.events.column("class").to_pylist(), dtype=object)
    t_snr = _floats(truth.events, "snr")
    d_snr = _floats(events, "snr") if "snr" in events.column_names else np.full(events.num_rows, np.nan)
    start_err = columns["onset_diff_s"]
    # The onset error uses the core's half-height onset (onset_s), the best estimate of when the current
    # began; start_s is where the detector's signal left its baseline, early by up to a filter rise time.
    onset_err = start_err
    if "onset_s" in events.column_names and events.num_rows:
        detected_onset = _floats(events, "onset_s")
        true_start = _floats(truth.events, "start_s")
        onset_err = np.full(outcome.size, np.nan)
        both = matched & (det_rows >= 0) & (truth_rows >= 0)
        onset_err[both] = detected_onset[det_rows[both]] - true_start[truth_rows[both]]
    charge_err = columns["charge_diff_C"]
    true_charge = columns["charge_C_a"]
    has_truth, has_det = columns["has_a"], columns["has_b"]

    def row(stratum: str, value: str, truth_mask: np.ndarray, det_mask: np.ndarray | None,
            low: float = math.nan, high: float = math.nan) -> dict[str, Any]:
        # truth_mask / det_mask select match rows by the truth event / the detection.
        n_truth = int(np.sum(truth_mask & has_truth))
        tp = int(np.sum(truth_mask & matched))
        fn = n_truth - tp
        recall = _ratio(tp, n_truth)
        fp = precision = None
        if det_mask is not None:
            fp = int(np.sum(det_mask & has_det & ~matched))
            precision = _ratio(int(np.sum(det_mask & matched)), int(np.sum(det_mask & has_det)))
        sel = truth_mask & matched
        onset_med, onset_iqr = _median_iqr(onset_err[sel])
        start_med, start_iqr = _median_iqr(start_err[sel])
        charge_med, _ = _median_iqr(charge_err[sel])
        with np.errstate(divide="ignore", invalid="ignore"):
            rel_med, _ = _median_iqr(charge_err[sel] / np.abs(true_charge[sel]))
        p = math.nan if precision is None else precision
        return {"variant": variant, "stratum": stratum, "value": value, "snr_low": low, "snr_high": high,
                "n_files": len(files), "duration_s": duration, "n_truth": n_truth, "tp": tp, "fn": fn, "fp": fp,
                "precision": p, "recall": recall, "f1": _f1(p, recall),
                "false_per_s": _ratio(fp, duration) if fp is not None and math.isfinite(duration) else math.nan,
                "onset_error_median_s": onset_med, "onset_error_iqr_s": onset_iqr,
                "start_error_median_s": start_med, "start_error_iqr_s": start_iqr,
                "charge_error_median_C": charge_med, "charge_error_rel_median": rel_med}

    everything = np.ones(outcome.size, dtype=bool)
    rows = [row("all", "all", everything, everything)]
    row_class = np.where(has_truth, t_class[np.clip(truth_rows, 0, None)] if t_class.size else None, None)
    for value in sorted({c for c in row_class[has_truth].tolist() if c is not None}):
        rows.append(row("class", str(value), has_truth & (row_class == value), None))
    row_tsnr = np.where(has_truth, t_snr[np.clip(truth_rows, 0, None)] if t_snr.size else np.nan, np.nan)
    row_dsnr = np.where(has_det, d_snr[np.clip(det_rows, 0, None)] if d_snr.size else np.nan, np.nan)
    if np.isfinite(row_tsnr[has_truth]).any():
        edges = list(snr_edges)
        for low, high in zip(edges[:-1], edges[1:], strict=True):
            label = f"[{low:g}, {high:g})"
            rows.append(row("snr", label, has_truth & (row_tsnr >= low) & (row_tsnr < high),
                            has_det & (row_dsnr >= low) & (row_dsnr < high), low, high))
    return table_from_rows(rows, schema_for(SCORE_COLUMNS))


# ================================================================================================ compare
@dataclass
class ComparisonResult:
    """Everything a comparison produced (also written to the comparison folder when one was given).

    Attributes
    ----------
    comparison : Comparison
    out_dir : Path or None
    files : pyarrow.Table
        One row per (file, variant): :data:`COMPARE_FILE_COLUMNS`.
    events : dict
        Variant name -> events (the run schema plus ``variant``).
    matches : pyarrow.Table
        :data:`MATCH_COLUMNS`, every pair of variants (and truth vs each variant when truth was found).
    agreement : pyarrow.Table
        :data:`AGREEMENT_COLUMNS`, every pair of variants.
    summary : pyarrow.Table
        :data:`SUMMARY_COLUMNS`, one row per variant.
    scores : pyarrow.Table or None
        :data:`SCORE_COLUMNS` per variant and stratum, when ground truth was found.
    truth : GroundTruth or None
    seconds : float
        Wall time.
    """

    comparison: Comparison
    out_dir: Path | None
    files: pa.Table
    events: dict[str, pa.Table]
    matches: pa.Table
    agreement: pa.Table
    summary: pa.Table
    scores: pa.Table | None
    truth: GroundTruth | None
    seconds: float = 0.0
    failed: list[str] = field(default_factory=list)

    @property
    def n_failed(self) -> int:
        return len(self.failed)


def _ok_files(rows: Sequence[Mapping[str, Any]], variant: str) -> dict[str, Mapping[str, Any]]:
    return {r["file"]: r for r in rows if r["variant"] == variant and r["status"] == "ok"}


def _summary_rows(comparison: Comparison, rows: Sequence[Mapping[str, Any]], events: Mapping[str, pa.Table],
                  scores: pa.Table | None) -> list[dict[str, Any]]:
    overall = {}
    if scores is not None:
        for s in scores.to_pylist():
            if s["stratum"] == "all":
                overall[s["variant"]] = s
    out = []
    for variant in comparison.variants:
        ok = _ok_files(rows, variant.name)
        failed = [r for r in rows if r["variant"] == variant.name and r["status"] == "failed"]
        table = events[variant.name]
        duration = float(sum(r["duration_s"] for r in ok.values()))

        def median_abs(column: str, t: pa.Table = table) -> float:
            values = np.abs(_floats(t, column)) if t.num_rows else np.empty(0)
            values = values[np.isfinite(values)]
            return float(np.median(values)) if values.size else math.nan

        noise = [r["noise_rms_A"] for r in ok.values() if r["noise_rms_A"] is not None]
        score = overall.get(variant.name, {})
        out.append({
            "variant": variant.name, "detector": variant.pipeline.detector_spec.name,
            "filters": " > ".join(s.name for s in variant.pipeline.filter_specs) or "(none)",
            "pipeline_hash": variant.pipeline.hash, "files_ok": len(ok), "files_failed": len(failed),
            "duration_s": duration, "n_events": table.num_rows,
            "event_rate_per_s": _ratio(table.num_rows, duration),
            "median_abs_charge_C": median_abs("charge_C"), "median_abs_peak_A": median_abs("peak_A"),
            "median_duration_s": median_abs("duration_s"), "median_snr": median_abs("snr"),
            "noise_rms_A": float(np.median(noise)) if noise else math.nan,
            "seconds": float(sum(r["seconds"] or 0.0 for r in rows if r["variant"] == variant.name)),
            "n_truth": score.get("n_truth"), "precision": score.get("precision", math.nan),
            "recall": score.get("recall", math.nan), "f1": score.get("f1", math.nan),
            "false_per_s": score.get("false_per_s", math.nan),
        })
    return out


def _score_all(comparison: Comparison, truth: GroundTruth, rows, events, snr_edges) -> pa.Table:
    tables = []
    for variant in comparison.variants:
        ok = _ok_files(rows, variant.name)
        files = [f for f in truth.files if f in ok]
        tables.append(score_against_truth(
            truth, events[variant.name], {f: ok[f]["sample_rate_hz"] for f in files},
            durations={f: ok[f]["duration_s"] for f in files}, variant=variant.name, snr_edges=snr_edges,
            files=files))
    return pa.concat_tables(tables)


def _all_matches(comparison: Comparison, rows, events, truth: GroundTruth | None) -> pa.Table:
    names = comparison.names
    tables = []
    for i, name_a in enumerate(names):
        ok_a = _ok_files(rows, name_a)
        for name_b in names[i + 1:]:
            ok_b = _ok_files(rows, name_b)
            files = [f for f in ok_a if f in ok_b]
            fs = {f: ok_a[f]["sample_rate_hz"] for f in files}
            tables.append(_match_table(_match_columns(events[name_a], events[name_b], fs, files), name_a, name_b))
    if truth is not None:
        for name in names:
            ok = _ok_files(rows, name)
            files = [f for f in truth.files if f in ok]
            fs = {f: ok[f]["sample_rate_hz"] for f in files}
            tables.append(_match_table(_match_columns(truth.events, events[name], fs, files, a_id="truth_id"),
                                       TRUTH, name))
    return pa.concat_tables(tables) if tables else schema_for(MATCH_COLUMNS).empty_table()


def _prepare_folder(out: Path, marker: str, identity: str, overwrite: bool) -> None:
    """Create the output folder; refuse to mix results of a different comparison unless ``overwrite``."""
    marker_path = out / marker
    if marker_path.exists():
        try:
            previous = json.loads(marker_path.read_text(encoding="utf-8")).get("comparison_hash")
        except (OSError, json.JSONDecodeError):
            previous = None
        if previous != identity and not overwrite:
            raise ImpactlineError(f"{out} holds results of a different comparison (hash {str(previous)[:12]}, now "
                                  f"{identity[:12]}); choose another --out folder or pass --overwrite")
    elif out.exists() and any(out.iterdir()) and not overwrite:
        raise ImpactlineError(f"{out} exists and is not an impactline comparison folder; choose another --out "
                              "folder or pass --overwrite")
    for name in _OUTPUT_DIRS:
        shutil.rmtree(out / name, ignore_errors=True)
    for name in _OUTPUT_FILES:
        (out / name).unlink(missing_ok=True)
    out.mkdir(parents=True, exist_ok=True)


def _files_table(results: Sequence[RecordingComparison], identity: str) -> pa.Table:
    return table_from_rows([row for r in results for row in r.rows],
                           schema_for(COMPARE_FILE_COLUMNS, {"impactline.comparison_hash": identity}))


def _record(comparison: Comparison, paths, command, started_at: datetime, extra: Mapping[str, Any]) -> dict:
    shared, separate = comparison.filter_passes()
    return {
        "impactline_version": __version__, "comparison_name": comparison.name, "comparison_hash": comparison.hash,
        "sources": comparison.sources, "description": comparison.description,
        "variants": [{"name": v.name, "origin": v.origin, "pipeline_hash": v.pipeline.hash,
                      "pipeline_file": f"variants/{v.name}.toml", "resolved": v.pipeline.resolved()}
                     for v in comparison.variants],
        "filter_sharing": {"stages_run_per_file": shared, "stages_without_sharing": separate,
                           "tree": comparison.filter_tree_summary()},
        "packages": package_versions(), "python": sys.version.split()[0],
        "command": list(command) if command is not None else None, "inputs": [str(p) for p in paths],
        "started": started_at.isoformat(), "finished": datetime.now(UTC).isoformat(), **extra,
    }


def compare(comparison: Comparison, inputs: Sequence[str | Path], out_dir: str | Path | None = None, *,
            truth: str | Path | bool | None = True, jobs: int = 1, overwrite: bool = False,
            snr_edges: Sequence[float] = DEFAULT_SNR_EDGES, command: Sequence[str] | None = None,
            on_file: Callable[[RecordingComparison, int, int], None] | None = None,
            on_progress: Callable[[int, int | None], None] | None = None) -> ComparisonResult:
    """Run every variant over the recordings (each read once) and compare them.

    Parameters
    ----------
    comparison : Comparison
        The variants.
    inputs : sequence of path-like
        Recordings, folders or glob patterns.
    out_dir : path-like, optional
        Comparison folder; without it nothing is written.
    truth : path-like, bool or None
        A truth file (hand marks, CSV/Parquet); True (default) looks for ``NAME.truth.parquet`` beside each
        recording; False or None scores nothing.
    jobs : int
        Worker processes (files in parallel).
    overwrite : bool
        Replace a folder holding another comparison's results.
    snr_edges : sequence of float
        SNR band edges for the scores.
    command : sequence of str, optional
        Command line recorded in ``comparison.json``.
    on_file, on_progress : callable, optional
        ``on_file(result, done, total)`` after each file; ``on_progress(samples, n_samples)`` within a file.

    Returns
    -------
    ComparisonResult

    Raises
    ------
    InputError
        When the truth file cannot be read or names unknown recordings.
    """
    started_at = datetime.now(UTC)
    started = time.perf_counter()
    paths = _recordings(inputs, truth)
    out = Path(out_dir) if out_dir is not None else None
    ground = None
    if truth is not None and truth is not False:
        ground = find_truth(paths, None if truth is True else truth)
    if out is not None:
        _prepare_folder(out, COMPARISON_JSON, comparison.hash, overwrite)
    results = _run_files(comparison, paths, jobs, on_file, on_progress)
    rows = [row for r in results for row in r.rows]
    events = _variant_events(comparison, results)
    matches = _all_matches(comparison, rows, events, ground)
    pairs = _filter_pairs(matches, lambda a, b: a != TRUTH)
    agreement = agreement_table(pairs)
    scores = _score_all(comparison, ground, rows, events, snr_edges) if ground is not None else None
    summary = table_from_rows(_summary_rows(comparison, rows, events, scores), schema_for(SUMMARY_COLUMNS))
    files = _files_table(results, comparison.hash)
    failed = sorted({r["file"] for r in rows if r["status"] == "failed"})
    result = ComparisonResult(comparison, out, files, events, matches, agreement, summary, scores, ground,
                              time.perf_counter() - started, failed)
    if out is not None:
        _write_comparison(result, paths, command, started_at)
    return result


def _recordings(inputs: Sequence[str | Path], truth: str | Path | bool | None) -> list[Path]:
    """Inputs expanded to recordings: besides the runner's exclusions, pipeline files and the truth file."""
    skip = {str(Path(truth).resolve())} if isinstance(truth, (str, os.PathLike)) else set()
    return [p for p in expand_inputs(inputs) if p.suffix.lower() != ".toml" and str(p.resolve()) not in skip]


def _filter_pairs(matches: pa.Table, keep: Callable[[str, str], bool]) -> pa.Table:
    a = matches.column("variant_a").to_pylist()
    b = matches.column("variant_b").to_pylist()
    return matches.filter(pa.array([keep(x, y) for x, y in zip(a, b, strict=True)], pa.bool_()))


def _meta(table: pa.Table, comparison: Comparison, **extra: str) -> pa.Table:
    metadata = dict(table.schema.metadata or {})
    metadata.update({b"impactline.comparison_hash": comparison.hash.encode(),
                     b"impactline.version": __version__.encode()})
    metadata.update({f"impactline.{k}".encode(): str(v).encode() for k, v in extra.items()})
    return table.replace_schema_metadata(metadata)


def _write_comparison(result: ComparisonResult, paths, command, started_at: datetime) -> None:
    out = result.out_dir
    comparison = result.comparison
    for variant in comparison.variants:
        (out / "variants").mkdir(parents=True, exist_ok=True)
        temporary = out / "variants" / f".{variant.name}.toml.{os.getpid()}.tmp"
        temporary.write_text(variant.text, encoding="utf-8")
        os.replace(temporary, out / "variants" / f"{variant.name}.toml")
        write_table_atomic(_meta(result.events[variant.name], comparison, variant=variant.name),
                           out / "events" / f"{variant.name}.parquet")
    write_table_atomic(result.files, out / "files.parquet")
    write_table_atomic(_meta(result.matches, comparison), out / "matches.parquet")
    write_table_atomic(_meta(result.agreement, comparison), out / "agreement.parquet")
    write_table_atomic(_meta(result.summary, comparison), out / "summary.parquet")
    if result.scores is not None:
        write_table_atomic(_meta(result.scores, comparison), out / "scores.parquet")
    extra = {"truth_sources": result.truth.sources if result.truth else {},
             "files_failed": result.failed}
    write_json_atomic(_record(comparison, paths, command, started_at, extra), out / COMPARISON_JSON)


# ================================================================================================ sweep
_PARAM_PATH_RE = re.compile(r"^(?P<stage>detector|classifier|filter\[(?P<fi>\d+)\]|measure\[(?P<mi>\d+)\])\."
                            r"(?P<key>[A-Za-z_][A-Za-z0-9_]*)$")


def parse_sweep_values(text: str) -> list[Any]:
    """Values of a sweep: ``"3:8:0.5"`` (start:stop:step, stop included) or ``"3,4,6"`` / ``"10 kHz, 20 kHz"``.

    Raises
    ------
    ValueError
        With the accepted forms.
    """
    text = text.strip()
    if ":" in text and "," not in text:
        parts = text.split(":")
        try:
            start, stop, step = (float(p) for p in parts) if len(parts) == 3 else (None, None, None)
        except ValueError:
            start = None
        if start is None or step == 0 or (stop - start) / step < 0:
            raise ValueError(f"sweep values {text!r}: expected start:stop:step with numbers (stop included, "
                             "e.g. 3:8:0.5), or a comma-separated list such as 3,4,6 or \"10 kHz, 20 kHz\"")
        count = int(math.floor((stop - start) / step + 1e-9)) + 1
        if count > 1000:
            raise ValueError(f"sweep values {text!r}: {count} points; at most 1000")
        return [float(round(start + i * step, 12)) for i in range(count)]
    values: list[Any] = []
    for item in (p.strip() for p in text.split(",")):
        if not item:
            raise ValueError(f"sweep values {text!r}: empty item; write e.g. 3,4,6")
        try:
            number = float(item)
            values.append(int(number) if number.is_integer() and "." not in item and "e" not in item.lower()
                          else number)
        except ValueError:
            values.append(item)
    return values


def _stage_slot(recipe: VariantRecipe, path: str) -> tuple[list | None, int | None, str]:
    match = _PARAM_PATH_RE.match(path)
    if match is None:
        raise ValueError(f"parameter {path!r}: expected detector.KEY, filter[i].KEY, measure[i].KEY or "
                         "classifier.KEY (i counts from 0 over the variant's whole chain, shared stages first)")
    if match["fi"] is not None:
        return recipe.filters, int(match["fi"]), match["key"]
    if match["mi"] is not None:
        return recipe.measures, int(match["mi"]), match["key"]
    return None, None, match["key"]


def sweep_comparison(comparison: Comparison, parameter: str, values: Sequence[Any]
                     ) -> tuple[Comparison, list[dict[str, Any]], list[str]]:
    """Expand each variant that has ``parameter`` into one variant per value.

    Parameters
    ----------
    comparison : Comparison
    parameter : str
        ``detector.KEY``, ``filter[i].KEY``, ``measure[i].KEY`` or ``classifier.KEY``.
    values : sequence
        Values as they would be written in a pipeline file (numbers or text with units).

    Returns
    -------
    comparison : Comparison
        The expanded variants, named ``VARIANT@KEY=VALUE``.
    points : list of dict
        For each (variant, value): ``name`` (the expanded variant that computes it; variants that become the
        same pipeline at a value share one), ``variant``, ``value`` (SI), ``value_text``, ``unit``.
    skipped : list of str
        Variants left out, with the reason.

    Raises
    ------
    PipelineError
        When no variant has the parameter or a value does not fit it.
    """
    kind = parameter.split(".", 1)[0].split("[", 1)[0]
    variants, points, skipped, problems = [], [], [], []
    unit = ""
    for variant in comparison.variants:
        recipe = variant.recipe
        stages, index, key = _stage_slot(recipe, parameter)
        if stages is None:
            slot = recipe.detector if kind == "detector" else recipe.classifier
        else:
            slot = stages[index] if index < len(stages) else None
        if slot is None:
            skipped.append(f"{variant.name}: has no {parameter.rsplit('.', 1)[0]}")
            continue
        registry = variant.pipeline.registry
        try:
            cls = registry.get(kind, slot[0]).cls
        except KeyError as exc:
            skipped.append(f"{variant.name}: {exc.args[0]}")
            continue
        if key not in cls.params:
            skipped.append(f"{variant.name}: {kind} {slot[0]!r} has no parameter {key!r}")
            continue
        declared = cls.params[key]
        unit = declared.unit
        for value in values:
            try:
                si = declared.convert(f"{kind} {slot[0]!r}", key, value)
            except ParameterError as exc:
                problems.append(f"{variant.name}: {exc}")
                continue
            text = str(value)
            derived = copy.deepcopy(recipe)
            name = f"{variant.name}@{key}={text.replace(' ', '')}"
            derived.name = name
            target = derived.detector if stages is None and kind == "detector" else (
                derived.classifier if stages is None else
                (derived.filters if kind == "filter" else derived.measures)[index])
            target[1][key] = value
            try:
                pipeline = parse_pipeline(derived.text(), source=f"{variant.origin} ({name})", registry=registry)
            except PipelineError as exc:
                problems += exc.problems
                continue
            # Two variants may become the same pipeline at one value (they differed only in this parameter):
            # run it once and report it under both.
            twin = next((v.name for v in variants if v.pipeline.hash == pipeline.hash), None)
            if twin is None:
                variants.append(Variant(name=name, pipeline=pipeline, recipe=derived,
                                        origin=f"{variant.origin} sweep"))
            points.append({"name": twin or name, "variant": variant.name,
                           "value": float(si) if si is not None else math.nan, "value_text": text, "unit": unit})
    if problems:
        raise PipelineError(list(dict.fromkeys(problems)))
    if not variants:
        raise PipelineError([f"sweep: no variant has the parameter {parameter!r} ({'; '.join(skipped)})"])
    expanded = Comparison(name=f"{comparison.name} sweep {parameter}", variants=variants, sources=comparison.sources,
                          description=comparison.description, chunk_samples=comparison.chunk_samples)
    return expanded, points, skipped


@dataclass
class SweepResult:
    """Outcome of a parameter sweep.

    Attributes
    ----------
    table : pyarrow.Table
        :data:`SWEEP_COLUMNS`, one row per (variant, value), in value order.
    parameter : str
    unit : str
        SI unit of ``value``.
    skipped : list of str
        Variants without the parameter.
    files : pyarrow.Table
        One row per (file, expanded variant).
    out_dir : Path or None
    failed : list of str
    """

    table: pa.Table
    parameter: str
    unit: str
    skipped: list[str]
    files: pa.Table
    out_dir: Path | None = None
    failed: list[str] = field(default_factory=list)
    seconds: float = 0.0

    @property
    def n_failed(self) -> int:
        return len(self.failed)


def sweep(comparison: Comparison, inputs: Sequence[str | Path], parameter: str, values: Sequence[Any],
          out_dir: str | Path | None = None, *, truth: str | Path | bool | None = True, jobs: int = 1,
          overwrite: bool = False, keep_events: bool = False, command: Sequence[str] | None = None,
          on_file: Callable[[RecordingComparison, int, int], None] | None = None,
          on_progress: Callable[[int, int | None], None] | None = None) -> SweepResult:
    """Run each variant at every value of one parameter (each file read once) and tabulate the curve.

    With ground truth: recall (detection rate) against false detections per second, per variant. Without:
    events per second against the parameter.

    Parameters
    ----------
    comparison : Comparison
    inputs : sequence of path-like
    parameter : str
        ``detector.KEY``, ``filter[i].KEY``, ``measure[i].KEY`` or ``classifier.KEY``.
    values : sequence
        Values (see :func:`parse_sweep_values`).
    out_dir : path-like, optional
        Folder for ``sweep.parquet``, ``sweep.json``, ``files.parquet`` (and ``events/`` with keep_events).
    truth, jobs, overwrite, command, on_file, on_progress
        As for :func:`compare`.
    keep_events : bool
        Also write each swept variant's events.

    Returns
    -------
    SweepResult
    """
    started_at = datetime.now(UTC)
    started = time.perf_counter()
    expanded, points, skipped = sweep_comparison(comparison, parameter, values)
    paths = _recordings(inputs, truth)
    ground = None
    if truth is not None and truth is not False:
        ground = find_truth(paths, None if truth is True else truth)
    out = Path(out_dir) if out_dir is not None else None
    if out is not None:
        _prepare_folder(out, SWEEP_JSON, expanded.hash, overwrite)
    results = _run_files(expanded, paths, jobs, on_file, on_progress)
    rows = [row for r in results for row in r.rows]
    events = _variant_events(expanded, results)
    scores = _score_all(expanded, ground, rows, events, DEFAULT_SNR_EDGES) if ground is not None else None
    overall = {s["variant"]: s for s in scores.to_pylist() if s["stratum"] == "all"} if scores is not None else {}
    curve = []
    for point in points:
        ok = _ok_files(rows, point["name"])
        duration = float(sum(r["duration_s"] for r in ok.values()))
        n_events = events[point["name"]].num_rows
        score = overall.get(point["name"], {})
        curve.append({"variant": point["variant"], "parameter": parameter, "value": point["value"],
                      "value_text": point["value_text"], "n_files": len(ok), "duration_s": duration,
                      "n_events": n_events, "events_per_s": _ratio(n_events, duration),
                      "n_truth": score.get("n_truth"), "tp": score.get("tp"), "fp": score.get("fp"),
                      "fn": score.get("fn"), "recall": score.get("recall", math.nan),
                      "precision": score.get("precision", math.nan), "f1": score.get("f1", math.nan),
                      "false_per_s": score.get("false_per_s", math.nan)})
    curve.sort(key=lambda r: ([p["variant"] for p in points].index(r["variant"]), r["value"]))
    unit = points[0]["unit"] if points else ""
    columns = dict(SWEEP_COLUMNS)
    columns["value"] = Column("float64", unit, f"value of {parameter} (SI)")
    table = table_from_rows(curve, schema_for(columns, {"impactline.comparison_hash": expanded.hash}))
    files = _files_table(results, expanded.hash)
    failed = sorted({r["file"] for r in rows if r["status"] == "failed"})
    result = SweepResult(table, parameter, unit, skipped, files, out, failed, time.perf_counter() - started)
    if out is not None:
        write_table_atomic(table, out / "sweep.parquet")
        write_table_atomic(files, out / "files.parquet")
        if keep_events:
            for name, t in events.items():
                write_table_atomic(_meta(t, expanded, variant=name), out / "events" / f"{_safe_name(name)}.parquet")
        extra = {"parameter": parameter, "values": [str(v) for v in values], "skipped_variants": skipped,
                 "truth_sources": ground.sources if ground else {}, "files_failed": failed}
        write_json_atomic(_record(expanded, paths, command, started_at, extra), out / SWEEP_JSON)
    return result


# ================================================================================================ printing
def _q(value: Any, unit: str, digits: int = 3) -> str:
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "-"
    return format_quantity(float(value), unit, digits)


def _n(value: Any, fmt: str = "{:.3g}") -> str:
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "-"
    return fmt.format(value)


def _grid(header: Sequence[str], rows: Sequence[Sequence[str]], first_left: bool = True) -> list[str]:
    widths = [max(len(str(x)) for x in col) for col in zip(header, *rows, strict=True)]

    def line(cells):
        return "  ".join(str(c).ljust(w) if (i == 0 and first_left) else str(c).rjust(w)
                         for i, (c, w) in enumerate(zip(cells, widths, strict=True)))

    return [line(header), "  ".join("-" * w for w in widths)] + [line(r) for r in rows]


def format_comparison(result: ComparisonResult) -> str:
    """Side-by-side summary of the variants, their pairwise agreement and (with truth) their scores."""
    summary = result.summary.to_pylist()
    names = [s["variant"] for s in summary]
    lines = [f"comparison {result.comparison.name} ({result.comparison.hash[:12]}): {len(names)} variants, "
             f"{len({r['file'] for r in result.files.to_pylist()})} files"]
    shared, separate = result.comparison.filter_passes()
    if separate:
        lines.append(f"filter stages run per file: {shared} (instead of {separate} without sharing)")
    metrics = [
        ("detector", lambda s: s["detector"]),
        ("filters", lambda s: s["filters"]),
        ("files ok / failed", lambda s: f"{s['files_ok']} / {s['files_failed']}"),
        ("events", lambda s: str(s["n_events"])),
        ("events per s", lambda s: _n(s["event_rate_per_s"])),
        ("median |charge|", lambda s: _q(s["median_abs_charge_C"], "C")),
        ("median |peak|", lambda s: _q(s["median_abs_peak_A"], "A")),
        ("median duration", lambda s: _q(s["median_duration_s"], "s")),
        ("median snr", lambda s: _n(s["median_snr"])),
        ("noise rms", lambda s: _q(s["noise_rms_A"], "A")),
        ("own time", lambda s: f"{s['seconds']:.2f} s"),
    ]
    if result.scores is not None:
        metrics += [
            ("truth events", lambda s: _n(s["n_truth"], "{}")),
            ("precision", lambda s: _n(s["precision"], "{:.3f}")),
            ("recall", lambda s: _n(s["recall"], "{:.3f}")),
            ("F1", lambda s: _n(s["f1"], "{:.3f}")),
            ("false per s", lambda s: _n(s["false_per_s"])),
        ]
    lines += [""] + _grid(["", *names], [[label, *(get(s) for s in summary)] for label, get in metrics])
    agreement = result.agreement.to_pylist()
    if agreement:
        lines += ["", "pairwise agreement (differences are B - A over matched events; median, IQR)"]
        lines += _grid(["A", "B", "matched", "only A", "only B", "Jaccard", "onset diff", "charge diff"], [
            [a["variant_a"], a["variant_b"], str(a["matched"]), str(a["only_a"]), str(a["only_b"]),
             f"{a['jaccard']:.3f}", f"{_q(a['onset_diff_median_s'], 's')}, {_q(a['onset_diff_iqr_s'], 's')}",
             f"{_q(a['charge_diff_median_C'], 'C')}, {_q(a['charge_diff_iqr_C'], 'C')}"] for a in agreement])
    if result.scores is not None:
        scores = result.scores.to_pylist()
        strata = list(dict.fromkeys((s["stratum"], s["value"]) for s in scores if s["stratum"] != "all"))
        by_key = {(s["variant"], s["stratum"], s["value"]): s for s in scores}
        if strata:
            lines += ["", "recall by truth class and true SNR band (matched / truth events)"]
            table_rows = []
            for stratum, value in strata:
                cells = []
                for name in names:
                    s = by_key.get((name, stratum, value))
                    cells.append("-" if s is None or not s["n_truth"] else f"{s['recall']:.2f} ({s['tp']}/"
                                                                             f"{s['n_truth']})")
                table_rows.append([f"{stratum} {value}", *cells])
            lines += _grid(["", *names], table_rows)
        errors = [[name, _q(by_key[(name, 'all', 'all')]["onset_error_median_s"], "s"),
                   _q(by_key[(name, 'all', 'all')]["onset_error_iqr_s"], "s"),
                   _q(by_key[(name, 'all', 'all')]["start_error_median_s"], "s"),
                   _q(by_key[(name, 'all', 'all')]["charge_error_median_C"], "C"),
                   _n(by_key[(name, 'all', 'all')]["charge_error_rel_median"], "{:+.3f}")]
                  for name in names if (name, "all", "all") in by_key]
        lines += ["", "errors against truth (detected - true, matched events; onset: onset_s, start: start_s)"]
        lines += _grid(["variant", "onset median", "onset IQR", "start median", "charge median",
                        "charge rel. median"], errors)
    for row in result.files.to_pylist():
        if row["status"] == "failed":
            lines.append(f"FAILED {row['variant']} on {row['file']}: {str(row['error']).splitlines()[0]}")
    lines.append(f"time: {result.seconds:.2f} s")
    if result.out_dir is not None:
        lines.append(f"results: {result.out_dir}")
    return "\n".join(lines)


def format_sweep(result: SweepResult) -> str:
    """The sweep curve, one block per variant."""
    rows = result.table.to_pylist()
    has_truth = any(r["n_truth"] is not None for r in rows)
    lines = [f"sweep of {result.parameter} ({'recall vs false detections per s' if has_truth else 'events per s'})"]
    for name in dict.fromkeys(r["variant"] for r in rows):
        lines += ["", f"variant {name}"]
        header = [result.parameter, "events", "events per s"]
        if has_truth:
            header += ["recall", "precision", "F1", "false per s"]
        body = []
        for r in (r for r in rows if r["variant"] == name):
            cells = [_q(r["value"], result.unit, 4) if result.unit else _n(r["value"], "{:g}"), str(r["n_events"]),
                     _n(r["events_per_s"])]
            if has_truth:
                cells += [_n(r["recall"], "{:.3f}"), _n(r["precision"], "{:.3f}"), _n(r["f1"], "{:.3f}"),
                          _n(r["false_per_s"])]
            body.append(cells)
        lines += _grid(header, body)
    for note in result.skipped:
        lines.append(f"not swept: {note}")
    for file in result.failed:
        lines.append(f"FAILED (some variants) {file}")
    lines.append(f"time: {result.seconds:.2f} s")
    if result.out_dir is not None:
        lines.append(f"results: {result.out_dir}")
    return "\n".join(lines)


# ================================================================================================ command line
def _split_items(items: Sequence[str]) -> tuple[list[str], list[str]]:
    specs = []
    for item in items:
        if not item.lower().endswith(".toml"):
            break
        specs.append(item)
    inputs = list(items[len(specs):])
    late = [i for i in inputs if i.lower().endswith(".toml")]
    if late:
        raise ValueError(f"{late[0]}: give the comparison or pipeline files (.toml) first, then the recordings")
    return specs, inputs


def _snr_edges(text: str) -> tuple[float, ...]:
    try:
        inner = sorted({float(x) for x in text.split(",") if x.strip()})
    except ValueError:
        raise ValueError(f"--snr-bands {text!r}: expected comma-separated numbers such as 3,5,8,12,20") from None
    if not inner or inner[0] <= 0 or not all(math.isfinite(x) for x in inner):
        raise ValueError(f"--snr-bands {text!r}: expected positive finite band edges such as 3,5,8,12,20")
    return (0.0, *inner, math.inf)


class _FileProgress:
    def __init__(self, quiet: bool):
        self.quiet = quiet
        self.tty = sys.stderr.isatty()
        self._last = 0.0

    def file_done(self, result: RecordingComparison, done: int, total: int) -> None:
        if self.quiet:
            return
        if len(result.rows) <= 6:
            detail = ", ".join(f"{r['variant']} {r['n_events'] if r['status'] == 'ok' else 'FAILED'}"
                               for r in result.rows)
        else:
            ok = [r for r in result.rows if r["status"] == "ok"]
            detail = f"{len(ok)}/{len(result.rows)} variants ok"
        status = "ok" if result.ok else "failed"
        prefix = "\r\033[K" if self.tty else ""
        sys.stderr.write(f"{prefix}[{done}/{total}] {status:6s} {result.path.name}: {detail}\n")
        sys.stderr.flush()

    def samples(self, done: int, total: int | None) -> None:
        if self.quiet or not self.tty or not total:
            return
        now = time.perf_counter()
        if now - self._last < 0.2:
            return
        self._last = now
        sys.stderr.write(f"\r  {100 * min(done / total, 1.0):5.1f}% of the file")
        sys.stderr.flush()


def _common_setup(args: argparse.Namespace):
    specs, inputs = _split_items(args.items)
    if not specs:
        raise ValueError("no comparison or pipeline file (.toml) given; write e.g. impactline "
                         f"{args.command} variants.toml recordings/*.bin --out DIR")
    paths = _recordings(inputs, args.truth)
    if not paths:
        raise ValueError(f"no recording matches {' '.join(inputs) or '(nothing given)'}; name recordings, folders "
                         "or glob patterns after the .toml files")
    truth: str | bool = False if args.no_truth else (args.truth or True)
    return load_comparison(specs), paths, truth


def _guarded(handler: Callable[[argparse.Namespace], int]) -> Callable[[argparse.Namespace], int]:
    def run(args: argparse.Namespace) -> int:
        try:
            return handler(args)
        except PipelineError as exc:
            print("impactline: invalid comparison:", file=sys.stderr)
            for problem in exc.problems:
                print(f"  {problem}", file=sys.stderr)
            return EXIT_USAGE
        except (ImpactlineError, ValueError) as exc:
            print(f"impactline: {exc}", file=sys.stderr)
            return EXIT_USAGE

    run.__doc__ = handler.__doc__
    return run


def _cmd_compare(args: argparse.Namespace) -> int:
    """``impactline compare``: run the variants, print the side-by-side table, write the folder."""
    comparison, paths, truth = _common_setup(args)
    edges = _snr_edges(args.snr_bands)
    progress = _FileProgress(args.quiet)
    result = compare(comparison, paths, args.out, truth=truth, jobs=args.jobs, overwrite=args.overwrite,
                     snr_edges=edges, command=sys.argv, on_file=progress.file_done, on_progress=progress.samples)
    print(format_comparison(result))
    return EXIT_FILES_FAILED if result.n_failed else EXIT_OK


def _cmd_sweep(args: argparse.Namespace) -> int:
    """``impactline sweep``: one parameter over a range, the detection / false-alarm curve per variant."""
    comparison, paths, truth = _common_setup(args)
    values = parse_sweep_values(args.values)
    _stage_slot(VariantRecipe(name="check"), args.param)  # refuse a malformed path before any work
    progress = _FileProgress(args.quiet)
    result = sweep(comparison, paths, args.param, values, args.out, truth=truth, jobs=args.jobs,
                   overwrite=args.overwrite, keep_events=args.keep_events, command=sys.argv,
                   on_file=progress.file_done, on_progress=progress.samples)
    print(format_sweep(result))
    return EXIT_FILES_FAILED if result.n_failed else EXIT_OK


def register_cli(subparsers: Any) -> None:
    """Add the ``compare`` and ``sweep`` sub-commands to the ``impactline`` parser."""
    def common(p: argparse.ArgumentParser) -> None:
        p.add_argument("items", nargs="+", metavar="FILE",
                       help="a comparison file and/or pipeline files (.toml) first, then recordings, folders or "
                            "glob patterns")
        p.add_argument("--out", required=True, help="folder for the results")
        p.add_argument("--truth", help="hand-marked events (CSV or Parquet: file,start_s,end_s[,label]); default: "
                                       "NAME.truth.parquet beside each recording when present")
        p.add_argument("--no-truth", action="store_true", help="do not score against ground truth")
        p.add_argument("--jobs", type=int, default=1, help="worker processes (files in parallel; default 1)")
        p.add_argument("--overwrite", action="store_true", help="replace a folder holding other results")
        p.add_argument("--quiet", action="store_true", help="no progress output")

    p = subparsers.add_parser(
        "compare", help="run several detectors or stage chains over the same recordings (each read once) and "
                        "compare their events, with ground-truth scores when available")
    common(p)
    p.add_argument("--snr-bands", default="3,5,8,12,20", help="inner SNR band edges for the scores "
                                                              "(default 3,5,8,12,20)")
    p.set_defaults(func=_guarded(_cmd_compare))

    p = subparsers.add_parser(
        "sweep", help="run variants over a range of one parameter: detection rate vs false alarms (with truth) or "
                      "event rate (without)")
    common(p)
    p.add_argument("--param", required=True, help="parameter path: detector.KEY, filter[i].KEY, measure[i].KEY")
    p.add_argument("--values", required=True, help="start:stop:step (stop included) or a list: 3,4,5 / "
                                                   "\"10 kHz,20 kHz\"")
    p.add_argument("--keep-events", action="store_true", help="also write each swept variant's events")
    p.set_defaults(func=_guarded(_cmd_sweep))
