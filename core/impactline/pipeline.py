"""Pipeline files: a declarative TOML description of which stages run, in which order, with what settings.

Syntax
------
::

    [pipeline]
    name = "copper-ink"              # free text, shown in summaries
    chunk_samples = 1048576          # optional: samples per streaming chunk

    [plugins]
    local = ["labreader.py"]         # optional: local plugin files, relative to this file

    [reader]                         # optional: default is automatic choice by extension and content
    use = "raw"                      # or "auto"
    sample_rate = "250 kHz"          # any parameter of that reader

    [[filter]]                       # zero or more, applied in order
    use = "bessel"
    cutoff = "20 kHz"

    [detector]                       # exactly one
    use = "threshold"
    k_sigma = 5

    [[measure]]                      # zero or more feature extractors
    use = "pulse_shape"

    [classifier]                     # optional, runs over all events of the run
    use = "kmeans"

    [sizing]                         # optional: charge -> equivalent spherical diameter (Faraday's law)
    material = "Cu"                  # a name from impactline.physics, or give the three values below
    electrons = 2                    # optional override of electrons per atom
    # molar_mass = "63.546 g/mol"; density = "8.96 g/cm^3"

    [collision_rate]                 # optional: measured rate vs the diffusion-limited prediction
    electrode_radius = "5 um"        # disc microelectrode
    concentration = "150 pM"         # particles
    temperature = "298.15 K"         # default 25 C; viscosity defaults to water at that temperature
    # particle_diameter = "50 nm"    # default: the file's median measured diameter ([sizing] needed)

Nothing in a pipeline file can run code except the local plugin files it names explicitly.
"""

from __future__ import annotations

import hashlib
import json
import os
import tomllib
from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path
from typing import Any

from .errors import PipelineError, PluginError
from .params import Param, ParameterError, resolve_params
from .registry import PluginRegistry, default_registry
from .stages import Classifier, Detector, FeatureExtractor, Filter, Reader

__all__ = ["Pipeline", "StageSpec", "load_pipeline", "parse_pipeline", "check_pipeline"]

DEFAULT_CHUNK_SAMPLES = 1 << 20
_TOP_LEVEL = ("pipeline", "plugins", "reader", "filter", "detector", "measure", "classifier", "sizing",
              "collision_rate")
_PIPELINE_KEYS = {
    "name": Param("", kind=str, doc="name shown in summaries"),
    "description": Param("", kind=str, doc="free text"),
    "chunk_samples": Param(DEFAULT_CHUNK_SAMPLES, kind=int, low=256, high=1 << 28,
                           doc="samples per streaming chunk"),
}
_RATE_KEYS = {
    "electrode_radius": Param(None, unit="m", low=0, low_inclusive=False, doc="disc microelectrode radius"),
    "concentration": Param(None, unit="mol/m^3", low=0, low_inclusive=False,
                           doc="particle concentration (\"10 pM\" is accepted)"),
    "temperature": Param(298.15, unit="K", low=250, high=400, doc="solution temperature"),
    "viscosity": Param(None, unit="Pa s", low=0, low_inclusive=False,
                       doc="solution viscosity; default: water at the temperature (IAPWS 2008)"),
    "particle_diameter": Param(None, unit="m", low=0, low_inclusive=False,
                               doc="particle diameter for the diffusion coefficient; default: the file's median "
                                   "measured diameter (needs [sizing])"),
}
_SIZING_KEYS = {
    "material": Param(None, kind=str, doc="material name (see impactline.physics.MATERIALS)"),
    "electrons": Param(None, kind=float, low=0, low_inclusive=False, doc="electrons transferred per atom"),
    "molar_mass": Param(None, unit="kg/mol", low=0, low_inclusive=False, doc="molar mass"),
    "density": Param(None, unit="kg/m^3", low=0, low_inclusive=False, doc="density"),
}


@dataclass
class StageSpec:
    """One stage as written in a pipeline file (kind, name, raw parameters, and where it was written)."""

    kind: str
    name: str
    params: dict[str, Any]
    key: str


