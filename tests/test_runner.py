"""The streaming runner and the run folder: chunking, resume, failures, parallel files, the Python API."""

import json
import textwrap
from pathlib import Path

import numpy as np
import pyarrow.parquet as pq
import pytest
from impactline.cli import main
from impactline.output import read_events
from impactline.pipeline import load_pipeline, parse_pipeline
from impactline.runner import process_recording, run

FS = 250e3
PIPELINE = """
[reader]
use = "auto"

[[filter]]
use = "bessel"
cutoff = "25 kHz"

[detector]
use = "threshold"
release_sigma = 1            # events start at the 1-sigma crossing: onsets are checked to a few samples

[[measure]]
use = "baseline-context"

[[measure]]
use = "pulse-shape"

[sizing]
material = "Cu"
"""


def _recording(n=400_000, seed=0, n_events=30):
    """Noise (1 pA rms) plus exponential spikes of 40 pA, some across 4096/65536-sample chunk borders."""
    rng = np.random.default_rng(seed)
    x = 1e-12 * rng.standard_normal(n)
    starts = np.linspace(3000, n - 3000, n_events).astype(int)
    starts[::2] = np.maximum(np.round(starts[::2] / 4096), 1).astype(int) * 4096 - 17
    starts = np.sort(starts)
    for s in starts:
        x[s:s + 300] += 40e-12 * np.exp(-np.arange(300) / 40.0)
    return x, starts


def _write_npy(path: Path, x: np.ndarray, fs: float = FS) -> Path:
    np.save(path, x)
    path.with_suffix(".json").write_text(json.dumps({"sample_rate_hz": fs}))
    return path


@pytest.fixture
def pipeline_file(tmp_path):
    path = tmp_path / "pipeline.toml"
    path.write_text(PIPELINE)
    return path


def _with_chunk(text: str, chunk: int) -> str:
    return f"[pipeline]\nchunk_samples = {chunk}\n" + text


@pytest.mark.parametrize("chunk", [4096, 65536, 1 << 20])
def test_chunk_size_changes_no_event_and_no_measurement(tmp_path, chunk):
    x, starts = _recording()
    path = _write_npy(tmp_path / "a.npy", x)
    whole = process_recording(parse_pipeline(_with_chunk(PIPELINE, 1 << 22)), path).events
    chunked = process_recording(parse_pipeline(_with_chunk(PIPELINE, chunk)), path).events
    assert whole.num_rows == len(starts)
    assert chunked.column("start_index").to_pylist() == whole.column("start_index").to_pylist()
    assert chunked.column("end_index").to_pylist() == whole.column("end_index").to_pylist()
    for name in whole.column_names:
        if whole.schema.field(name).type in ("double", "float"):
            a = np.asarray(whole.column(name).to_numpy(zero_copy_only=False), dtype=float)
            b = np.asarray(chunked.column(name).to_numpy(zero_copy_only=False), dtype=float)
            np.testing.assert_allclose(b, a, rtol=1e-7, atol=1e-22, equal_nan=True, err_msg=name)


def test_rows_batched_into_tables_give_the_same_events(tmp_path, monkeypatch):
    # The runner turns measured rows into Arrow tables every ROW_BATCH events so memory stays flat on long
    # files; batches of 7 (several per chunk, one partly filled at the end) must change nothing.
    import impactline.runner as runner_module

    x, _ = _recording()
    path = _write_npy(tmp_path / "a.npy", x)
    whole = process_recording(parse_pipeline(PIPELINE), path).events
    monkeypatch.setattr(runner_module, "ROW_BATCH", 7)
    batched = process_recording(parse_pipeline(PIPELINE), path).events
    assert whole.num_rows == 30
    assert batched.equals(whole)
    assert batched.column("event_id").to_pylist() == list(range(30))


