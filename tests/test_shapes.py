"""Event shapes: extraction (waveform measure), embedding, clustering, trained models, and the commands."""

from __future__ import annotations

import argparse
import json
import os

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from impactline import Event, EventWindow, FilterInfo, ParameterError
from impactline.bandwidth import leading_edge
from impactline.errors import ImpactlineError
from impactline.output import CONTRACT_COLUMNS, schema_for
from impactline.pipeline import parse_pipeline
from impactline.registry import default_registry
from impactline.runner import run
from impactline.shapes import (
    ForestModel,
    asinh_transform,
    embed,
    feature_matrix,
    load_run_events,
    match_labels,
    pca_fit,
    read_events_with,
    read_label_file,
    screen_features,
    shape_matrix,
    wavelet_features,
)
from impactline.shapes_cli import register_cli
from impactline.stages import Column
from impactline.testing import check_measure_robust, synthetic_signal
from impactline_plugins.classifiers.cluster import (
    DensityShapes,
    GaussianMixtureShapes,
    KMeansShapes,
    assignment_entropy,
    choose_combination,
    combine_components,
    elbow,
    merge_posterior,
    minor_clusters,
    relabel_by_size,
    step_silhouettes,
)
from impactline_plugins.measures.waveform import WAVEFORM_STAGES, Waveform, bin_average, log_edges, make_waveform_stage
from scipy.integrate import quad
from scipy.special import erf
from sklearn.metrics import adjusted_rand_score

FS = 100e3
INFO = FilterInfo(cutoff_hz=20e3, rise_time_s=0.35 / 20e3)


def _window(signal, start, end, baseline=0.0, polarity=1, noise=1e-12):
    event = Event(start, end, baseline, noise, polarity, {})
    return EventWindow(signal=np.asarray(signal, dtype=float), window_start_index=0, start=start, end=end,
                       sample_rate_hz=FS, event=event, filter_info=INFO)


# ------------------------------------------------------------------------------------------------ resampling
def test_bin_average_of_a_line_is_its_value_at_bin_centres():
    x = 3.0 + 0.5 * np.arange(40)
    edges = np.array([2.0, 2.7, 5.1, 9.9, 20.25, 30.0])
    centres = 0.5 * (edges[:-1] + edges[1:])
    np.testing.assert_allclose(bin_average(x, edges), 3.0 + 0.5 * centres, rtol=1e-13)


def test_bin_average_over_whole_samples_is_the_trapezoid_rule():
    x = np.random.default_rng(1).standard_normal(50)
    got = bin_average(x, np.array([10.0, 13.0, 14.0]))
    assert got[0] == pytest.approx((x[10] / 2 + x[11] + x[12] + x[13] / 2) / 3, rel=1e-12)
    assert got[1] == pytest.approx((x[13] + x[14]) / 2, rel=1e-12)


def test_bin_average_matches_numerical_integration_of_the_interpolant():
    # Reference: scipy.integrate.quad over np.interp of the zero-padded samples (general-purpose libraries).
    x = np.random.default_rng(2).standard_normal(30)
    padded_pos = np.arange(-1, 31)
    padded = np.concatenate(([0.0], x, [0.0]))
    edges = np.sort(np.random.default_rng(3).uniform(-4.0, 34.0, 12))
    expected = [quad(lambda u: np.interp(u, padded_pos, padded, left=0.0, right=0.0), a, b, limit=200,
                     points=np.arange(np.ceil(a), np.floor(b) + 1))[0] / (b - a)
                for a, b in zip(edges[:-1], edges[1:], strict=True)]
    np.testing.assert_allclose(bin_average(x, edges), expected, rtol=1e-9, atol=1e-12)


def test_bin_average_keeps_the_area_when_the_window_covers_the_pulse():
    x = np.random.default_rng(4).standard_normal(37)
    edges = np.linspace(-3.3, 40.1, 17)
    assert np.sum(bin_average(x, edges) * np.diff(edges)) == pytest.approx(np.sum(x), rel=1e-12)


def test_log_edges_are_increasing_and_cover_pre_and_post():
    edges = log_edges(12.0, 500.0, 64)
    assert edges.size == 65 and np.all(np.diff(edges) > 0)
    assert edges[0] == -12.0 and edges[-1] == pytest.approx(500.0)
    assert np.count_nonzero(edges < 0) == 8 and 0.0 in edges and 1.0 in edges


# ------------------------------------------------------------------------------------------------ waveform measure
def test_bundled_lengths_and_factory_give_fixed_length_columns():
    registry = default_registry()
    for cls in WAVEFORM_STAGES:
        assert registry.get("measure", cls.name).cls is cls
        assert cls.columns["shape"].length == cls.points
    assert [c.points for c in WAVEFORM_STAGES] == [64, 32, 128]
    custom = make_waveform_stage(20)
    assert custom.name == "waveform-20" and custom.columns["shape"].length == 20
    values = custom().measure(_window(np.r_[np.zeros(30), np.ones(10), np.zeros(30)], 30, 40))
    assert len(values["shape"]) == 20
    with pytest.raises(ValueError, match="between 4 and 4096"):
        make_waveform_stage(2)


@pytest.mark.parametrize("cls", WAVEFORM_STAGES)
@pytest.mark.parametrize("settings", [{}, {"align": "peak", "normalize": ["charge"]}, {"align": "edge"},
                                      {"normalize": ["none", "duration"]}, {"spacing": "log", "baseline": "detector"}])
def test_waveform_survives_awkward_events(cls, settings):
    check_measure_robust(cls(**settings))


def test_onset_alignment_with_one_sample_bins_gives_neighbour_means():
    # pre + post = 64 samples over 64 points: bin k covers [start - 10 + k, start - 9 + k].
    x = np.random.default_rng(5).standard_normal(200)
    stage = Waveform(pre=10 / FS, post=54 / FS, align="onset", normalize=["none"], baseline="detector")
    values = stage.measure(_window(x, 80, 90))
    expected = (x[70:134] + x[71:135]) / 2
    np.testing.assert_allclose(values["shape"], expected.astype(np.float32), rtol=1e-6)
    assert values["shape_scale_A"] == 1.0 and values["shape_dt_s"] == pytest.approx(1 / FS)
    assert values["shape_complete"]


def _gaussian(centre, n=300, width=4.0):
    return np.exp(-0.5 * ((np.arange(n) - centre) / width) ** 2)


def test_peak_alignment_is_sub_sample():
    stage = Waveform(pre=20 / FS, post=44 / FS, align="peak", baseline="detector")
    shapes = [np.asarray(stage.measure(_window(_gaussian(c), 140, 160))["shape"]) for c in (150.0, 150.3, 150.7)]
    # The largest point sits where the alignment point falls (20 of 64 one-sample bins before it).
    assert all(int(np.argmax(s)) in (19, 20) for s in shapes)
    worst_peak = max(np.max(np.abs(s - shapes[0])) for s in shapes)
    onset = Waveform(pre=20 / FS, post=44 / FS, align="onset", baseline="detector")
    onset_shapes = [np.asarray(onset.measure(_window(_gaussian(c), 140, 160))["shape"]) for c in (150.0, 150.7)]
    assert worst_peak < 0.02 < np.max(np.abs(onset_shapes[1] - onset_shapes[0]))


