"""Plugin discovery and registration: entry points (faked and on disk), local files, contract checks."""

import os
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest
from impactline import Detector, Filter, Param, PluginError, hookimpl
from impactline.registry import PluginRegistry

EXAMPLES = Path(__file__).resolve().parents[1] / "docs" / "examples"


class _Identity(Filter):
    """Passes samples through."""

    name = "identity"
    summary = "passes samples through unchanged"
    params = {"gain": Param(1.0, doc="multiplier")}

    def start(self, sample_rate_hz):
        return None

    def process(self, x, state):
        return self.gain * x, state

    def finish(self, state):
        return np.empty(0)


class _Plugin:
    def __init__(self, *classes):
        self.classes = classes

    @hookimpl
    def impactline_stages(self):
        return list(self.classes)


class _FakeEntryPoint:
    """Stands in for importlib.metadata.EntryPoint (pluggy tests discovery the same way)."""

    def __init__(self, name, plugin, version="9.9"):
        self.name = name
        self._plugin = plugin
        self.dist = type("Dist", (), {"version": version})()

    def load(self):
        return self._plugin


def test_fake_entry_points_register_their_stages():
    registry = PluginRegistry(entry_points=[_FakeEntryPoint("lab", _Plugin(_Identity))])
    entry = registry.get("filter", "identity")
    assert entry.plugin == "lab" and entry.plugin_version == "9.9"
    assert registry.create("filter", "identity", {"gain": 2}).gain == 2.0


def test_allow_list_and_block_list_from_the_environment(monkeypatch):
    eps = [_FakeEntryPoint("lab", _Plugin(_Identity)), _FakeEntryPoint("other", _Plugin())]
    monkeypatch.setenv("IMPACTLINE_PLUGINS", "other")
    assert PluginRegistry(entry_points=eps).stages("filter") == []
    monkeypatch.delenv("IMPACTLINE_PLUGINS")
    monkeypatch.setenv("IMPACTLINE_BLOCK_PLUGINS", "lab")
    assert PluginRegistry(entry_points=eps).stages("filter") == []


def test_bundled_stages_come_through_the_entry_point_and_can_be_blocked(monkeypatch):
    assert PluginRegistry().plugin_versions.get("bundled")
    monkeypatch.setenv("IMPACTLINE_BLOCK_PLUGINS", "bundled")
    assert PluginRegistry().stages() == []


def test_a_bundled_stage_can_be_swapped_for_a_labs_own():
    registry = PluginRegistry()
    names = [e.name for e in registry.stages()]
    assert names, "bundled plugin provides stages"
    first = registry.stages()[0]
    replacement = type("Replacement", (first.cls,), {"summary": "lab's own version"})
    with pytest.raises(PluginError, match="already provided by plugin 'bundled'"):
        registry.register(_Plugin(replacement), "lab")
    registry.unregister("bundled")
    registry.register(_Plugin(replacement), "lab")
    assert registry.get(first.kind, first.name).plugin == "lab"


def test_duplicate_names_are_refused_naming_both_plugins():
    registry = PluginRegistry(autoload=False)
    registry.register(_Plugin(_Identity), "first")
    clone = type("Clone", (_Identity,), {})
    with pytest.raises(PluginError, match="'second'.*already provided by plugin 'first'"):
        registry.register(_Plugin(clone), "second")


@pytest.mark.parametrize(
    ("attributes", "fragment"),
    [
        ({"name": "Bad Name"}, "name"),
        ({"summary": ""}, "summary"),
        ({"params": {"x": 3}}, "params"),
        ({"params": {"x": Param(1.0)}}, "missing doc"),
        ({"params": {"x": Param(-1.0, low=0, doc="d")}}, "default parameters"),
    ],
)
def test_stage_contract_is_checked_at_registration(attributes, fragment):
    broken = type("Broken", (_Identity,), attributes)
    with pytest.raises(PluginError, match=fragment):
        PluginRegistry(autoload=False).register(_Plugin(broken), "lab")


def test_missing_methods_are_reported():
    lazy = type("Lazy", (Detector,), {"name": "lazy", "summary": "does nothing", "__doc__": "x"})
    with pytest.raises(PluginError, match=r"does not implement start\(\)"):
        PluginRegistry(autoload=False).register(_Plugin(lazy), "lab")


def test_hook_signature_is_checked_when_registering():
    class WrongHook:
        @hookimpl
        def impactline_stages(self, unexpected):
            return []

    with pytest.raises(PluginError, match="unexpected"):
        PluginRegistry(autoload=False).register(WrongHook(), "lab")


def test_unknown_name_suggests_the_nearest():
    registry = PluginRegistry(autoload=False)
    registry.register(_Plugin(_Identity), "lab")
    with pytest.raises(KeyError, match="did you mean 'identity'"):
        registry.get("filter", "identiti")


def test_local_file_plugin_registers_under_its_file_name():
    registry = PluginRegistry(autoload=False)
    name = registry.load_local_file(EXAMPLES / "culab_reader.py")
    assert name == "local:culab_reader"
    assert registry.get("reader", "culab").plugin == name


def test_local_file_that_fails_to_import_is_reported(tmp_path):
    bad = tmp_path / "broken.py"
    bad.write_text("raise RuntimeError('boom')\n")
    with pytest.raises(PluginError, match="broken.py.*boom"):
        PluginRegistry(autoload=False).load_local_file(bad)


def _install_out_of_tree_package(site: Path) -> None:
    """Lay out an installed distribution (module + dist-info with an entry point) in ``site``."""
    (site / "culab_plugin.py").write_text((EXAMPLES / "culab_reader.py").read_text())
    dist_info = site / "culab_plugin-1.0.dist-info"
    dist_info.mkdir()
    (dist_info / "METADATA").write_text("Metadata-Version: 2.1\nName: culab-plugin\nVersion: 1.0\n")
    (dist_info / "entry_points.txt").write_text("[impactline.plugins]\nculab = culab_plugin\n")
    (dist_info / "RECORD").write_text("")


def test_out_of_tree_package_is_discovered_listed_and_runs(tmp_path):
    site = tmp_path / "site"
    site.mkdir()
    _install_out_of_tree_package(site)
    sys.path.insert(0, str(site))
    try:
        from culab_plugin import write_culab
    finally:
        sys.path.remove(str(site))
    rng = np.random.default_rng(1)
    counts = (rng.standard_normal(200_000) * 20).astype(np.int16)
    counts[50_000:50_200] += 400
    write_culab(tmp_path / "batch7.culab", counts, 250e3, 5e-14)
    pipeline = tmp_path / "p.toml"
    pipeline.write_text(textwrap.dedent("""
        [detector]
        use = "threshold"
    """))
    env = {**os.environ, "PYTHONPATH": os.pathsep.join([str(site), os.environ.get("PYTHONPATH", "")])}
    listing = subprocess.run([sys.executable, "-m", "impactline.cli", "plugins", "reader", "--brief"],
                             capture_output=True, text=True, env=env, check=True)
    assert "culab" in listing.stdout and "[culab 1.0]" in listing.stdout
    done = subprocess.run([sys.executable, "-m", "impactline.cli", "run", str(pipeline), str(tmp_path / "batch7.culab"),
                           "--out", str(tmp_path / "out"), "--quiet"], capture_output=True, text=True, env=env)
    assert done.returncode == 0, done.stderr
    assert "files: 1 ok" in done.stdout
    import pyarrow.parquet as pq

    files = pq.read_table(tmp_path / "out" / "files.parquet").to_pylist()
    assert files[0]["reader"] == "culab" and files[0]["n_samples"] == 200_000
    assert files[0]["n_events"] >= 1