@pytest.mark.parametrize("chunks", [[1 << 20], [4096], [1000, 70_000, 3], [65536]])
def test_file_noise_meter_is_the_same_whatever_the_chunks(chunks):
    from impactline.runner import NoiseMeter

    x = np.random.default_rng(3).standard_normal(300_000) * np.repeat([1.0, 2.0, 0.5], 100_000)
    whole = NoiseMeter()
    whole.push(x)
    chunked = NoiseMeter()
    at, i = 0, 0
    while at < x.size:
        step = chunks[i % len(chunks)]
        chunked.push(x[at:at + step])
        at, i = at + step, i + 1
    assert chunked.estimates == whole.estimates and len(whole.estimates) == 4
    assert chunked.result() == whole.result()
    # The median of the block estimates: blocks are mostly of sigma 1 and 2 in equal share here, so it lies
    # between them (1.4826 x MAD estimates the sigma of Gaussian noise; common practice).
    assert 0.95 < whole.result() < 2.05


def test_reading_ahead_in_a_second_thread_changes_nothing(tmp_path):
    x, _ = _recording()
    path = _write_npy(tmp_path / "a.npy", x)
    pipeline = parse_pipeline(_with_chunk(PIPELINE, 4096))
    plain = process_recording(pipeline, path)
    ahead = process_recording(pipeline, path, read_ahead=True)
    assert ahead.events.equals(plain.events)
    assert {k: v for k, v in ahead.row.items() if k != "seconds"} == \
        {k: v for k, v in plain.row.items() if k != "seconds"}
    # An error met by the reading thread is raised to the caller, with the sample index.
    x[300_001] = np.nan
    bad = _write_npy(tmp_path / "b.npy", x)
    with pytest.raises(Exception, match="300001"):
        process_recording(pipeline, bad, read_ahead=True)


def test_read_ahead_thread_stops_when_the_consumer_stops():
    # The consumer leaves early (an error in the detector, say) while the reader is ahead with a full queue,
    # here holding the last chunk and about to hand over the end mark: it must give up rather than wait for
    # ever, and a long stream is not read to its end.
    import threading

    from impactline.runner import _read_ahead

    def leave_early(n_chunks, produced):
        def chunks():
            for i in range(n_chunks):
                produced.append(i)
                yield np.full(4, float(i))

        ahead = _read_ahead(chunks(), lambda c: c * 2.0, depth=1)
        assert next(ahead)[0] == 0.0
        ahead.close()   # runs the generator's finally: stop the thread and join it

    for n_chunks in (2, 1000):
        produced: list[int] = []
        closing = threading.Thread(target=leave_early, args=(n_chunks, produced), daemon=True)
        closing.start()
        closing.join(timeout=10)
        assert not closing.is_alive(), "the reading thread did not stop"
        assert len(produced) <= 4


def test_events_match_what_was_put_in(tmp_path):
    x, starts = _recording()
    events = process_recording(parse_pipeline(PIPELINE), _write_npy(tmp_path / "a.npy", x)).events
    found = np.asarray(events.column("start_index").to_pylist())
    # Onsets within a few samples of the true ones (zero-phase filter: no delay to compensate).
    assert np.max(np.abs(found - starts)) <= 6
    # Charge of a 40 pA exponential with tau = 40 samples: 40e-12 * 40 / fs (sum of the samples), within 10 %.
    expected = 40e-12 * np.sum(np.exp(-np.arange(300) / 40.0)) / FS
    np.testing.assert_allclose(events.column("charge_C").to_numpy(), expected, rtol=0.1)
    assert all(events.column("detector").to_pylist()[i] == "threshold" for i in range(events.num_rows))


def test_run_folder_has_the_contract_tables_with_units(tmp_path, pipeline_file):
    x, _ = _recording()
    path = _write_npy(tmp_path / "a.npy", x)
    result = run(load_pipeline(pipeline_file), [path], tmp_path / "run")
    events = read_events(tmp_path / "run")
    for column in ("file", "event_id", "start_s", "end_s", "duration_s", "start_index", "end_index", "baseline_A",
                   "peak_A", "charge_C", "noise_rms_A", "snr", "detector", "diameter_m"):
        assert column in events.column_names, column
    assert events.schema.field("charge_C").metadata[b"unit"] == b"C"
    assert events.schema.field("diameter_m").metadata[b"unit"] == b"m"
    part = next((tmp_path / "run" / "events.parquet").glob("*.parquet"))
    assert pq.read_schema(part).metadata[b"impactline.pipeline_hash"].decode() == result.pipeline_hash
    files = pq.read_table(tmp_path / "run" / "files.parquet").to_pylist()
    assert files[0]["status"] == "ok" and files[0]["n_samples"] == x.size
    assert files[0]["duration_s"] == pytest.approx(x.size / FS)
    assert files[0]["noise_rms_A"] == pytest.approx(1e-12, rel=0.6)  # filtered white noise: below 1 pA
    assert files[0]["event_rate_low_per_s"] < files[0]["event_rate_per_s"] < files[0]["event_rate_high_per_s"]
    record = json.loads((tmp_path / "run" / "run.json").read_text())
    assert record["pipeline_hash"] == result.pipeline_hash and record["pipeline_text"] == PIPELINE