@dataclass
class Pipeline:
    """A validated pipeline, ready to run.

    Build one with :func:`load_pipeline` (from a file) or :func:`parse_pipeline` (from text).
    """

    text: str
    source: str
    registry: PluginRegistry
    name: str
    chunk_samples: int
    reader_spec: StageSpec
    filter_specs: list[StageSpec]
    detector_spec: StageSpec
    measure_specs: list[StageSpec]
    classifier_spec: StageSpec | None
    sizing: dict[str, Any] | None
    collision_rate: dict[str, Any] | None = None
    local_plugins: list[Path] = field(default_factory=list)

    # -------------------------------------------------------------------- stage instances
    def build_filters(self) -> list[Filter]:
        """Fresh filter instances (stages hold no per-file state, but each run builds its own)."""
        return [self.registry.create("filter", s.name, s.params) for s in self.filter_specs]

    def build_detector(self) -> Detector:
        return self.registry.create("detector", self.detector_spec.name, self.detector_spec.params)

    def build_measures(self) -> list[FeatureExtractor]:
        return [self.registry.create("measure", s.name, s.params) for s in self.measure_specs]

    def build_classifier(self) -> Classifier | None:
        if self.classifier_spec is None:
            return None
        return self.registry.create("classifier", self.classifier_spec.name, self.classifier_spec.params)

    def build_reader(self, path: Path) -> Reader:
        """The reader for ``path``: the one named in the pipeline, or chosen by extension and content."""
        if self.reader_spec.name != "auto":
            return self.registry.create("reader", self.reader_spec.name, self.reader_spec.params)
        return self.registry.create("reader", choose_reader(self.registry, Path(path)), self.reader_spec.params)

    def material(self):
        """The sizing material (:class:`impactline.physics.Material`) or None."""
        if not self.sizing:
            return None
        from . import physics

        spec = {k: v for k, v in self.sizing.items() if v is not None}
        name = spec.pop("material", None)
        if name is not None:
            base = physics.get_material(name)
            if "electrons" in spec or "molar_mass" in spec or "density" in spec:
                return physics.get_material({
                    "name": base.name,
                    "molar_mass": spec.get("molar_mass", base.molar_mass_kg_per_mol),
                    "density": spec.get("density", base.density_kg_per_m3),
                    "electrons": spec.get("electrons", base.electrons),
                })
            return base
        return physics.get_material({"name": "custom", **spec})

    # -------------------------------------------------------------------- identity
    def resolved(self) -> dict[str, Any]:
        """The pipeline with every parameter resolved to SI values (defaults filled in)."""

        def stage(kind: str, spec: StageSpec) -> dict[str, Any]:
            entry = self.registry.get(kind, spec.name) if spec.name != "auto" else None
            params = entry.cls(**spec.params).get_params() if entry else dict(spec.params)
            out = {"use": spec.name, "params": params}
            if entry is not None:
                out["plugin"] = entry.plugin
                out["plugin_version"] = entry.plugin_version
                out["stage_version"] = entry.cls.version
            return out

        return {
            "reader": stage("reader", self.reader_spec),
            "filter": [stage("filter", s) for s in self.filter_specs],
            "detector": stage("detector", self.detector_spec),
            "measure": [stage("measure", s) for s in self.measure_specs],
            "classifier": stage("classifier", self.classifier_spec) if self.classifier_spec else None,
            "sizing": self.sizing,
            "collision_rate": self.collision_rate,
            "local_plugins": {str(p): self.registry.local_files.get(str(p.resolve()), "") for p in
                              self.local_plugins},
        }

    @cached_property
    def hash(self) -> str:
        """SHA-256 of the resolved pipeline: changes when any stage, setting or plugin version changes.

        Computed once: a pipeline is not changed after loading, and runs read the hash for every file.
        """
        canonical = json.dumps(self.resolved(), sort_keys=True, default=str)
        return hashlib.sha256(canonical.encode()).hexdigest()


def choose_reader(registry: PluginRegistry, path: Path) -> str:
    """Pick a reader name for ``path`` by extension, breaking ties (or finding one) by content sniffing."""
    from .errors import InputError

    readers = [e.cls for e in registry.stages("reader")]
    suffix = path.suffix.lower()
    by_extension = [cls for cls in readers if suffix in cls.extensions]
    try:
        with open(path, "rb") as handle:
            head = handle.read(4096)
    except OSError as exc:
        raise InputError(path, f"cannot be opened ({exc.strerror or exc})",
                         "check the path and the file's permissions") from None
    if not head:
        raise InputError(path, "file is empty (0 bytes)", "check that the acquisition finished writing it")
    sniffed = [cls for cls in (by_extension or readers) if _safe_sniff(cls, path, head)]
    if sniffed:
        return sniffed[0].name
    if len(by_extension) == 1:
        # A format with a magic number (HDF5 named .bin, say) is recognised by content even under a
        # misleading extension; otherwise the extension decides.
        elsewhere = [cls for cls in readers if cls not in by_extension and _safe_sniff(cls, path, head)]
        return (elsewhere or by_extension)[0].name
    if by_extension:
        return by_extension[0].name
    known = sorted({ext for cls in readers for ext in cls.extensions})
    raise InputError(path, f"no reader recognises extension {suffix!r} or the file's content",
                     f"name a reader in the pipeline's [reader] section (use = ...); known extensions: "
                     f"{', '.join(known)}")


