"""The simulator: ground truth, statistics of arrivals and sizes, streaming, noise spectrum, files, CLI."""

import argparse
import dataclasses
import json
import math

import numpy as np
import pyarrow.parquet as pq
import pytest
from impactline.physics import charge_from_diameter, diffusion_limited_collision_rate
from impactline.sidecar import load_sidecar
from impactline.simulate import (
    SHAPES,
    TRUTH_COLUMNS,
    SimulationSpec,
    SpecError,
    copper_ink_demo_specs,
    iter_recording,
    noise_psd_model,
    noise_rms,
    register_cli,
    simulate,
    truth_table,
)
from scipy import integrate, signal, stats

QUIET = dict(white_noise_A_per_rtHz=0.0, voltage_noise_V_per_rtHz=0.0, flicker_corner_hz=0.0)
ALL_SHAPES = {shape: 1.0 for shape in SHAPES}


def _record(spec, block_size=1 << 16):
    return np.concatenate(list(iter_recording(spec, block_size)))


def _column(table, name):
    return np.asarray(table.column(name).to_numpy(zero_copy_only=False))


@pytest.fixture(scope="module")
def busy_truth():
    """About 800 events at 40 /s: enough for the statistics of arrivals, sizes and shapes."""
    spec = SimulationSpec(sample_rate_hz=50e3, bandwidth_hz=10e3, duration_s=20.0, collision_rate_per_s=40.0,
                          median_diameter_m=45e-9, diameter_gsd=1.3, shape_weights=ALL_SHAPES,
                          tail_decay_s=1e-3, seed=11)
    return spec, truth_table(spec)


# ------------------------------------------------------------------------------------------------ truth
def test_truth_file_schema_units_and_consistency(tmp_path):
    spec = SimulationSpec(duration_s=1.0, collision_rate_per_s=30.0, shape_weights=ALL_SHAPES, seed=4)
    result = simulate(spec, tmp_path / "rec.bin")
    table = pq.read_table(result.truth_path)
    assert table.column_names == list(TRUTH_COLUMNS)
    units = {f.name: f.metadata[b"unit"].decode() for f in table.schema}
    assert units["start_s"] == "s" and units["end_s"] == "s" and units["peak_A"] == "A"
    assert units["charge_C"] == "C" and units["diameter_m"] == "m" and units["step_height_A"] == "A"
    assert units["snr"] == "" and units["event_id"] == ""
    assert str(table.schema.field("shape").type) == "string"
    assert str(table.schema.field("start_index").type) == "int64"
    meta = table.schema.metadata
    assert meta[b"generator"] == b"impactline.simulate" and meta[b"data_file"] == b"rec.bin"
    assert SimulationSpec.from_dict(json.loads(meta[b"spec"])) == spec
    n = table.num_rows
    assert n == result.n_events > 10
    fs = spec.sample_rate_hz
    start, end = _column(table, "start_s"), _column(table, "end_s")
    assert np.array_equal(_column(table, "event_id"), np.arange(n))
    assert np.all(np.diff(start) > 0) and np.all(end > start)
    np.testing.assert_array_equal(_column(table, "start_index"), np.floor(start * fs + 0.5).astype(int))
    np.testing.assert_array_equal(_column(table, "end_index"), np.ceil(end * fs + 0.5).astype(int))
    # Events never overlap: each next onset comes after the previous event's end, settling and dead time.
    until = _column(table, "dead_until_s")
    assert np.all(start[1:] >= until[:-1]) and np.all(until >= end + spec.dead_time_s)
    assert set(_column(table, "shape")) <= set(SHAPES)
    rms = float(meta[b"noise_rms_A"])
    assert rms == pytest.approx(noise_rms(spec)) and rms == pytest.approx(result.noise_rms_A)
    np.testing.assert_allclose(_column(table, "snr"), np.abs(_column(table, "peak_A")) / rms, rtol=1e-12)