def _bad_inputs(folder: Path) -> dict[str, Path]:
    """One input for each kind of bad file the runner must survive."""
    x, _ = _recording(n=100_000)
    good = _write_npy(folder / "good.npy", x)
    empty = folder / "empty.bin"
    empty.write_bytes(b"")
    empty.with_suffix(".json").write_text('{"sample_rate_hz": 250000, "dtype": "<i2"}')
    odd = folder / "odd.bin"
    odd.write_bytes(b"\x00" * 1001)
    odd.with_suffix(".json").write_text('{"sample_rate_hz": 250000, "dtype": "<i2"}')
    with_nan = x.copy()
    with_nan[54_321] = np.nan
    nan = _write_npy(folder / "nan.npy", with_nan)
    no_rate = folder / "norate.npy"
    np.save(no_rate, x)
    bad_sidecar = folder / "badsidecar.bin"
    bad_sidecar.write_bytes(np.zeros(1000, "<i2").tobytes())
    bad_sidecar.with_suffix(".json").write_text('{"sample_rate_hz": 250000, "dtype": ')
    return {"good": good, "empty": empty, "odd": odd, "nan": nan, "norate": no_rate, "badsidecar": bad_sidecar,
            "missing": folder / "missing.npy"}


def test_bad_files_are_recorded_and_skipped_never_fatal(tmp_path, pipeline_file, capsys):
    inputs = _bad_inputs(tmp_path)
    code = main(["run", str(pipeline_file), *map(str, inputs.values()), "--out", str(tmp_path / "run"), "--quiet"])
    assert code == 1, "some files failed: exit status 1"
    rows = {Path(r["file"]).stem: r for r in pq.read_table(tmp_path / "run" / "files.parquet").to_pylist()}
    assert rows["good"]["status"] == "ok"
    expectations = {
        "empty": "empty",
        "odd": "multiple",
        "nan": "sample 54321",
        "norate": "sample_rate",
        "badsidecar": "JSON",
        "missing": "missing",
    }
    for stem, fragment in expectations.items():
        assert rows[stem]["status"] == "failed", stem
        assert stem in rows[stem]["error"] and fragment.lower() in rows[stem]["error"].lower(), rows[stem]["error"]
    parts = list((tmp_path / "run" / "events.parquet").iterdir())
    assert [p.name.split("-")[0] for p in parts] == ["good"], "no partial or temporary file is left behind"
    assert "FAILED" in capsys.readouterr().out


def test_resume_skips_done_files_and_redoes_changed_ones(tmp_path, pipeline_file):
    x, _ = _recording(n=150_000)
    a = _write_npy(tmp_path / "a.npy", x)
    b = _write_npy(tmp_path / "b.npy", x[::-1].copy())
    pipeline = load_pipeline(pipeline_file)
    first = run(pipeline, [a, b], tmp_path / "run")
    second = run(pipeline, [a, b], tmp_path / "run")
    assert second.files.column("status").to_pylist() == ["skipped", "skipped"]
    assert second.events.num_rows == first.events.num_rows
    np.save(b, x)  # b changes: its fingerprint differs
    third = run(pipeline, [a, b], tmp_path / "run")
    assert third.files.column("status").to_pylist() == ["skipped", "ok"]
    assert third.events.num_rows == 2 * sum(f == str(a) for f in first.events.column("file").to_pylist())