def _safe_sniff(cls: type[Reader], path: Path, head: bytes) -> bool:
    try:
        return bool(cls.sniff(path, head))
    except Exception:
        return False


# ------------------------------------------------------------------------------------------------ loading
def load_pipeline(path: str | os.PathLike, registry: PluginRegistry | None = None) -> Pipeline:
    """Load and validate a pipeline file.

    Raises
    ------
    PipelineError
        Listing every problem found, each with the file and the key.
    """
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise PipelineError([f"{path}: cannot read pipeline file ({exc.strerror or exc})"]) from None
    except UnicodeDecodeError as exc:
        raise PipelineError([f"{path}: pipeline file is not UTF-8 text ({exc.reason} at byte {exc.start})"]) from None
    return parse_pipeline(text, source=str(path), base_dir=path.resolve().parent, registry=registry)


def check_pipeline(path: str | os.PathLike, registry: PluginRegistry | None = None) -> list[str]:
    """Return the list of problems of a pipeline file (empty when it is valid)."""
    try:
        load_pipeline(path, registry=registry)
    except PipelineError as exc:
        return exc.problems
    return []


def parse_pipeline(text: str, source: str = "<pipeline>", base_dir: Path | None = None,
                   registry: PluginRegistry | None = None) -> Pipeline:
    """Validate pipeline text and return a :class:`Pipeline` (see module docstring for the syntax)."""
    base_dir = base_dir or Path.cwd()
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise PipelineError([f"{source}: TOML syntax error: {exc}"]) from None
    problems: list[str] = []

    def problem(key: str, message: str) -> None:
        problems.append(f"{source}: {key}: {message}" if key else f"{source}: {message}")

    for key in data:
        if key not in _TOP_LEVEL:
            import difflib

            near = difflib.get_close_matches(key, _TOP_LEVEL, n=1)
            hint = f"did you mean [{near[0]}]? " if near else ""
            problem(f"[{key}]", f"unknown section; {hint}sections are {', '.join(_TOP_LEVEL)}")

    meta = _section(data, "pipeline", problem)
    try:
        meta_values = resolve_params("[pipeline]", _PIPELINE_KEYS, meta)
    except ParameterError as exc:
        problem(f"pipeline.{exc.key}", exc.reason)
        meta_values = {k: p.default for k, p in _PIPELINE_KEYS.items()}

    # Local plugins first: they may provide stages named below.
    plugin_section = _section(data, "plugins", problem)
    if registry is None:
        # Local plugins belong to their pipeline: they go into a registry of its own, so two pipelines
        # naming different local files that define a stage of the same name do not collide.
        registry = PluginRegistry() if plugin_section.get("local") else default_registry()
    local_plugins: list[Path] = []
    for key in plugin_section:
        if key != "local":
            problem(f"plugins.{key}", "unknown key; the only key is 'local' (a list of .py files)")
    local = plugin_section.get("local", [])
    if not isinstance(local, list) or not all(isinstance(p, str) for p in local):
        problem("plugins.local", "expected a list of file names, e.g. local = [\"labreader.py\"]")
        local = []
    for index, name in enumerate(local):
        plugin_path = (base_dir / name) if not Path(name).is_absolute() else Path(name)
        try:
            registry.load_local_file(plugin_path)
            local_plugins.append(plugin_path)
        except PluginError as exc:
            problem(f"plugins.local[{index}]", str(exc))

    reader_spec = _stage_spec(data.get("reader", {"use": "auto"}), "reader", "reader", registry, problem,
                              default_use="auto")
    filter_specs = [_stage_spec(item, "filter", f"filter[{i}]", registry, problem)
                    for i, item in enumerate(stage_array(data, "filter", problem))]
    if "detector" not in data:
        problem("[detector]", "missing section; add e.g. [detector] use = \"threshold\"")
        detector_spec = None
    else:
        detector_spec = _stage_spec(data["detector"], "detector", "detector", registry, problem)
    measure_specs = [_stage_spec(item, "measure", f"measure[{i}]", registry, problem)
                     for i, item in enumerate(stage_array(data, "measure", problem))]
    classifier_spec = None
    if "classifier" in data:
        classifier_spec = _stage_spec(data["classifier"], "classifier", "classifier", registry, problem)

    sizing = _settings_section(data, "sizing", _SIZING_KEYS, problem)
    collision_rate = _settings_section(data, "collision_rate", _RATE_KEYS, problem)
    if collision_rate is not None:
        for key in ("electrode_radius", "concentration"):
            if collision_rate[key] is None:
                problem(f"collision_rate.{key}", "required to predict the diffusion-limited rate")
        if collision_rate["particle_diameter"] is None and "sizing" not in data:
            problem("collision_rate.particle_diameter",
                    "give the particle diameter, or add a [sizing] section so the measured median is used")
    if problems:
        raise PipelineError(problems)
    pipeline = Pipeline(
        text=text, source=source, registry=registry, name=meta_values["name"] or Path(source).stem,
        chunk_samples=meta_values["chunk_samples"], reader_spec=reader_spec, filter_specs=filter_specs,
        detector_spec=detector_spec, measure_specs=measure_specs, classifier_spec=classifier_spec,
        sizing=sizing, collision_rate=collision_rate, local_plugins=local_plugins,
    )
    if sizing is not None:
        try:
            pipeline.material()
        except (KeyError, ValueError, TypeError) as exc:
            raise PipelineError([f"{source}: sizing: {exc}"]) from None
    _check_column_clashes(pipeline)
    return pipeline


