"""The plugin registry: discovers plugins, checks their stages, and finds stages by kind and name.

Discovery
---------
* Entry points in the group ``impactline.plugins`` (the bundled stages are the entry point ``bundled``).
  Set ``IMPACTLINE_PLUGINS=bundled,mylab`` to load only the named entry points (reproducible runs), or
  ``IMPACTLINE_PLUGINS=`` (empty) to load none; ``IMPACTLINE_BLOCK_PLUGINS=name,...`` blocks some.
* Local ``.py`` files named in a pipeline file (:meth:`PluginRegistry.load_local_file`).

Every stage class is checked when its plugin registers: declared name, kind, summary, parameters and
columns; a name already taken in the same kind is refused with both plugins named.
"""

from __future__ import annotations

import difflib
import hashlib
import importlib.util
import inspect
import os
import re
import sys
from collections.abc import Iterable
from importlib import metadata
from pathlib import Path
from typing import Any

import pluggy

from . import hookspecs
from .errors import PluginError
from .params import Param
from .stages import (
    COLUMN_TYPES,
    KINDS,
    Classifier,
    Column,
    Detector,
    FeatureExtractor,
    Filter,
    Reader,
    Stage,
)

__all__ = ["PluginRegistry", "StageEntry", "default_registry", "KIND_BASES"]

KIND_BASES: dict[str, type[Stage]] = {
    "reader": Reader, "filter": Filter, "detector": Detector, "measure": FeatureExtractor,
    "classifier": Classifier,
}
_NAME_RE = re.compile(r"^[a-z][a-z0-9_\-]*$")
_REQUIRED_METHODS = {
    "reader": ("open",),
    "filter": ("start", "process", "finish"),
    "detector": ("start", "process", "finish", "lookback_samples"),
    "measure": ("measure",),
    "classifier": ("fit_predict",),
}


class StageEntry:
    """A registered stage class and where it came from."""

    def __init__(self, cls: type[Stage], plugin: str, plugin_version: str):
        self.cls = cls
        self.plugin = plugin
        self.plugin_version = plugin_version

    @property
    def name(self) -> str:
        return self.cls.name

    @property
    def kind(self) -> str:
        return self.cls.kind

    def __repr__(self) -> str:
        return f"<{self.kind} {self.name!r} from {self.plugin}>"


class PluginRegistry:
    """Holds the plugins of one session and the stages they provide.

    Parameters
    ----------
    autoload : bool
        Discover entry-point plugins now (honouring ``IMPACTLINE_PLUGINS`` / ``IMPACTLINE_BLOCK_PLUGINS``).
    entry_points : iterable, optional
        Entry-point objects to use instead of the installed ones (for tests: anything with ``.name`` and
        ``.load()``, optionally ``.dist``).
    """

    def __init__(self, autoload: bool = True, entry_points: Iterable[Any] | None = None):
        self.pm = pluggy.PluginManager(hookspecs.PROJECT)
        self.pm.add_hookspecs(hookspecs)
        self._stages: dict[str, dict[str, StageEntry]] = {kind: {} for kind in KINDS}
        self.plugin_versions: dict[str, str] = {}
        self.local_files: dict[str, str] = {}  # path -> sha256 of the file's text
        if autoload:
            self.load_entry_points(entry_points)

    # ------------------------------------------------------------------ discovery
    def load_entry_points(self, entry_points: Iterable[Any] | None = None) -> list[str]:
        """Register plugins from the ``impactline.plugins`` entry-point group; return their names."""
        if entry_points is None:
            entry_points = metadata.entry_points(group=hookspecs.ENTRY_POINT_GROUP)
        only = os.environ.get("IMPACTLINE_PLUGINS")
        allowed = None if only is None else {n.strip() for n in only.split(",") if n.strip()}
        blocked = {n.strip() for n in os.environ.get("IMPACTLINE_BLOCK_PLUGINS", "").split(",") if n.strip()}
        loaded = []
        for ep in sorted(entry_points, key=lambda e: e.name):
            if ep.name in blocked or (allowed is not None and ep.name not in allowed):
                continue
            if self.pm.has_plugin(ep.name):
                continue
            try:
                plugin = ep.load()
            except Exception as exc:
                raise PluginError(f"plugin {ep.name!r}: importing its entry point failed: {exc!r}") from exc
            dist = getattr(ep, "dist", None)
            version = getattr(dist, "version", None) or getattr(plugin, "__version__", "unknown")
            self.register(plugin, ep.name, version=str(version))
            loaded.append(ep.name)
        return loaded

    def load_local_file(self, path: str | Path) -> str:
        """Import a local ``.py`` plugin file named in a pipeline file and register it.

        Returns the plugin name (``local:<file stem>``).
        """
        path = Path(path).resolve()
        if not path.is_file():
            raise PluginError(f"local plugin {path}: file not found")
        text = path.read_text(encoding="utf-8")
        digest = hashlib.sha256(text.encode()).hexdigest()
        name = f"local:{path.stem}"
        if str(path) in self.local_files:
            return name
        module_name = f"impactline_local_{path.stem}_{digest[:10]}"
        spec = importlib.util.spec_from_file_location(module_name, path)
        if spec is None or spec.loader is None:
            raise PluginError(f"local plugin {path}: cannot be imported as a Python module")
        module = importlib.util.module_from_spec(spec)
        sys.modules[module_name] = module
        try:
            spec.loader.exec_module(module)
        except Exception as exc:
            del sys.modules[module_name]
            raise PluginError(f"local plugin {path}: importing it failed: {exc!r}") from exc
        self.register(module, name, version=digest[:12])
        self.local_files[str(path)] = digest
        return name

    def register(self, plugin: Any, name: str, version: str = "unknown") -> None:
        """Register a plugin object and check every stage it provides.

        Raises
        ------
        PluginError
            If a hook implementation does not fit its spec, a stage breaks its kind's contract, or a
            stage name is already taken.
        """
        try:
            self.pm.register(plugin, name=name)
        except pluggy.PluginValidationError as exc:
            raise PluginError(f"plugin {name!r}: {exc}") from exc
        except ValueError as exc:
            raise PluginError(f"plugin {name!r}: {exc}") from exc
        hook = getattr(plugin, "impactline_stages", None)
        if hook is None:
            self.plugin_versions[name] = version
            return
        try:
            classes = list(hook())
        except Exception as exc:
            self.pm.unregister(name=name)
            raise PluginError(f"plugin {name!r}: impactline_stages() failed: {exc!r}") from exc
        entries = []
        for cls in classes:
            problems = check_stage_class(cls)
            if problems:
                self.pm.unregister(name=name)
                raise PluginError(f"plugin {name!r}, stage {cls!r}: " + "; ".join(problems))
            taken = self._stages[cls.kind].get(cls.name)
            if taken is not None and taken.cls is not cls:
                self.pm.unregister(name=name)
                raise PluginError(
                    f"plugin {name!r}: {cls.kind} {cls.name!r} is already provided by plugin {taken.plugin!r}; "
                    "rename one of them or block a plugin with IMPACTLINE_BLOCK_PLUGINS"
                )
            entries.append(StageEntry(cls, name, version))
        for entry in entries:
            self._stages[entry.kind][entry.name] = entry
        self.plugin_versions[name] = version

    def unregister(self, name: str) -> None:
        """Remove a plugin and its stages (e.g. to swap a bundled stage for a lab's own)."""
        self.pm.unregister(name=name)
        for kind in KINDS:
            self._stages[kind] = {k: e for k, e in self._stages[kind].items() if e.plugin != name}
        self.plugin_versions.pop(name, None)

    # ------------------------------------------------------------------ lookup
    def stages(self, kind: str | None = None) -> list[StageEntry]:
        """All registered stages, optionally of one kind, sorted by kind then name."""
        kinds = KINDS if kind is None else (kind,)
        return [self._stages[k][n] for k in kinds for n in sorted(self._stages[k])]

    def get(self, kind: str, name: str) -> StageEntry:
        """Return the stage ``name`` of ``kind``.

        Raises
        ------
        KeyError
            With the nearest name and the list of valid names.
        """
        if kind not in self._stages:
            raise KeyError(f"unknown stage kind {kind!r}; kinds are {', '.join(KINDS)}")
        if name in self._stages[kind]:
            return self._stages[kind][name]
        names = sorted(self._stages[kind])
        near = difflib.get_close_matches(name, names, n=1)
        hint = f"did you mean {near[0]!r}? " if near else ""
        raise KeyError(f"no {kind} named {name!r}; {hint}installed: {', '.join(names) or 'none'}")

    def create(self, kind: str, name: str, params: dict[str, Any] | None = None) -> Stage:
        """Instantiate a registered stage with validated parameters."""
        return self.get(kind, name).cls(**(params or {}))