def _blip(t0, n=700, width=4.0, sigma=1.0):
    """A rectangle of ``width`` samples from ``t0`` through a Gaussian filter of ``sigma`` samples (peak < 1)."""
    t = np.arange(n) - t0
    return 0.5 * (erf(t / (np.sqrt(2) * sigma)) - erf((t - width) / (np.sqrt(2) * sigma)))


def test_leading_edge_is_the_half_height_instant_of_the_first_peak_wherever_the_threshold_fell():
    # Two Gaussian sub-spikes (sigma 3 samples), the second higher: the half-height crossing of the first is
    # at its centre - 3 sqrt(2 ln 2) (up to the linear interpolation between samples).
    y = 0.6 * _gaussian(150.3, 400, 3.0) + _gaussian(180.3, 400, 3.0)
    expected = 150.3 - 3.0 * np.sqrt(2 * np.log(2))
    for start in (140, 144, 147, 149):  # below and above half of the first peak (0.3 reached near 146.8)
        edge = leading_edge(y, 0.01, start)
        assert edge.peak_index == 150
        assert edge.crossing == pytest.approx(expected, abs=0.05)
    # From the first sample on, as the runner calls it for onset_s: the same instant, counted from 0.
    assert leading_edge(y[144:], 0.01).crossing == pytest.approx(expected - 144, abs=0.05)
    assert leading_edge(y[149:], 0.01).crossing == 0.0  # nothing before the start to interpolate with
    assert leading_edge(-y, 0.01, 140) is None and leading_edge(y, 0.01, 400) is None
    # A level above half long before the start is not an edge (a missed offset): the edge is taken at the start.
    offset = np.r_[np.full(100, 7.0), np.full(20, 12.0), np.full(100, 7.0)]
    assert leading_edge(offset, 0.1, 100).crossing == 100.0
    rise = np.r_[np.zeros(97), np.full(3, 7.0), offset[100:]]  # above half (6) from sample 97: 3 samples back
    assert leading_edge(rise, 0.1, 100).crossing == pytest.approx(96 + 6 / 7)


def test_edge_alignment_ignores_a_one_sample_shift_of_the_threshold_crossing():
    # A 4-sample blip: a threshold crossing one sample later moves the onset-aligned log-spaced shape by a
    # point but not the edge-aligned one.
    x = 2e-10 * _blip(200.4)
    shapes = {}
    for align in ("edge", "onset"):
        stage = Waveform(pre=10 / FS, post=500 / FS, align=align, spacing="log", baseline="detector")
        shapes[align] = [np.asarray(stage.measure(_window(x, start, 206, noise=1e-12))["shape"])
                         for start in (200, 201)]
    edge_change = np.max(np.abs(shapes["edge"][1] - shapes["edge"][0]))
    onset_change = np.max(np.abs(shapes["onset"][1] - shapes["onset"][0]))
    assert edge_change < 1e-6 and onset_change > 0.1


def test_edge_alignment_anchors_a_burst_at_its_first_sub_spike():
    # Same first sub-spike, second one higher or lower: edge alignment keeps the first in place, peak
    # alignment jumps to the second when it is the highest.
    bursts = [0.6 * _gaussian(150.3, 400, 3.0) + h * _gaussian(180.3, 400, 3.0) for h in (1.0, 0.3)]
    shapes = {}
    for align in ("edge", "peak"):
        stage = Waveform(pre=16 / FS, post=48 / FS, align=align, normalize=["none"], baseline="detector")
        shapes[align] = [np.asarray(stage.measure(_window(b * 1e-10, 140, 200, noise=1e-13))["shape"]) * 1e10
                         for b in bursts]
    # One-sample bins from 16 before the anchor (~146.7); bins 0-35 reach 20 samples after it: the first
    # sub-spike only (the second, 33.6 samples after the anchor, is 4.5 sigma away).
    np.testing.assert_allclose(shapes["edge"][0][:36], shapes["edge"][1][:36], atol=1e-3)
    assert np.argmax(shapes["edge"][0][:36]) in (19, 20)  # the first peak, 3.5 samples after its edge
    assert np.max(np.abs(shapes["peak"][0][:36] - shapes["peak"][1][:36])) > 0.3


def test_normalizations():
    x = np.r_[np.zeros(100), np.full(40, 5e-12), np.zeros(100)]
    window = _window(x, 100, 140)
    peak = Waveform(pre=20 / FS, post=60 / FS).measure(window)
    assert peak["shape_scale_A"] == pytest.approx(5e-12)
    assert max(peak["shape"]) == pytest.approx(1.0, abs=1e-6)
    charge = Waveform(pre=20 / FS, post=60 / FS, normalize=["charge"]).measure(window)
    # |charge| / duration = mean excursion over the event = 5 pA for a rectangle.
    assert charge["shape_scale_A"] == pytest.approx(5e-12)
    raw = Waveform(pre=20 / FS, post=60 / FS, normalize=["none"]).measure(window)
    assert max(raw["shape"]) == pytest.approx(5e-12, rel=1e-6)
    # The area: sum(shape) * dt * scale is the event charge (window covers the pulse).
    assert np.sum(raw["shape"]) * raw["shape_dt_s"] == pytest.approx(40 * 5e-12 / FS, rel=1e-6)


def test_duration_normalization_makes_long_and_short_pulses_alike():
    stage = Waveform(pre=400 / FS, post=400 / FS, normalize=["peak", "duration"])

    def hann_event(length):
        return _window(np.r_[np.zeros(500), np.hanning(length), np.zeros(500)], 500, 500 + length)

    short, long = stage.measure(hann_event(120)), stage.measure(hann_event(1000))
    assert short["shape_complete"] and long["shape_complete"]
    assert short["shape_dt_s"] == pytest.approx(1.5 * 120 / 64 / FS)
    # The event fills the middle 2/3 of the points whatever its duration (a fixed time base does not).
    assert np.max(np.abs(np.subtract(short["shape"], long["shape"]))) < 0.03
    fixed = Waveform(pre=400 / FS, post=400 / FS)
    assert np.max(np.abs(np.subtract(fixed.measure(hann_event(120))["shape"],
                                     fixed.measure(hann_event(1000))["shape"]))) > 0.5
    assert max(short["shape"]) == pytest.approx(1.0, abs=0.01) and short["shape"][5] == 0.0


def test_cathodic_events_keep_their_sign():
    x = -_gaussian(150.0) * 3e-12
    values = Waveform(pre=20 / FS, post=44 / FS, align="peak").measure(_window(x, 140, 160, polarity=-1))
    assert min(values["shape"]) == pytest.approx(-1.0, abs=0.02) and max(values["shape"]) < 1e-3


def test_window_beyond_the_recording_is_padded_and_flagged():
    x = np.r_[np.ones(10), np.zeros(50)]
    values = Waveform(pre=20 / FS, post=44 / FS, baseline="detector").measure(_window(x, 0, 10))
    assert not values["shape_complete"]
    assert values["shape"][:19] == [0.0] * 19 and values["shape"][21] == pytest.approx(1.0)


def test_pre_baseline_follows_an_offset_the_detector_missed():
    x = np.r_[np.full(100, 7e-12), np.full(20, 12e-12), np.full(100, 7e-12)]
    values = Waveform(pre=20 / FS, post=44 / FS).measure(_window(x, 100, 120, baseline=0.0))
    assert values["shape"][0] == 0.0 and values["shape_scale_A"] == pytest.approx(5e-12)
    detector = Waveform(pre=20 / FS, post=44 / FS, baseline="detector").measure(_window(x, 100, 120))
    assert detector["shape"][0] == pytest.approx(7 / 12, rel=1e-6)