def _check_column_clashes(pipeline: Pipeline) -> None:
    from .output import CONTRACT_COLUMNS

    owners: dict[str, str] = {name: "the core" for name in CONTRACT_COLUMNS}
    stages = [(f"detector {pipeline.detector_spec.name!r}", pipeline.registry.get(
        "detector", pipeline.detector_spec.name).cls)]
    stages += [(f"measure {s.name!r}", pipeline.registry.get("measure", s.name).cls) for s in pipeline.measure_specs]
    problems = []
    for label, cls in stages:
        for column in cls.columns:
            if column in owners:
                problems.append(f"{pipeline.source}: {label} writes column {column!r}, already written by "
                                f"{owners[column]}; list each measure once and avoid stages with clashing columns")
            owners[column] = label
    if problems:
        raise PipelineError(problems)


def _settings_section(data: dict, key: str, declared: dict[str, Param], problem) -> dict[str, Any] | None:
    """Resolve a plain settings section ([sizing], [collision_rate]); None when absent or invalid."""
    if key not in data:
        return None
    try:
        return resolve_params(f"[{key}]", declared, _section(data, key, problem))
    except ParameterError as exc:
        problem(f"{key}.{exc.key}", exc.reason)
        return None


def _section(data: dict, key: str, problem) -> dict:
    value = data.get(key, {})
    if not isinstance(value, dict):
        problem(f"[{key}]", f"expected a table ([{key}]), got {type(value).__name__}")
        return {}
    return value


def stage_array(data: dict, key: str, problem) -> list[dict]:
    value = data.get(key, [])
    if isinstance(value, dict):
        problem(f"[{key}]", f"write [[{key}]] (double brackets: an ordered list of stages), not [{key}]")
        return []
    if not isinstance(value, list) or not all(isinstance(v, dict) for v in value):
        problem(f"[{key}]", f"expected a list of tables ([[{key}]])")
        return []
    return value


def _stage_spec(table: Any, kind: str, key: str, registry: PluginRegistry, problem,
                default_use: str | None = None) -> StageSpec | None:
    if not isinstance(table, dict):
        problem(key, f"expected a table, got {type(table).__name__}")
        return None
    params = dict(table)
    name = params.pop("use", default_use)
    if name is None:
        problem(key, f"missing 'use' (which {kind} to run); see `impactline plugins {kind}`")
        return None
    if not isinstance(name, str):
        problem(key, f"use: expected a stage name, got {name!r}")
        return None
    if kind == "reader" and name == "auto":
        declared = Reader.params
        label = "reader 'auto'"
    else:
        try:
            entry = registry.get(kind, name)
        except KeyError as exc:
            problem(f"{key}.use", str(exc.args[0]))
            return None
        declared = entry.cls.params
        label = f"{kind} {name!r}"
    try:
        resolve_params(label, declared, params)
        if not (kind == "reader" and name == "auto"):
            registry.create(kind, name, params)
    except ParameterError as exc:
        problem(f"{key}.{exc.key}" if exc.key else key, f"{exc.reason} ({label})")
        return None
    except Exception as exc:  # a stage's own constructor check (e.g. inconsistent parameters)
        problem(key, f"{label} refused its parameters: {exc}")
        return None
    return StageSpec(kind=kind, name=name, params=params, key=key)