def check_stage_class(cls: Any) -> list[str]:
    """Return the contract problems of a stage class (empty when it fits). Used at registration."""
    if not (inspect.isclass(cls) and issubclass(cls, Stage)):
        return ["is not a subclass of impactline.Stage"]
    problems = []
    kind = getattr(cls, "kind", "")
    if kind not in KIND_BASES:
        return [f"kind {kind!r} is not one of {', '.join(KINDS)}"]
    if not issubclass(cls, KIND_BASES[kind]):
        problems.append(f"kind {kind!r} but not a subclass of {KIND_BASES[kind].__name__}")
    if not isinstance(cls.name, str) or not _NAME_RE.match(cls.name):
        problems.append(f"name {cls.name!r} must be lower case letters, digits, '_' or '-'")
    if not isinstance(cls.summary, str) or not cls.summary.strip():
        problems.append("summary must be a non-empty one-line string")
    if not isinstance(cls.params, dict) or not all(isinstance(p, Param) for p in cls.params.values()):
        problems.append("params must be a dict of impactline.Param")
    else:
        for key, param in cls.params.items():
            if param.kind not in (float, int, bool, str, list):
                problems.append(f"parameter {key!r}: kind must be float, int, bool, str or list")
            if not param.doc:
                problems.append(f"parameter {key!r}: missing doc")
        try:
            cls()
        except Exception as exc:
            problems.append(f"cannot be created with its default parameters: {exc}")
    for column_name, column in getattr(cls, "columns", {}).items():
        if not isinstance(column, Column) or column.dtype not in COLUMN_TYPES:
            problems.append(f"column {column_name!r} must be a Column with dtype in {COLUMN_TYPES}")
        elif column.dtype.startswith("list") and not column.length:
            problems.append(f"column {column_name!r}: a list column needs a fixed length")
    for method in _REQUIRED_METHODS[kind]:
        if getattr(cls, method) is getattr(KIND_BASES[kind], method):
            problems.append(f"does not implement {method}()")
    return problems


_DEFAULT: PluginRegistry | None = None


def default_registry(refresh: bool = False) -> PluginRegistry:
    """The process-wide registry of installed plugins (created on first use)."""
    global _DEFAULT
    if _DEFAULT is None or refresh:
        _DEFAULT = PluginRegistry()
    return _DEFAULT