def test_charges_are_faraday_charges_of_the_diameters(busy_truth):
    spec, truth = busy_truth
    shape, d = _column(truth, "shape"), _column(truth, "diameter_m")
    charge, carried = _column(truth, "charge_C"), _column(truth, "signal_charge_C")
    # Faraday's law, Q = n F rho (pi d^3 / 6) / M (impactline.physics, checked in test_physics).
    np.testing.assert_allclose(charge, charge_from_diameter(d, "Cu"), rtol=1e-12)
    dissolving = np.isin(shape, ["spike", "burst", "tail_spike"])
    np.testing.assert_allclose(carried[dissolving], charge[dissolving], rtol=1e-12)
    fraction = _column(truth, "oxidised_fraction")
    blip = shape == "blip"
    assert np.all((fraction[blip] >= 0.002) & (fraction[blip] <= 0.02))
    np.testing.assert_allclose(carried[blip], fraction[blip] * charge[blip], rtol=1e-12)
    step = shape == "step"
    assert np.isnan(carried[step]).all() and np.all(fraction[step] == 0)
    height = _column(truth, "step_height_A")
    np.testing.assert_allclose(height[step], spec.step_height_A * d[step] / 50e-9, rtol=1e-12)
    assert np.all(height[~step] == 0)
    subpeaks = _column(truth, "n_subpeaks")
    assert np.all(subpeaks[shape == "burst"] >= 2) and np.all(subpeaks[step] == 0)
    assert np.all(_column(truth, "peak_A") > 0)  # anodic


def test_recorded_charge_and_peaks_match_the_truth():
    """Noise-free recording: each event's samples integrate to its charge and peak at its peak_A."""
    spec = SimulationSpec(duration_s=1.0, collision_rate_per_s=25.0, seed=5, **QUIET,
                          shape_weights={"spike": 1, "burst": 1, "blip": 1, "tail_spike": 1})
    x = _record(spec)
    truth = truth_table(spec)
    fs = spec.sample_rate_hz
    starts = _column(truth, "start_index")
    bounds = np.r_[starts, len(x)]
    peak, carried = _column(truth, "peak_A"), _column(truth, "signal_charge_C")
    for i in range(truth.num_rows):
        window = x[bounds[i]:bounds[i + 1]]
        # The amplifier has unit gain at DC, so it keeps the charge (Faraday's law); what remains of an event
        # after the next one starts is below 0.1 % of its charge.
        assert window.sum() / fs == pytest.approx(carried[i], rel=2e-3)
        assert window.max() == pytest.approx(peak[i], rel=1e-3)


def test_poisson_arrivals(busy_truth):
    spec, truth = busy_truth
    rate = spec.collision_rate()
    arrivals = int(truth.schema.metadata[b"n_arrivals"])
    # The raw arrival count is Poisson(rate * duration) (scipy.stats.poisson, 99.9 % interval).
    low, high = stats.poisson.interval(0.999, rate * spec.duration_s)
    assert low <= arrivals <= high
    meta = truth.schema.metadata
    assert arrivals == truth.num_rows + int(meta[b"n_lost_dead_time"]) + int(meta[b"n_beyond_end"])
    # An arrival inside an event's dead period is dropped; the process is memoryless, so the wait from the
    # end of a dead period to the next onset is exponential with the full rate (Kolmogorov-Smirnov test).
    waits = _column(truth, "start_s")[1:] - _column(truth, "dead_until_s")[:-1]
    assert stats.kstest(waits, "expon", args=(0, 1.0 / rate)).pvalue > 1e-3
    assert waits.mean() == pytest.approx(1.0 / rate, rel=4.0 / math.sqrt(len(waits)))
    # The test has power: the raw start-to-start intervals are not exponential at this rate.
    intervals = np.diff(_column(truth, "start_s"))
    assert stats.kstest(intervals, "expon", args=(0, 1.0 / rate)).pvalue < 1e-3


def test_lognormal_sizes(busy_truth):
    spec, truth = busy_truth
    d = _column(truth, "diameter_m")
    sigma = math.log(spec.diameter_gsd)
    n = len(d)
    # Maximum-likelihood lognormal fit (scipy.stats.lognorm, location 0): shape = sigma, scale = median.
    shape_fit, _, scale_fit = stats.lognorm.fit(d, floc=0)
    assert scale_fit == pytest.approx(spec.median_diameter_m, rel=4 * sigma / math.sqrt(n))
    assert shape_fit == pytest.approx(sigma, rel=4 / math.sqrt(2 * n))
    assert stats.kstest(np.log(d), "norm", args=(math.log(spec.median_diameter_m), sigma)).pvalue > 1e-3