def test_log_spacing_shows_a_step_as_flat_and_a_blip_as_brief():
    fs_step = np.r_[np.zeros(100), np.ones(2000)]
    stage = Waveform(pre=10 / FS, post=1500 / FS, align="onset", spacing="log")
    step = np.asarray(stage.measure(_window(fs_step, 100, 1000))["shape"])
    assert np.isnan(stage.measure(_window(fs_step, 100, 1000))["shape_dt_s"])
    np.testing.assert_allclose(step[:7], 0.0, atol=1e-12)
    assert step[7] == pytest.approx(0.4)  # the last pre bin, [-1.25, 0] samples, holds the interpolated edge
    np.testing.assert_allclose(step[8:], 1.0, atol=1e-12)
    blip = np.asarray(stage.measure(_window(np.r_[np.zeros(100), np.ones(3), np.zeros(2000)], 100, 103))["shape"])
    assert blip[8] > 0.9 and np.all(blip[30:] == 0.0)


def test_flat_events_give_nan_shapes_and_bad_settings_are_refused():
    values = Waveform().measure(_window(np.zeros(200), 50, 70))
    assert np.all(np.isnan(values["shape"])) and values["shape_complete"] is not None
    with pytest.raises(ParameterError, match="peak.*charge"):
        Waveform(normalize=["peak", "charge"])
    with pytest.raises(ParameterError, match="none"):
        Waveform(normalize=["none", "peak"])
    with pytest.raises(ParameterError, match="normalize"):
        Waveform(normalize=["area"])


def test_waveform_in_a_pipeline_does_not_depend_on_chunking(tmp_path):
    x, fs = synthetic_signal(n=120_000)
    np.savez(tmp_path / "rec.npz", current=x, sample_rate_hz=fs)
    text = """
[pipeline]
chunk_samples = {chunk}
[detector]
use = "threshold"
[[measure]]
use = "waveform-32"
spacing = "log"
post = "1 ms"
[classifier]
use = "kmeans"
k = 2
"""
    tables = []
    for chunk in (4096, 1 << 20):
        result = run(parse_pipeline(text.format(chunk=chunk)), [tmp_path / "rec.npz"], tmp_path / f"run{chunk}")
        tables.append(result.events)
        assert (tmp_path / f"run{chunk}" / "labels.parquet").exists()
    assert tables[0].num_rows > 5
    assert tables[0].column("shape").equals(tables[1].column("shape"))
    assert tables[0].column("cluster").equals(tables[1].column("cluster"))


# ------------------------------------------------------------------------------------------------ embedding
def test_pca_matches_scikit_learn_over_batches():
    from sklearn.decomposition import PCA

    rng = np.random.default_rng(6)
    shapes = (rng.standard_normal((70_000, 6)) @ rng.standard_normal((6, 6))).astype(np.float32)
    ours = pca_fit(shapes)  # 70,000 rows: two accumulation batches
    reference = PCA().fit(shapes.astype(np.float64))
    np.testing.assert_allclose(ours.variances, reference.explained_variance_, rtol=1e-8)
    np.testing.assert_allclose(np.abs(ours.components), np.abs(reference.components_), atol=1e-7)
    np.testing.assert_allclose(np.abs(ours.transform(shapes[:100], 3)),
                               np.abs(reference.transform(shapes[:100].astype(np.float64))[:, :3]), atol=1e-8)


def test_wavelet_features_match_pywavelets_and_keep_the_energy():
    import pywt

    shapes = np.random.default_rng(7).standard_normal((5, 64))
    got = wavelet_features(shapes)
    expected = np.concatenate(pywt.wavedec(shapes[2], "haar", level=4))
    np.testing.assert_allclose(got[2], expected, rtol=1e-12)
    np.testing.assert_allclose(np.sum(got ** 2, axis=1), np.sum(shapes ** 2, axis=1), rtol=1e-12)


def test_asinh_is_linear_near_zero_and_logarithmic_far_out():
    shapes = np.array([[1.0, 0.001, -0.001, 0.5], [1.0, 0.0, 0.0, 0.0]])
    out = asinh_transform(shapes, floor=0.01)
    assert out[0, 1] == pytest.approx(0.1, rel=5e-3) and out[0, 2] == pytest.approx(-0.1, rel=5e-3)
    assert out[0, 0] - out[0, 3] == pytest.approx(np.log(2.0), rel=1e-3)


def test_feature_matrix_logs_quantities_and_fills_gaps():
    table = pa.table({"duration_s": [1e-3, 1e-2, np.nan, 1e-4], "subpeak_count": [1, 2, 3, 4]})
    matrix, used, fills = feature_matrix(table)
    assert used == ["duration_s", "subpeak_count"]
    np.testing.assert_allclose(matrix[:, 0], [-3, -2, -3, -4])
    np.testing.assert_allclose(matrix[:, 1], [1, 2, 3, 4])
    with pytest.raises(ImpactlineError, match="not in the events"):
        feature_matrix(table, ["fwhm_s"])


def _atom_events(n_per_class=200, seed=1):
    """Three kinds of event, each one Gaussian blob in (log duration, log peak), plus two misleading columns.

    As measured on simulated steps (docs/shapes.md): ``subpeak_count`` is an integer, 1-2 on most events
    but 60-180 on half of the second kind (noise peaks counted along a long plateau); ``decay_time_s`` is
    undefined (NaN) on half of the third kind and about 1 s on its other half, so a median fill puts the
    first half onto the other kinds' typical value.
    """
    rng = np.random.default_rng(seed)
    kind = np.repeat(np.arange(3), n_per_class)
    half = rng.random(kind.size) < 0.5
    duration = 10.0 ** (np.array([-4.0, -3.0, -2.0])[kind] + 0.1 * rng.standard_normal(kind.size))
    peak = 10.0 ** (np.array([-10.0, -9.0, -10.0])[kind] + 0.1 * rng.standard_normal(kind.size))
    decay = 10.0 ** (np.array([-3.5, -3.5, 0.0])[kind] + 0.1 * rng.standard_normal(kind.size))
    decay[(kind == 2) & half] = np.nan
    count = rng.integers(1, 3, kind.size)
    count[(kind == 1) & half] = rng.integers(60, 181, np.sum((kind == 1) & half))
    table = pa.table({"file": ["f"] * kind.size, "event_id": np.arange(kind.size), "duration_s": duration,
                      "peak_A": peak, "decay_time_s": decay, "subpeak_count": count.astype(np.int64)})
    return table, kind


def test_screen_features_leaves_out_counts_and_mostly_missing_columns():
    table, kind = _atom_events()
    kept, dropped = screen_features(table, ["duration_s", "peak_A", "decay_time_s", "subpeak_count"])
    assert kept == ["duration_s", "peak_A"]
    assert dropped == {"decay_time_s": f"missing on {100 * np.mean(np.isnan(table['decay_time_s'])):.0f} % of events",
                       "subpeak_count": "integer-valued"}
    # Judged on the rows given: without the third kind nothing is missing.
    kept, dropped = screen_features(table, ["decay_time_s"], rows=kind < 2)
    assert kept == ["decay_time_s"] and dropped == {}
    kept, _ = screen_features(table, ["decay_time_s"], max_missing=0.5)
    assert kept == ["decay_time_s"]
    with pytest.raises(ImpactlineError, match="left out subpeak_count: integer-valued; name them with --features"):
        embed(table.select(["file", "event_id", "subpeak_count"]), "features")