def test_interrupted_run_resumes_without_duplicating_or_losing_rows(tmp_path, pipeline_file):
    x, _ = _recording(n=150_000)
    paths = [_write_npy(tmp_path / f"f{i}.npy", np.roll(x, 1000 * i)) for i in range(3)]
    pipeline = load_pipeline(pipeline_file)
    complete = run(pipeline, paths, tmp_path / "complete").events.num_rows
    # An interruption after the first file: only its part exists, no files.parquet yet.
    run(pipeline, paths[:1], tmp_path / "run")
    (tmp_path / "run" / "files.parquet").unlink()
    resumed = run(pipeline, paths, tmp_path / "run")
    assert resumed.files.column("status").to_pylist() == ["skipped", "ok", "ok"]
    assert resumed.events.num_rows == complete
    keys = list(zip(resumed.events.column("file").to_pylist(), resumed.events.column("event_id").to_pylist(),
                    strict=True))
    assert len(keys) == len(set(keys))


def test_a_different_pipeline_does_not_overwrite_a_run_folder(tmp_path, pipeline_file):
    x, _ = _recording(n=100_000)
    a = _write_npy(tmp_path / "a.npy", x)
    run(load_pipeline(pipeline_file), [a], tmp_path / "run")
    other = parse_pipeline(PIPELINE.replace('"25 kHz"', '"20 kHz"'))
    with pytest.raises(Exception, match="different pipeline"):
        run(other, [a], tmp_path / "run")
    assert run(other, [a], tmp_path / "run", overwrite=True).files.column("status").to_pylist() == ["ok"]


def test_parallel_files_give_the_same_run_folder(tmp_path, pipeline_file):
    x, _ = _recording(n=150_000)
    paths = [_write_npy(tmp_path / f"f{i}.npy", np.roll(x, 777 * i)) for i in range(3)]
    pipeline = load_pipeline(pipeline_file)
    serial = run(pipeline, paths, tmp_path / "serial", jobs=1).events
    parallel = run(pipeline, paths, tmp_path / "parallel", jobs=2).events
    assert parallel.drop_columns(["file"]).equals(serial.drop_columns(["file"]))


def test_python_api_returns_an_arrow_table_without_writing(tmp_path, pipeline_file):
    x, _ = _recording(n=100_000)
    result = run(load_pipeline(pipeline_file), [_write_npy(tmp_path / "a.npy", x)])
    assert result.out_dir is None and result.events.num_rows > 0
    assert not (tmp_path / "events.parquet").exists()


def test_globs_and_folders_expand_and_sidecars_are_not_inputs(tmp_path, pipeline_file):
    x, _ = _recording(n=100_000)
    for i in range(2):
        _write_npy(tmp_path / f"g{i}.npy", x)
    result = run(load_pipeline(pipeline_file), [str(tmp_path / "g*.npy")])
    assert result.files.num_rows == 2
    assert run(load_pipeline(pipeline_file), [tmp_path]).files.num_rows == 2


def test_cli_check_and_plugins(pipeline_file, capsys):
    assert main(["check", str(pipeline_file)]) == 0
    assert "valid" in capsys.readouterr().out
    assert main(["plugins", "filter"]) == 0
    out = capsys.readouterr().out
    assert "bessel" in out and "cutoff" in out


@pytest.mark.parametrize(
    ("text", "fragments"),
    [
        ("[detector\nuse = 'threshold'", ["TOML syntax error", "line 1"]),
        ("[detector]\nuse = 'treshold'", ["detector.use", "did you mean 'threshold'"]),
        ("[detector]\nuse = 'threshold'\n[[filter]]\nuse = 'bessel'\ncutoff = '25 kA'", ["filter[0].cutoff", "Hz"]),
        ("[detector]\nuse = 'threshold'\n[[filter]]\nuse = 'bessel'\norder = 40", ["filter[0].order", "<= 10"]),
        ("[detector]\nuse = 'threshold'\nk_sigmaa = 5", ["detector.k_sigmaa", "did you mean 'k_sigma'"]),
        ("[[filter]]\nuse = 'bessel'", ["[detector]", "missing section"]),
        ("[detector]\nuse = 'threshold'\n[filter]\nuse = 'bessel'", ["[[filter]]"]),
        ("[detector]\nuse = 'threshold'\n[sizing]\nmaterial = 'Cuu'", ["sizing", "Cu"]),
        ("[detector]\nuse = 'threshold'\n[detectors]\nuse = 'x'", ["[detectors]", "did you mean [detector]"]),
    ],
)
def test_pipeline_problems_name_the_file_and_key(tmp_path, text, fragments, capsys):
    path = tmp_path / "broken.toml"
    path.write_text(textwrap.dedent(text))
    assert main(["check", str(path)]) == 2
    err = capsys.readouterr().err
    assert str(path) in err
    for fragment in fragments:
        assert fragment in err, (fragment, err)