def test_shape_mix(busy_truth):
    spec, truth = busy_truth
    shape = _column(truth, "shape")
    counts = np.array([np.sum(shape == s) for s in SHAPES])
    expected = np.array([spec.shape_weights[s] for s in SHAPES]) * len(shape)
    assert stats.chisquare(counts, expected).pvalue > 1e-3


def test_rate_from_concentration():
    spec = SimulationSpec(concentration_mol_per_m3="150 pM", median_diameter_m="50 nm", electrode_radius_m="5 um")
    expected = diffusion_limited_collision_rate(50e-9, 1.5e-7, 5e-6, 298.15)
    assert spec.collision_rate() == pytest.approx(expected)
    assert SimulationSpec().collision_rate() == 5.0
    with pytest.raises(SpecError, match="not both"):
        SimulationSpec(collision_rate_per_s=1.0, concentration_mol_per_m3=1e-8)


def test_noise_settings_do_not_move_events():
    base = SimulationSpec(duration_s=0.5, collision_rate_per_s=40.0, seed=8)
    noisy = base.with_noise_scale(3.0)
    a, b = truth_table(base), truth_table(noisy)
    for name in ("start_s", "diameter_m", "peak_A", "shape"):
        assert np.array_equal(_column(a, name), _column(b, name))
    np.testing.assert_allclose(_column(a, "snr") / _column(b, "snr"), 3.0, rtol=0.05)


# ------------------------------------------------------------------------------------------------ streaming
def _everything_spec(**changes):
    return SimulationSpec(duration_s=0.4, collision_rate_per_s=60.0, shape_weights=ALL_SHAPES,
                          hum_amplitude_A=4e-12, drift_A_per_s=3e-11, wander_rms_A=2e-12, wander_time_s=0.05,
                          baseline_offset_A=1e-10, seed=21, **changes)


def test_block_size_does_not_change_the_samples():
    spec = _everything_spec()
    whole = _record(spec, spec.n_samples)
    for block in (4096, 10007, 65536):
        assert np.array_equal(_record(spec, block), whole), block
    other_seed = _record(dataclasses.replace(spec, seed=22), spec.n_samples)
    assert not np.allclose(other_seed, whole)


def test_block_size_does_not_change_the_file(tmp_path):
    spec = _everything_spec(dtype="int16")
    a = simulate(spec, tmp_path / "a.bin", block_size=5000)
    b = simulate(spec, tmp_path / "b.bin", block_size=1 << 20)
    assert a.data_path.read_bytes() == b.data_path.read_bytes()
    assert a.clipped_samples == 0 and a.gain_A_per_count == b.gain_A_per_count


def test_baseline_hum_drift_and_steps():
    fs, T = 20e3, 2.0
    spec = SimulationSpec(sample_rate_hz=fs, bandwidth_hz=2e3, duration_s=T, collision_rate_per_s=0.0, **QUIET,
                          baseline_offset_A=5e-12, drift_A_per_s=1e-12, hum_amplitude_A=2e-12,
                          hum_harmonics=(1.0, 0.0, 0.5))
    x = _record(spec)
    t = np.arange(len(x)) / fs
    # Least-squares fit of offset + drift + 50 and 150 Hz sinusoids recovers the settings.
    columns = [np.ones_like(t), t]
    for f in (50.0, 150.0):
        columns += [np.sin(2 * np.pi * f * t), np.cos(2 * np.pi * f * t)]
    coef, *_ = np.linalg.lstsq(np.column_stack(columns), x, rcond=None)
    assert coef[0] == pytest.approx(5e-12, rel=1e-3) and coef[1] == pytest.approx(1e-12, rel=1e-3)
    assert math.hypot(coef[2], coef[3]) == pytest.approx(2e-12, rel=1e-3)
    assert math.hypot(coef[4], coef[5]) == pytest.approx(1e-12, rel=1e-3)
    steps = SimulationSpec(sample_rate_hz=fs, bandwidth_hz=2e3, duration_s=T, collision_rate_per_s=10.0, **QUIET,
                           shape_weights={"step": 1.0}, seed=2)
    truth = truth_table(steps)
    assert truth.num_rows > 5
    # Steps stay: the current at the end is the sum of all step heights.
    assert _record(steps)[-1] == pytest.approx(_column(truth, "step_height_A").sum(), rel=1e-9)