def test_screened_default_features_give_the_true_count_and_the_atoms_do_not():
    # Known answer: three kinds. With the count and the median-filled column forced in, the second and third
    # kinds each fall into two well-separated groups and the mixture counts five.
    table, kind = _atom_events()
    stage = GaussianMixtureShapes(embedding="features", max_k=8)
    out = stage.fit_predict(table)
    assert stage.embedding_["features"] == ["duration_s", "peak_A"]
    assert set(stage.embedding_["features_dropped"]) == {"decay_time_s", "subpeak_count"}
    assert out["cluster_count"][0] == 3
    assert adjusted_rand_score(kind, out["cluster"]) > 0.98
    bic = [r for r in stage.selection_.to_pylist() if r["criterion"] == "bic"]
    assert [r["k"] for r in bic if r["chosen"]] == [3]
    forced = GaussianMixtureShapes(embedding="features", max_k=8,
                                   features=["duration_s", "peak_A", "decay_time_s", "subpeak_count"])
    assert forced.fit_predict(table)["cluster_count"][0] == 5


# ------------------------------------------------------------------------------------------------ clustering
def _templates(points=32):
    t = np.arange(points, dtype=float)
    return np.stack([np.exp(-t / 3.0), (t < 2) * 1.0, np.ones(points), np.exp(-((t - 12.0) / 3.0) ** 2)])


def _shape_events(n_per_class=60, noise=0.003, seed=0, files=("a.bin", "b.bin")):
    rng = np.random.default_rng(seed)
    templates = _templates()
    classes = np.repeat(np.arange(len(templates)), n_per_class)
    rng.shuffle(classes)
    shapes = templates[classes] + noise * rng.standard_normal((classes.size, templates.shape[1]))
    file_of = np.asarray(files)[np.arange(classes.size) % len(files)]
    event_id = np.zeros(classes.size, dtype=np.int64)
    for f in files:
        event_id[file_of == f] = np.arange(np.sum(file_of == f))
    duration = np.array([1e-3, 1e-5, 1e-2, 5e-4])[classes] * rng.lognormal(0, 0.1, classes.size)
    table = pa.table({
        "file": file_of, "event_id": event_id, "duration_s": duration,
        "peak_A": 1e-11 * rng.lognormal(0, 0.2, classes.size),
        "shape": pa.FixedSizeListArray.from_arrays(pa.array(shapes.astype(np.float32).ravel()), templates.shape[1]),
    })
    return table, classes


# k-means gets the shapes only: with the default features block it also splits the (uninformative) spread of
# peak_A, which GMM components absorb by stretching; the benchmark reports the same.
@pytest.mark.parametrize("stage", [KMeansShapes(embedding="pca"), GaussianMixtureShapes(), DensityShapes(),
                                   KMeansShapes(embedding="wavelet", transform="none"),
                                   GaussianMixtureShapes(embedding="pca")])
def test_clustering_recovers_well_separated_shapes(stage):
    events, classes = _shape_events()
    out = stage.fit_predict(events)
    assert adjusted_rand_score(classes, out["cluster"]) > 0.95
    assert out["cluster_count"][0] == 4
    rows = stage.selection_.to_pylist()
    for criterion in {r["criterion"] for r in rows}:  # gmm: BIC, then the combination by entropy
        assert [r["chosen"] for r in rows if r["criterion"] == criterion].count(True) == 1


def test_bic_picks_the_true_number_of_gaussian_blobs():
    from sklearn.datasets import make_blobs

    for k in (3, 5):
        X, y = make_blobs(n_samples=600, centers=k, n_features=3, cluster_std=0.6, center_box=(-12, 12),
                          random_state=k)
        table = pa.table({"file": ["f"] * 600, "event_id": np.arange(600), "a": X[:, 0], "b": X[:, 1], "c": X[:, 2]})
        # combine = "entropy" too: well-separated components barely overlap, the entropy plot is flat and
        # nothing may be merged.
        stage = GaussianMixtureShapes(embedding="features", features=["a", "b", "c"], max_k=8, combine="entropy")
        out = stage.fit_predict(table)
        selection = stage.selection_.to_pylist()
        bic = [r for r in selection if r["criterion"] == "bic"]
        assert [r["k"] for r in bic] == list(range(1, 9))
        assert out["cluster_count"][0] == k
        assert adjusted_rand_score(y, out["cluster"]) > 0.98
        entropy = [r for r in selection if r["criterion"] == "entropy"]
        assert [r["k"] for r in entropy] == list(range(k, 0, -1))
        assert {r["decision"] for r in entropy} == {"flat"} and entropy[0]["chosen"]


# ------------------------------------------------------------------------------------------------ combining
def _two_blob_class():
    """Four classes in 2-D; the fourth is two unit-variance blobs 3 sigma apart (one class, two Gaussians)."""
    from sklearn.datasets import make_blobs

    centers = np.array([[0.0, 0.0], [12.0, 0.0], [0.0, 12.0], [10.5, 12.0], [13.5, 12.0]])
    X, blob = make_blobs(n_samples=[150] * 5, centers=centers, cluster_std=1.0, random_state=0)
    table = pa.table({"file": ["f"] * len(X), "event_id": np.arange(len(X)), "a": X[:, 0], "b": X[:, 1]})
    return table, np.minimum(blob, 3)


def test_entropy_combination_recovers_a_class_made_of_two_gaussians():
    # Baudry, Raftery, Celeux, Lo & Gottardo (2010), J. Comput. Graph. Stat. 19:332-353: BIC fits the
    # density (two components for the two-blob class), combining by entropy recovers the classes.
    table, y = _two_blob_class()
    stage = GaussianMixtureShapes(embedding="features", features=["a", "b"], max_k=6, combine="entropy")
    out = stage.fit_predict(table)
    rows = stage.selection_.to_pylist()
    k_bic = next(r["k"] for r in rows if r["criterion"] == "bic" and r["chosen"])
    assert k_bic == 5 > np.unique(y).size
    assert adjusted_rand_score(y, out["cluster_component"]) < 0.95  # the components alone split a class
    assert out["cluster_count"][0] == 4
    assert adjusted_rand_score(y, out["cluster"]) > 0.95
    entropy = [r for r in rows if r["criterion"] == "entropy"]
    assert [r["k"] for r in entropy] == [5, 4, 3, 2, 1] and entropy[1]["chosen"]
    assert entropy[1]["decision"] == "elbow" and entropy[0]["merge"] is None and entropy[0]["merged_events"] == 0
    # The first merge joins the two halves of class 3 (components numbered by size: look them up).
    halves = tuple(sorted(np.unique(out["cluster_component"][y == 3])))
    assert entropy[1]["merge"] == "+".join("{" + str(c) + "}" for c in halves)

    # Exact merging: a combined cluster's posterior is the sum of its components' posteriors.
    X = embed(table, "features", features=["a", "b"]).X
    posterior = stage.mixture_.predict_proba(X)[:, stage.component_order_]
    groups = stage.combination_.groups[1]
    merged = np.column_stack([posterior[:, list(g)].sum(axis=1) for g in groups])
    np.testing.assert_allclose(merged, merge_posterior(posterior, groups), rtol=0, atol=0)
    np.testing.assert_allclose(out["cluster_probability"], merged.max(axis=1), rtol=1e-15)
    assert adjusted_rand_score(np.argmax(merged, axis=1), out["cluster"]) == 1.0
    np.testing.assert_allclose(merged.sum(axis=1), 1.0, rtol=1e-12)


