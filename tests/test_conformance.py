"""The same contract for every registered stage of a kind (bundled or not)."""

from pathlib import Path

import numpy as np
import pytest
from impactline.registry import check_stage_class, default_registry
from impactline.testing import (
    check_detector_streaming,
    check_filter_streaming,
    check_measure_robust,
    synthetic_signal,
)

REGISTRY = default_registry()


def _ids(kind):
    return [entry.name for entry in REGISTRY.stages(kind)]


@pytest.mark.parametrize("entry", REGISTRY.stages(), ids=lambda e: f"{e.kind}-{e.name}")
def test_every_stage_declares_its_contract(entry):
    assert check_stage_class(entry.cls) == []
    for key, param in entry.cls.params.items():
        assert param.doc, f"{entry.name}.{key} has no doc"
    assert entry.cls.__doc__, f"{entry.name} has no docstring"


@pytest.mark.parametrize("entry", REGISTRY.stages("filter"), ids=_ids("filter"))
def test_filter_chunking_changes_nothing(entry):
    x, fs = synthetic_signal()
    check_filter_streaming(entry.cls(), x, fs)


@pytest.mark.parametrize("entry", REGISTRY.stages("detector"), ids=_ids("detector"))
def test_detector_chunking_changes_nothing(entry):
    x, fs = synthetic_signal()
    events = check_detector_streaming(entry.cls(), x, fs)
    assert len(events) > 0, "the contract signal holds 40 clear events and two steps"


@pytest.mark.parametrize("entry", REGISTRY.stages("detector"), ids=_ids("detector"))
def test_detector_sharing_a_memo_changes_nothing(entry):
    # Detector.start_shared: two detectors fed the same samples with one memo (as in a comparison) find
    # exactly what each finds alone, chunk by chunk.
    x, fs = synthetic_signal()
    chunk = 65536

    def run(detector, state):
        events = []
        for at in range(0, x.size, chunk):
            found, state = detector.process(x[at:at + chunk], at, state)
            events += found
        return events + detector.finish(state)

    def key(events):
        return [(e.start_index, e.end_index, e.baseline_A, e.noise_rms_A, e.polarity) for e in events]

    first, second = entry.cls(), entry.cls()
    alone = key(run(first, first.start(fs)))
    memo: dict = {}
    states = [first.start_shared(fs, memo), second.start_shared(fs, memo)]
    assert key(run(first, states[0])) == alone
    assert key(run(second, states[1])) == alone


@pytest.mark.parametrize("entry", REGISTRY.stages("measure"), ids=_ids("measure"))
def test_measure_survives_awkward_events(entry):
    check_measure_robust(entry.cls())


@pytest.mark.parametrize("entry", REGISTRY.stages("reader"), ids=_ids("reader"))
def test_reader_declares_extensions_and_sniffs_safely(entry, tmp_path: Path):
    assert entry.cls.extensions, "a reader must declare the extensions it reads"
    assert all(ext.startswith(".") and ext == ext.lower() for ext in entry.cls.extensions)
    junk = tmp_path / "junk.xyz"
    junk.write_bytes(np.random.default_rng(0).bytes(4096))
    assert entry.cls.sniff(junk, junk.read_bytes()) in (True, False)