def test_wander_rms():
    spec = SimulationSpec(sample_rate_hz=2e3, bandwidth_hz=500.0, duration_s=20.0, collision_rate_per_s=0.0,
                          **QUIET, wander_rms_A=3e-12, wander_time_s=0.01, seed=3)
    # 2000 correlation times: the sample sd is within about 3 % of the stationary value (here 15 %); the sd
    # of a sample variance of an AR(1) process over T is about sqrt(2 tau / T) (from memory).
    assert _record(spec).std() == pytest.approx(3e-12, rel=0.15)


# ------------------------------------------------------------------------------------------------ noise
def _band_ratio(f, measured, model, low, high):
    band = (f >= low) & (f < high)
    return measured[band].mean() / model[band].mean()


def test_welch_psd_matches_noise_model():
    """An event-free recording has the spectrum noise_psd_model claims (Welch's method, scipy.signal.welch)."""
    spec = SimulationSpec(duration_s=2.0, collision_rate_per_s=0.0, bandwidth_hz=100e3, seed=1)
    x = _record(spec)
    f, measured = signal.welch(x, fs=spec.sample_rate_hz, nperseg=4096)
    model = noise_psd_model(f, spec)
    terms = noise_psd_model(f, spec, components=True)
    white_band, cap_band = (1e3, 5e3), (30e3, 80e3)
    band = (f >= white_band[0]) & (f < white_band[1])
    assert np.all(terms["white"][band] > 5 * terms["capacitive"][band])  # the white floor dominates here
    band = (f >= cap_band[0]) & (f < cap_band[1])
    assert np.all(terms["capacitive"][band] > 3 * terms["white"][band])  # and the f^2 term here
    for low, high in (white_band, cap_band, (5e3, 30e3)):
        assert _band_ratio(f, measured, model, low, high) == pytest.approx(1.0, abs=0.1), (low, high)
    assert x.std() == pytest.approx(noise_rms(spec), rel=0.05)


def test_welch_psd_matches_flicker_noise():
    spec = SimulationSpec(sample_rate_hz=10e3, bandwidth_hz=2e3, duration_s=100.0, collision_rate_per_s=0.0,
                          flicker_corner_hz=100.0, seed=2)
    x = _record(spec)
    f, measured = signal.welch(x, fs=spec.sample_rate_hz, nperseg=8192)
    model = noise_psd_model(f, spec)
    terms = noise_psd_model(f, spec, components=True)
    band = (f >= 5.0) & (f < 30.0)
    assert np.all(terms["flicker"][band] > 3 * terms["white"][band])  # 1/f dominates
    for low, high in ((5.0, 30.0), (30.0, 100.0), (100.0, 1000.0)):
        assert _band_ratio(f, measured, model, low, high) == pytest.approx(1.0, abs=0.1), (low, high)


def test_noise_is_stationary_from_the_first_samples():
    """The 1/f filter starts in its stationary state. The mean of the first 64 samples (mostly the slow 1/f
    content) already has the variance the realised PSD predicts; started from rest it has about a fifth."""
    base = SimulationSpec(sample_rate_hz=20e3, bandwidth_hz=2e3, duration_s=50.0, collision_rate_per_s=0.0,
                          flicker_corner_hz=500.0, voltage_noise_V_per_rtHz=0.0)
    n, fs = 64, base.sample_rate_hz
    means = [next(iter_recording(dataclasses.replace(base, seed=seed), block_size=n)).mean() for seed in range(120)]
    f = np.geomspace(1e-4, fs / 2, 200001)
    window = (np.sin(np.pi * f * n / fs) / (n * np.sin(np.pi * f / fs))) ** 2  # power response of a 64-sample mean
    variance = integrate.trapezoid(noise_psd_model(f, base, realised=True) * window, f)
    assert np.var(means) == pytest.approx(variance, rel=0.35)  # 120 draws: sd of the variance 13 %