def _entropy_reference(t):
    """-sum t ln t over positive entries, written out (no shared code with the module)."""
    positive = t[t > 0]
    return float(-np.sum(positive * np.log(positive)))


def test_merging_follows_the_direct_entropy_of_every_candidate():
    # Reference: at each step evaluate every pair by recomputing the entropy of the whole merged assignment
    # (Baudry et al. 2010: merge the pair whose union gives the lowest entropy) and count the merged events
    # (most probable cluster before the merge is one of the pair).
    rng = np.random.default_rng(11)
    t = rng.dirichlet(np.full(6, 0.3), size=400)
    combination = combine_components(t)
    groups = [(j,) for j in range(6)]
    merged_events = 0
    assert combination.entropy[0] == pytest.approx(_entropy_reference(t), rel=1e-12)
    for step in range(1, 6):
        candidates = []
        for a in range(len(groups)):
            for b in range(a + 1, len(groups)):
                trial = [g for i, g in enumerate(groups) if i not in (a, b)] + [tuple(sorted(groups[a] + groups[b]))]
                candidates.append((_entropy_reference(merge_posterior(t, trial)), a, b))
        best, a, b = min(candidates, key=lambda c: c[0])
        winner = np.argmax(merge_posterior(t, groups), axis=1)
        merged_events += int(np.sum((winner == a) | (winner == b)))
        assert combination.merged[step] == (groups[a], groups[b])
        groups = sorted([g for i, g in enumerate(groups) if i not in (a, b)] + [tuple(sorted(groups[a] + groups[b]))])
        assert combination.groups[step] == groups
        assert combination.entropy[step] == pytest.approx(best, rel=1e-12, abs=1e-9)
        assert assignment_entropy(merge_posterior(t, groups)) == pytest.approx(best, rel=1e-12, abs=1e-9)
        assert combination.merged_events[step] == merged_events
    assert combination.counts.tolist() == [6, 5, 4, 3, 2, 1] and combination.entropy[-1] == pytest.approx(0, abs=1e-9)
    # (a + b) ln(a + b) >= a ln a + b ln b: merging never raises the entropy.
    assert np.all(np.diff(combination.entropy) <= 1e-9)


def test_elbow_is_the_best_two_segment_fit():
    # Steep then shallow, each exactly linear, meeting at index 3; slight noise on top.
    x = np.array([0.0, 50, 100, 150, 400, 700, 1000])
    y = np.where(x <= 150, 40 - 0.25 * x, 2.5 - 0.0025 * (x - 150)) + np.array([0, 0.1, -0.1, 0, 0.05, -0.05, 0])
    index, rss = elbow(x, y)

    def line_rss(u, v):  # reference: numpy's least-squares polynomial of degree 1
        return float(np.sum((v - np.polyval(np.polyfit(u, v, 1), u)) ** 2))

    expected = [line_rss(x[:c + 1], y[:c + 1]) + line_rss(x[c:], y[c:]) for c in range(1, 6)]
    np.testing.assert_allclose(rss[1:6], expected, rtol=1e-9, atol=1e-12)
    assert np.isnan(rss[0]) and np.isnan(rss[-1]) and index == 1 + int(np.argmin(expected)) == 3
    with pytest.raises(ValueError, match="at least 3"):
        elbow(x[:2], y[:2])


def test_choice_of_the_number_of_clusters():
    # Two overlapping components (per-event posteriors near 0.5) and two far ones: one merge, then flat.
    rng = np.random.default_rng(12)
    p = rng.uniform(0.3, 0.7, 300)
    t = np.zeros((900, 4))
    t[:300, 0], t[:300, 1] = p, 1 - p
    t[300:600, 2] = 1.0
    t[600:, 3] = 1.0
    combination = combine_components(t)
    assert choose_combination(combination)[::2] == (1, "elbow")
    assert choose_combination(combination, axis="standard")[::2] == (1, "elbow")
    assert choose_combination(combination, min_gain=1.0)[::2] == (0, "flat")  # ln 2 nats at most per event
    assert choose_combination(combination, clusters=2)[::2] == (2, "fixed")
    assert choose_combination(combination, clusters=9)[::2] == (0, "fixed")
    assert choose_combination(combine_components(t[:300, :2]))[::2] == (0, "few")
    with pytest.raises(ValueError, match="axis"):
        choose_combination(combination, axis="log")


def _silhouette_reference(X, labels):
    """Mean silhouette written out from Rousseeuw (1987), J. Comput. Appl. Math. 20:53-65 (a singleton: s = 0)."""
    distance = np.sqrt(((X[:, None, :] - X[None, :, :]) ** 2).sum(axis=2))
    values = []
    for i in range(len(X)):
        own = labels == labels[i]
        if own.sum() == 1:
            values.append(0.0)
            continue
        a = distance[i, own].sum() / (own.sum() - 1)
        b = min(distance[i, labels == c].mean() for c in np.unique(labels) if c != labels[i])
        values.append((b - a) / max(a, b))
    return float(np.mean(values))


def test_silhouette_rule_keeps_the_step_with_the_largest_mean_silhouette():
    # Four classes, BIC fits five Gaussians (class 3 is two blobs 3 sigma apart): the step with the largest
    # mean silhouette is the four classes; each step's value is Rousseeuw's, computed on all the events here.
    table, y = _two_blob_class()
    stage = GaussianMixtureShapes(embedding="features", features=["a", "b"], max_k=6, count_rule="silhouette")
    out = stage.fit_predict(table)
    assert out["cluster_count"][0] == 4 and adjusted_rand_score(y, out["cluster"]) > 0.95
    entropy = [r for r in stage.selection_.to_pylist() if r["criterion"] == "entropy"]
    assert [r["k"] for r in entropy] == [5, 4, 3, 2, 1] and entropy[1]["chosen"]
    assert {r["decision"] for r in entropy} == {"silhouette"} and entropy[-1]["silhouette"] is None
    X = embed(table, "features", features=["a", "b"]).X
    posterior = stage.mixture_.predict_proba(X)[:, stage.component_order_]
    for row, groups in zip(entropy[:-1], stage.combination_.groups, strict=False):
        labels = np.argmax(merge_posterior(posterior, groups), axis=1)
        assert row["silhouette"] == pytest.approx(_silhouette_reference(X, labels), rel=1e-9)
    assert max(r["silhouette"] for r in entropy[:-1]) == entropy[1]["silhouette"]
    # The default rule leaves the column empty (no extra cost).
    elbow_stage = GaussianMixtureShapes(embedding="features", features=["a", "b"], max_k=6)
    elbow_stage.fit_predict(table)
    assert all(r["silhouette"] is None for r in elbow_stage.selection_.to_pylist())

    # Subsampled: the same rows for every step, drawn with the seed.
    sampled = step_silhouettes(X, posterior, stage.combination_, seed=3, sample=200)
    assert np.array_equal(sampled, step_silhouettes(X, posterior, stage.combination_, seed=3, sample=200),
                          equal_nan=True)
    rows = np.sort(np.random.default_rng(3).choice(len(X), size=200, replace=False))
    labels = np.argmax(merge_posterior(posterior[rows], stage.combination_.groups[0]), axis=1)
    assert sampled[0] == pytest.approx(_silhouette_reference(X[rows], labels), rel=1e-9) and np.isnan(sampled[-1])