def test_local_plugin_file_named_in_a_pipeline_runs(tmp_path):
    import shutil

    examples = Path(__file__).resolve().parents[1] / "docs" / "examples"
    shutil.copy(examples / "culab_reader.py", tmp_path / "culab_reader.py")
    import importlib.util

    spec = importlib.util.spec_from_file_location("culab_for_test", tmp_path / "culab_reader.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    x, starts = _recording(n=100_000, n_events=5)
    module.write_culab(tmp_path / "batch.culab", np.round(x / 1e-13), FS, 1e-13)
    pipeline = tmp_path / "p.toml"
    pipeline.write_text('[plugins]\nlocal = ["culab_reader.py"]\n\n[reader]\nuse = "culab"\n\n[detector]\n'
                        'use = "threshold"\n')
    result = run(load_pipeline(pipeline), [tmp_path / "batch.culab"])
    assert result.files.column("reader").to_pylist() == ["culab"]
    assert result.events.num_rows == len(starts)


def test_collision_rate_is_set_beside_the_diffusion_limited_prediction(tmp_path):
    x, starts = _recording(n=250_000)
    path = _write_npy(tmp_path / "a.npy", x)
    text = PIPELINE + ('\n[collision_rate]\nelectrode_radius = "5 um"\nconcentration = "10 pM"\n'
                       'particle_diameter = "100 nm"\n')
    row = run(parse_pipeline(text), [path]).files.to_pylist()[0]
    # REFERENCES.md: f = 4 D C_p r N_A; 5 um disc, 10 pM particles of 50 nm radius at 25 C -> 0.591 per second
    # (Saito 1968 disc flux applied per particle; Stokes-Einstein with IAPWS 2008 water viscosity).
    assert row["predicted_rate_per_s"] == pytest.approx(0.591, rel=2e-3)
    assert row["diffusion_coefficient_m2_per_s"] == pytest.approx(4.907e-12, rel=1e-3)
    assert row["rate_ratio"] == pytest.approx(row["event_rate_per_s"] / row["predicted_rate_per_s"])
    assert row["event_rate_per_s"] == pytest.approx(len(starts) / (x.size / FS))


def test_collision_rate_section_needs_radius_and_concentration():
    from impactline.errors import PipelineError

    with pytest.raises(PipelineError, match="collision_rate.concentration"):
        parse_pipeline(PIPELINE + '\n[collision_rate]\nelectrode_radius = "5 um"\n')


def test_causal_filter_delay_is_subtracted_from_event_times(tmp_path):
    x, starts = _recording(n=200_000)
    path = _write_npy(tmp_path / "a.npy", x)
    causal = PIPELINE.replace('cutoff = "25 kHz"', 'cutoff = "25 kHz"\nmode = "causal"')
    result = run(parse_pipeline(causal), [path])
    row = result.files.to_pylist()[0]
    assert row["filter_delay_s"] > 0
    onsets = np.asarray(result.events.column("start_index").to_pylist())
    assert np.max(np.abs(onsets - starts)) <= 6


def test_run_folder_with_shapes_and_labels_reads_back(tmp_path):
    # labels.parquet is joined onto events that carry a fixed-size list column (shape): Arrow's own join
    # cannot carry such columns, so the run folder must still read back whole on a resumed run.
    x, starts = _recording(n=200_000)
    path = _write_npy(tmp_path / "a.npy", x)
    text = PIPELINE + '\n[[measure]]\nuse = "waveform"\n\n[classifier]\nuse = "kmeans"\n'
    first = run(parse_pipeline(text), [path], tmp_path / "run")
    again = run(parse_pipeline(text), [path], tmp_path / "run")
    assert again.files.column("status").to_pylist() == ["skipped"]
    events = read_events(tmp_path / "run")
    assert events.num_rows == len(starts) and "shape" in events.column_names and "cluster" in events.column_names
    assert events.column("event_id").to_pylist() == first.events.column("event_id").to_pylist()