def test_realised_noise_follows_the_intended_laws():
    spec = SimulationSpec(duration_s=10.0, flicker_corner_hz=1e3, wander_rms_A=1e-12)
    fs = spec.sample_rate_hz
    f = np.geomspace(1.0, 0.05 * fs, 500)
    intended = noise_psd_model(f, spec, components=True)
    realised = noise_psd_model(f, spec, components=True, realised=True)
    np.testing.assert_allclose(realised["flicker"], intended["flicker"], rtol=0.005)
    np.testing.assert_allclose(realised["wander"][f < fs / 100], intended["wander"][f < fs / 100], rtol=0.01)
    f = np.linspace(100.0, 0.4 * fs, 500)
    np.testing.assert_allclose(noise_psd_model(f, spec, components=True, realised=True)["capacitive"],
                               noise_psd_model(f, spec, components=True)["capacitive"], rtol=1e-3)


def test_noise_model_against_reference_integrals():
    spec = SimulationSpec(sample_rate_hz=1e6, bandwidth_hz=20e3, input_capacitance_F=10e-12,
                          voltage_noise_V_per_rtHz=5e-9)
    # (4 pi^2 / 3) e_n^2 C_in^2 B^3 over a brick-wall 100 kHz: 5.736 pA rms (REFERENCES.md, amplifier noise;
    # Levis & Rae 1993 model).
    f = np.linspace(0.0, 100e3, 200001)
    capacitive = noise_psd_model(f, spec, components=True)["capacitive"]
    assert math.sqrt(integrate.trapezoid(capacitive, f)) * 1e12 == pytest.approx(5.736, abs=0.5e-3)
    # White noise through a 4-pole Bessel low-pass passes like a brick wall at 1.046 fc (REFERENCES.md,
    # computed from the analog prototype); at fc = fs / 50 the digital filter is that prototype within 0.5 %.
    f = np.linspace(0.0, spec.sample_rate_hz / 2, 500001)
    gain2 = noise_psd_model(f, spec, components=True)["amplifier_gain2"]
    assert integrate.trapezoid(gain2, f) / spec.bandwidth_hz == pytest.approx(1.046, rel=0.005)


# ------------------------------------------------------------------------------------------------ files
@pytest.mark.parametrize("dtype", ["float32", "float64", "int16"])
def test_bin_file_and_sidecar_readable_with_numpy(tmp_path, dtype):
    spec = SimulationSpec(duration_s=0.3, collision_rate_per_s=40.0, dtype=dtype, baseline_offset_A=2e-11, seed=6)
    result = simulate(spec, tmp_path)
    assert result.data_path == tmp_path / "simulated.bin"
    settings, path = load_sidecar(result.data_path)  # the project's sidecar convention accepts it
    assert path == tmp_path / "simulated.json"
    assert settings["sample_rate_hz"] == spec.sample_rate_hz and settings["n_samples"] == spec.n_samples
    raw = np.fromfile(result.data_path, dtype=settings["dtype"])
    current = raw * settings["gain_A_per_count"] + settings["offset_A"]
    reference = _record(spec)
    assert len(current) == len(reference) == spec.n_samples
    tolerance = settings["gain_A_per_count"] / 2 * 1.001 if dtype == "int16" else \
        np.finfo(dtype).eps * np.abs(reference).max()
    assert np.abs(current - reference).max() <= tolerance
    if dtype == "int16":
        assert np.abs(raw).max() < 32767 and np.abs(raw).max() > 0.5 * 32767  # fits, and uses the range


def test_npy_file(tmp_path):
    spec = SimulationSpec(duration_s=0.2, collision_rate_per_s=20.0, seed=7)
    result = simulate(spec, tmp_path / "x.npy")
    data = np.load(result.data_path)
    assert data.dtype == np.float32 and data.shape == (spec.n_samples,)
    np.testing.assert_allclose(data, _record(spec), rtol=1e-6, atol=1e-18)
    assert json.loads(result.sidecar_path.read_text())["sample_rate_hz"] == spec.sample_rate_hz
    assert result.truth_path == tmp_path / "x.truth.parquet"