def test_choice_by_silhouette():
    # Four components, hard posteriors: the choice follows the silhouette given, not the entropy plot.
    t = np.repeat(np.eye(4), 50, axis=0)
    combination = combine_components(t)
    assert choose_combination(combination, silhouette=np.array([0.2, 0.5, 0.7, 0.3]))[::2] == (2, "silhouette")
    # One cluster left is never a candidate, NaN steps are skipped, ties go to the step with more clusters.
    assert choose_combination(combination, silhouette=np.array([0.2, np.nan, 0.1, 0.9]))[::2] == (0, "silhouette")
    assert choose_combination(combination, silhouette=np.array([0.4, 0.6, 0.6, np.nan]))[::2] == (1, "silhouette")
    assert choose_combination(combination, silhouette=np.full(4, np.nan))[::2] == (0, "few")
    assert choose_combination(combination, clusters=3, silhouette=np.zeros(4))[::2] == (1, "fixed")
    with pytest.raises(ValueError, match="one value per step"):
        choose_combination(combination, silhouette=np.zeros(3))


def test_minor_clusters_are_those_under_the_share():
    labels = np.repeat([0, 1, 2, 3], [60, 30, 8, 2])
    assert minor_clusters(labels, 5, 0.05).tolist() == [False, False, False, True, True]  # 4 is empty
    assert minor_clusters(labels, 4, 0.0).tolist() == [False] * 4
    assert minor_clusters(labels, 4, 0.08).tolist() == [False, False, False, True]  # 8 of 100 is not under 8 %
    # The largest cluster always counts, whatever the share asked for.
    assert minor_clusters(np.repeat([0, 1, 2], [34, 33, 33]), 3, 0.5).tolist() == [False, True, True]


def _three_classes_and_a_handful():
    """Three classes of 300 events in 2-D and 9 events far from them (a group too small to be a kind)."""
    from sklearn.datasets import make_blobs

    X, y = make_blobs(n_samples=[300, 300, 300, 9], centers=[[0.0, 0.0], [10.0, 0.0], [0.0, 10.0], [9.0, 9.0]],
                      cluster_std=0.8, random_state=4)
    table = pa.table({"file": ["f"] * len(X), "event_id": np.arange(len(X)), "a": X[:, 0], "b": X[:, 1]})
    return table, y


def test_gmm_dissolves_clusters_under_min_share():
    table, y = _three_classes_and_a_handful()
    stage = GaussianMixtureShapes(embedding="features", features=["a", "b"], max_k=6)
    out = stage.fit_predict(table)  # default: 2 % (18 events) at least; the 9 are left unassigned
    assert out["cluster_count"][0] == 3
    assert np.all(out["cluster"][y == 3] == -1) and np.all(np.isnan(out["cluster_probability"][y == 3]))
    assert np.all(out["cluster"][y < 3] >= 0) and adjusted_rand_score(y[y < 3], out["cluster"][y < 3]) == 1.0
    row = next(r for r in stage.selection_.to_pylist() if r["criterion"] == "min_share")
    assert row["k"] == 3 and row["decision"] == "unassign" and row["score"] == pytest.approx(9 / 909)
    assert row["groups"] and row["chosen"]

    kept = GaussianMixtureShapes(embedding="features", features=["a", "b"], max_k=6, min_share=0).fit_predict(table)
    assert kept["cluster_count"][0] == 4 and adjusted_rand_score(y, kept["cluster"]) == 1.0

    moved = GaussianMixtureShapes(embedding="features", features=["a", "b"], max_k=6, minor="reassign")
    out = moved.fit_predict(table)
    assert out["cluster_count"][0] == 3 and np.all(out["cluster"] >= 0)
    assert adjusted_rand_score(y[y < 3], out["cluster"][y < 3]) == 1.0
    # The posterior renormalized over the kept clusters: a probability, and the most probable of them.
    assert np.all((out["cluster_probability"] > 0) & (out["cluster_probability"] <= 1))
    # Each of the 9 goes where the mixture puts most of its mass once its own component is set aside.
    X = embed(table, "features", features=["a", "b"]).X[y == 3]
    far = moved.mixture_.predict_proba(X)[:, moved.component_order_]
    own = np.bincount(out["cluster_component"][y == 3]).argmax()
    far[:, own] = 0.0
    cluster_of = {c: np.bincount(out["cluster"][(out["cluster_component"] == c) & (y < 3)]).argmax()
                  for c in range(far.shape[1]) if c != own}
    assert out["cluster"][y == 3].tolist() == [cluster_of[c] for c in np.argmax(far, axis=1)]
    assert next(r for r in moved.selection_.to_pylist() if r["criterion"] == "min_share")["decision"] == "reassign"


def test_clustering_runs_blas_on_one_thread(monkeypatch):
    # Thin matrices gain nothing from BLAS threads, and threads spinning against a busy core cost 10x or more
    # (docs/shapes.md): every clustering stage fits inside a one-thread BLAS limit, lifted afterwards.
    from threadpoolctl import threadpool_info

    table, _ = _three_classes_and_a_handful()
    seen = {}
    for cls in (GaussianMixtureShapes, KMeansShapes, DensityShapes):
        original = cls._cluster

        def spy(self, emb, original=original, name=cls.name):
            seen[name] = {pool["num_threads"] for pool in threadpool_info() if pool["user_api"] == "blas"}
            return original(self, emb)

        monkeypatch.setattr(cls, "_cluster", spy)
        fixed = {"k": 3} if cls is KMeansShapes else {}
        cls(embedding="features", features=["a", "b"], **fixed).fit_predict(table)
    assert seen == {"gmm": {1}, "kmeans": {1}, "density": {1}}
    after = {pool["num_threads"] for pool in threadpool_info() if pool["user_api"] == "blas"}
    assert after != {1} or os.cpu_count() == 1   # the limit is lifted again


def test_density_leaves_outliers_unassigned_also_beyond_the_fitted_sample():
    from sklearn.datasets import make_blobs

    X, _ = make_blobs(n_samples=900, centers=3, n_features=2, cluster_std=0.4, random_state=1)
    outliers = np.array([[40.0, 40.0], [-40.0, 35.0], [38.0, -41.0], [0.0, 60.0]])
    X = np.vstack([X, outliers])
    table = pa.table({"file": ["f"] * len(X), "event_id": np.arange(len(X)), "a": X[:, 0], "b": X[:, 1]})
    for fit_sample in (0, 300):  # all events fitted; or 300 fitted and the rest attached by core distance
        out = DensityShapes(embedding="features", features=["a", "b"], fit_sample=fit_sample,
                            min_cluster_size=20).fit_predict(table)
        assert np.all(out["cluster"][-4:] == -1) and np.all(out["cluster_probability"][-4:] == 0)
        assert out["cluster_count"][0] == 3 and np.mean(out["cluster"][:-4] >= 0) > 0.9