def test_overwrite_policy(tmp_path):
    spec = SimulationSpec(duration_s=0.05)
    simulate(spec, tmp_path / "a.bin")
    simulate(spec, tmp_path / "a.bin")  # an earlier simulation's files may be replaced
    with pytest.raises(FileExistsError):
        simulate(spec, tmp_path / "a.bin", overwrite=False)
    (tmp_path / "lab.bin").write_bytes(b"\0" * 16)
    with pytest.raises(FileExistsError, match="not written by the simulator"):
        simulate(spec, tmp_path / "lab.bin")
    assert (tmp_path / "lab.bin").read_bytes() == b"\0" * 16
    simulate(spec, tmp_path / "lab.bin", overwrite=True)


# ------------------------------------------------------------------------------------------------ spec
def test_spec_reads_quantities_and_rejects_bad_values():
    spec = SimulationSpec(sample_rate_hz="500 kHz", bandwidth_hz="100 kHz", median_diameter_m="60 nm",
                          white_noise_A_per_rtHz="10 fA/sqrt(Hz)", shape_weights="spike=3,burst=1")
    assert spec.sample_rate_hz == 500e3 and spec.median_diameter_m == pytest.approx(60e-9)
    assert spec.white_noise_A_per_rtHz == pytest.approx(1e-14)
    assert spec.shape_weights["spike"] == pytest.approx(0.75) and spec.shape_weights["step"] == 0.0
    with pytest.raises(SpecError, match="Nyquist"):
        SimulationSpec(sample_rate_hz=100e3, bandwidth_hz=60e3)
    with pytest.raises(SpecError, match=r"unknown shape.*'spikes'"):
        SimulationSpec(shape_weights={"spikes": 1.0})
    with pytest.raises(SpecError, match="median_diameter_m"):
        SimulationSpec(median_diameter_m="50 kHz")
    with pytest.raises(SpecError, match="diameter_gsd"):
        SimulationSpec(diameter_gsd=0.5)
    with pytest.raises(SpecError, match="material"):
        SimulationSpec(material="Zz")
    with pytest.raises(SpecError, match="dtype"):
        SimulationSpec(dtype="int8")


def test_copper_ink_demo_specs():
    specs = copper_ink_demo_specs()
    assert len(specs) >= 2
    for name, spec in specs.items():
        assert spec.name == name and spec.material == "Cu" and spec.temperature_K == 298.15
        assert spec.electrode_radius_m == 5e-6 and spec.sample_rate_hz == 250e3
        assert 10.0 <= spec.duration_s <= 20.0 and 40e-9 <= spec.median_diameter_m <= 70e-9
        assert spec.concentration_mol_per_m3 is not None and 5.0 < spec.collision_rate() < 50.0
    assert len({spec.seed for spec in specs.values()}) == len(specs)


# ------------------------------------------------------------------------------------------------ CLI
def _cli(argv):
    parser = argparse.ArgumentParser(prog="impactline")
    register_cli(parser.add_subparsers(dest="command"))
    args = parser.parse_args(argv)
    return args.func(args)


def test_cli_writes_files_and_summary(tmp_path, capsys):
    code = _cli(["simulate", "--out", str(tmp_path), "--duration", "200 ms", "--rate", "30",
                 "--sample-rate", "100 kHz", "--bandwidth", "20 kHz", "--diameter", "60 nm", "--seed", "3",
                 "--shapes", "spike=1,burst=1", "--format", "npy", "--noise-scale", "2"])
    assert code == 0
    out = capsys.readouterr().out
    data = tmp_path / "simulated_seed3.npy"
    truth = pq.read_table(tmp_path / "simulated_seed3.truth.parquet")
    assert data.exists() and np.load(data).shape == (20000,)
    assert f"{truth.num_rows} true events" in out and "200 ms" in out
    assert set(_column(truth, "shape")) <= {"spike", "burst"}
    spec = SimulationSpec.from_dict(json.loads(truth.schema.metadata[b"spec"]))
    assert spec.white_noise_A_per_rtHz == pytest.approx(2 * 5e-15)


def test_cli_reports_bad_input(tmp_path, capsys):
    assert _cli(["simulate", "--out", str(tmp_path), "--sample-rate", "fast"]) == 2
    assert "sample_rate_hz" in capsys.readouterr().err
    assert _cli(["simulate", "--out", str(tmp_path / "x.wav")]) == 2
    assert "NAME.bin" in capsys.readouterr().err