def test_events_without_a_usable_shape_stay_unassigned():
    events, _ = _shape_events()
    shapes = events.column("shape").to_pylist()
    shapes[3] = [float("nan")] * 32
    shapes[5] = None
    events = events.set_column(events.schema.get_field_index("shape"), "shape",
                               pa.array(shapes, type=pa.list_(pa.float32(), 32)))
    out = KMeansShapes(k=4).fit_predict(events)
    assert out["cluster"][3] == -1 and out["cluster"][5] == -1 and np.isnan(out["cluster_distance"][3])
    assert np.sum(out["cluster"] == -1) == 2
    with pytest.raises(ImpactlineError, match="waveform"):
        KMeansShapes().fit_predict(events.drop_columns(["shape"]))


def test_same_seed_same_clusters_and_numbering_by_size():
    events, _ = _shape_events(seed=3)
    for cls in (KMeansShapes, GaussianMixtureShapes, DensityShapes):
        a = cls(seed=7, fit_sample=150).fit_predict(events)
        b = cls(seed=7, fit_sample=150).fit_predict(events)
        for name in a:
            np.testing.assert_array_equal(a[name], b[name])
    np.testing.assert_array_equal(relabel_by_size(np.array([5, 5, -1, 2, 2, 2, 9])), [1, 1, -1, 0, 0, 0, 2])


# ------------------------------------------------------------------------------------------------ trained models
def test_exported_forest_predicts_exactly_like_scikit_learn(tmp_path):
    from sklearn.ensemble import RandomForestClassifier

    rng = np.random.default_rng(8)
    X = rng.standard_normal((400, 6))
    y = np.where(X[:, 0] + 0.5 * X[:, 1] ** 2 > 0.3, "spike", np.where(X[:, 2] > 0, "blip", "step"))
    forest = RandomForestClassifier(n_estimators=25, random_state=0).fit(X[:300], y[:300])
    model = ForestModel.from_sklearn(forest, forest.classes_, [f"x{i}" for i in range(6)], False,
                                     [f"x{i}" for i in range(6)], {}, {"note": "test"})
    path = model.save(tmp_path / "model")
    assert path.name == "model.npz"
    loaded = ForestModel.load(path)
    test = rng.standard_normal((500, 6)) * 2
    np.testing.assert_array_equal(loaded.predict_proba(test), forest.predict_proba(test))
    np.testing.assert_array_equal(loaded.predict(test), forest.predict(test))
    assert loaded.meta == {"note": "test"} and loaded.classes == ["blip", "spike", "step"]
    with np.load(path, allow_pickle=False) as data:  # plain arrays only
        assert all(data[k].dtype != object for k in data.files)


def test_model_loader_refuses_pickles_and_foreign_files(tmp_path):
    np.savez(tmp_path / "evil.npz", header=np.array([{"format": "x"}], dtype=object))
    with pytest.raises(ImpactlineError, match="not a model"):
        ForestModel.load(tmp_path / "evil.npz")
    np.savez(tmp_path / "other.npz", header=np.array(json.dumps({"format": "other", "format_version": 1})))
    with pytest.raises(ImpactlineError, match="format"):
        ForestModel.load(tmp_path / "other.npz")


def test_labels_match_by_path_or_unique_name(tmp_path):
    events = pa.table({"file": ["/data/x/a.bin", "/data/x/a.bin", "/data/y/b.bin"], "event_id": [0, 1, 0]})
    labels = pa.table({"file": ["/data/x/a.bin", "b.bin", "c.bin"], "event_id": [1, 0, 0], "label": ["u", "v", "w"]})
    rows, names, unmatched = match_labels(events, labels)
    assert rows.tolist() == [1, 2] and names.tolist() == ["u", "v"] and unmatched == 1
    (tmp_path / "bad.csv").write_text("file,id,label\na,1,x\n")
    with pytest.raises(ImpactlineError, match="event_id"):
        read_label_file(tmp_path / "bad.csv")


# ------------------------------------------------------------------------------------------------ commands
def _write_run(folder, events: pa.Table):
    columns = {"file": CONTRACT_COLUMNS["file"], "event_id": CONTRACT_COLUMNS["event_id"],
               "duration_s": CONTRACT_COLUMNS["duration_s"], "peak_A": CONTRACT_COLUMNS["peak_A"],
               "shape": Column("list<float32>", "", "shape", length=32)}
    schema = schema_for(columns)
    (folder / "events.parquet").mkdir(parents=True)
    for name in np.unique(events.column("file").to_pylist()):
        part = events.filter(pa.compute.equal(events.column("file"), name)).cast(schema)
        pq.write_table(part, folder / "events.parquet" / f"{name}.parquet")


def _cli(argv):
    parser = argparse.ArgumentParser()
    register_cli(parser.add_subparsers())
    args = parser.parse_args(argv)
    return args.func(args)


def test_cluster_train_classify_round_trip(tmp_path, capsys):
    events, classes = _shape_events(n_per_class=25)
    run_a, run_b = tmp_path / "runA", tmp_path / "runB"
    _write_run(run_a, events)
    other, other_classes = _shape_events(n_per_class=10, seed=9, files=("c.bin",))
    _write_run(run_b, other)

    assert _cli(["cluster", str(run_a), str(run_b), "--method", "kmeans", "--k", "auto", "--seed", "3",
                 "--embedding", "pca"]) == 0
    report = capsys.readouterr().out
    assert "silhouette" in report and "<- chosen" in report
    joined = read_events_with(run_a)
    assert joined.column("file").to_pylist() == sorted(events.column("file").to_pylist())
    keys = zip(events.column("file").to_pylist(), events.column("event_id").to_pylist(), strict=True)
    truth = dict(zip(keys, classes, strict=True))
    y = [truth[k] for k in zip(joined.column("file").to_pylist(), joined.column("event_id").to_pylist(),
                               strict=True)]
    assert adjusted_rand_score(y, joined.column("cluster").to_pylist()) > 0.95
    first = pq.read_table(run_b / "clusters.parquet")
    sizes = pq.read_table(run_a / "cluster_sizes.parquet")
    assert sum(sizes.column("n_events").to_pylist()) == events.num_rows
    prototypes = pq.read_table(run_a / "cluster_prototypes.parquet")
    assert prototypes.num_rows == 4 and prototypes.schema.field("shape_median").type.list_size == 32
    assert pq.read_table(run_a / "cluster_selection.parquet").num_rows == 9
    # Same seed again: the same clusters.
    assert _cli(["cluster", str(run_a), str(run_b), "--method", "kmeans", "--seed", "3", "--embedding", "pca"]) == 0
    assert pq.read_table(run_b / "clusters.parquet").equals(first)
    with pytest.raises(ImpactlineError, match="does not apply"):
        _cli(["cluster", str(run_a), "--method", "density", "--k", "3"])

    names = np.array(["spike", "blip", "step", "bump"])
    (tmp_path / "labels.csv").write_text("file,event_id,label\n" + "".join(
        f"{f},{i},{names[c]}\n" for f, i, c in zip(events.column("file").to_pylist(),
                                                    events.column("event_id").to_pylist(), classes, strict=True)))
    model = tmp_path / "model.npz"
    assert _cli(["train", str(run_a), "--labels", str(tmp_path / "labels.csv"), "--out", str(model),
                 "--trees", "20", "--folds", "3"]) == 0
    report = capsys.readouterr().out
    assert "cross-validated accuracy (3 folds): 1.0000" in report and "true \\ predicted" in report
    assert _cli(["classify", str(run_b), "--model", str(model)]) == 0
    labelled = read_events_with(run_b)
    truth_b = names[other_classes][np.argsort(other.column("event_id").to_numpy())]
    assert labelled.column("label").to_pylist() == truth_b.tolist()
    assert "cluster" in labelled.column_names  # both sidecars joined

    # The same model as a classifier stage in a pipeline run.
    x, fs = synthetic_signal(n=60_000)
    np.savez(tmp_path / "rec.npz", current=x, sample_rate_hz=fs)
    pipeline = parse_pipeline(f"""
[detector]
use = "threshold"
[[measure]]
use = "waveform-32"
[classifier]
use = "forest"
model = "{model}"
""")
    result = run(pipeline, [tmp_path / "rec.npz"], tmp_path / "run-forest")
    labels = pq.read_table(tmp_path / "run-forest" / "labels.parquet")
    assert labels.num_rows == result.events.num_rows > 0
    assert set(labels.column("label").to_pylist()) <= set(names) | {None}
    # A model meets events without the inputs it was trained on: a clear refusal.
    with pytest.raises(ImpactlineError, match="peak_A"):
        ForestModel.load(model).inputs(result.events.drop_columns(["peak_A"]).append_column(
            "rise_time_s", pa.array(np.ones(result.events.num_rows))))


def test_cluster_command_combines_components_and_records_the_entropy(tmp_path, capsys):
    events, classes = _shape_events(n_per_class=25, seed=4)
    _write_run(tmp_path / "run", events)
    argv = ["cluster", str(tmp_path / "run"), "--method", "gmm", "--combine", "entropy", "--embedding", "pca",
            "--max-k", "5", "--seed", "2"]
    assert _cli(argv) == 0
    report = capsys.readouterr().out
    assert "components combined by entropy (Baudry et al. 2010)" in report and "merged events" in report
    selection = pq.read_table(tmp_path / "run" / "cluster_selection.parquet").to_pylist()
    entropy = [r for r in selection if r["criterion"] == "entropy"]
    k_bic = next(r["k"] for r in selection if r["criterion"] == "bic" and r["chosen"])
    assert [r["k"] for r in entropy] == list(range(k_bic, 0, -1))
    assert sum(r["chosen"] for r in entropy) == 1 and len({r["decision"] for r in entropy}) == 1
    assert all(a["score"] >= b["score"] - 1e-9 for a, b in zip(entropy, entropy[1:], strict=False))
    clusters = pq.read_table(tmp_path / "run" / "clusters.parquet")
    chosen = next(r["k"] for r in entropy if r["chosen"])
    minor = next(r for r in selection if r["criterion"] == "min_share")
    assert clusters.column("cluster_count")[0].as_py() == minor["k"] <= chosen
    assert f"; {minor['k']} clusters counted" in report
    assert "cluster_component" in clusters.column_names
    assert _cli(argv) == 0  # same seed, same clusters
    assert pq.read_table(tmp_path / "run" / "clusters.parquet").select(["cluster", "cluster_probability"]).equals(
        clusters.select(["cluster", "cluster_probability"]))
    with pytest.raises(ImpactlineError, match="add --combine entropy"):
        _cli(["cluster", str(tmp_path / "run"), "--method", "gmm", "--combine", "none", "--clusters", "3"])
    with pytest.raises(ImpactlineError, match="add --combine entropy"):
        _cli(["cluster", str(tmp_path / "run"), "--method", "gmm", "--combine", "none", "--count-rule", "silhouette"])
    assert "silhouette" not in report
    assert _cli(argv + ["--count-rule", "silhouette"]) == 0
    report = capsys.readouterr().out
    assert "largest mean silhouette (Rousseeuw 1987)" in report and "silhouette  merge" in report
    entropy = [r for r in pq.read_table(tmp_path / "run" / "cluster_selection.parquet").to_pylist()
               if r["criterion"] == "entropy"]
    scored = [r for r in entropy if r["k"] >= 2]
    assert all(r["decision"] == "silhouette" for r in entropy) and all(r["silhouette"] is not None for r in scored)
    assert next(r for r in entropy if r["chosen"])["silhouette"] == max(r["silhouette"] for r in scored)
    with pytest.raises(ImpactlineError, match="does not apply"):
        _cli(["cluster", str(tmp_path / "run"), "--method", "kmeans", "--combine", "entropy"])
    with pytest.raises(ImpactlineError, match="--min-share does not apply"):
        _cli(["cluster", str(tmp_path / "run"), "--method", "kmeans", "--min-share", "0.1"])
    # A share so large that only the largest cluster counts: everything else unassigned, or moved into it.
    assert _cli(argv + ["--min-share", "0.5"]) == 0
    assert "; 1 clusters counted" in capsys.readouterr().out
    clusters = pq.read_table(tmp_path / "run" / "clusters.parquet")
    assert set(clusters.column("cluster").to_pylist()) == {-1, 0}
    assert _cli(argv + ["--min-share", "0.5", "--minor", "reassign"]) == 0
    assert "moved to their most probable other cluster" in capsys.readouterr().out
    assert set(pq.read_table(tmp_path / "run" / "clusters.parquet").column("cluster").to_pylist()) == {0}


def test_cluster_command_reports_the_features_left_out(tmp_path, capsys):
    table, kind = _atom_events(n_per_class=60)
    (tmp_path / "run" / "events.parquet").mkdir(parents=True)
    pq.write_table(table, tmp_path / "run" / "events.parquet" / "f.parquet")
    assert _cli(["cluster", str(tmp_path / "run"), "--method", "gmm", "--embedding", "features", "--max-k", "5"]) == 0
    report = capsys.readouterr().out
    assert "features duration_s, peak_A (left out: decay_time_s missing on" in report
    assert "subpeak_count integer-valued" in report
    clusters = pq.read_table(tmp_path / "run" / "clusters.parquet")
    assert adjusted_rand_score(kind, clusters.column("cluster").to_pylist()) > 0.95


def test_commands_explain_bad_input(tmp_path):
    with pytest.raises(ImpactlineError, match="not a folder"):
        _cli(["cluster", str(tmp_path / "missing")])
    (tmp_path / "empty").mkdir()
    with pytest.raises(ImpactlineError, match="no events parts"):
        load_run_events([tmp_path / "empty"])
    events, _ = _shape_events(n_per_class=5)
    _write_run(tmp_path / "run", events)
    (tmp_path / "labels.csv").write_text("file,event_id,label\nzzz.bin,0,spike\n")
    with pytest.raises(ImpactlineError, match="matches an event"):
        _cli(["train", str(tmp_path / "run"), "--labels", str(tmp_path / "labels.csv"), "--out", str(tmp_path / "m")])
    with pytest.raises(ImpactlineError, match="not a model"):
        _cli(["classify", str(tmp_path / "run"), "--model", str(tmp_path / "labels.csv")])
    shapes, valid = shape_matrix(events)
    assert shapes.shape == (20, 32) and valid.all()
    assert embed(events, "pca", components=3, transform="none").X.shape == (20, 3)
