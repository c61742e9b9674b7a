"""Bundled feature extractors: reference values from published constants and general-purpose libraries."""

from __future__ import annotations

import math

import impactline
import numpy as np
import pytest
from impactline import Event, EventWindow, FilterInfo
from impactline.registry import PluginRegistry, check_stage_class
from impactline_plugins.measures import STAGES, BandwidthLimit, BaselineContext, PulseShape
from impactline_plugins.measures.pulse import (
    GAUSSIAN_RISE_TIME_FC,
    decay_time_constant_s,
    effective_bandwidth,
    extrapolated_duration_s,
    fwhm_s,
    gaussian_peak_fraction,
    make_pulse,
    peak_time_s,
    rectangle_width_s,
    rise_time_s,
)
from impactline_plugins.measures.shape import SUBPEAK_SLOTS
from scipy import signal
from scipy.ndimage import gaussian_filter1d
from scipy.special import erf, erfinv

# Columns the core runner writes itself (DESIGN.md run-folder contract); extractors must not redeclare them.
CONTRACT_COLUMNS = {
    "file", "event_id", "start_s", "end_s", "duration_s", "start_index", "end_index", "baseline_A", "peak_A",
    "charge_C", "noise_rms_A", "snr", "detector",
}


MINE = (BaselineContext, PulseShape, BandwidthLimit)


def window(x, start, end, fs, *, baseline=0.0, noise=0.0, polarity=1, info=None, first=0):
    """An EventWindow over ``x`` with the event at ``[start, end)``."""
    event = Event(first + start, first + end, baseline, noise, polarity)
    return EventWindow(np.asarray(x, dtype=np.float64), first, start, end, fs, event, info or FilterInfo())


def bessel_pulse(order, fc, fs, n=20000, on=2000, off=12000):
    """A unit rectangular pulse through a digital Bessel low-pass (scipy.signal, magnitude-normalised)."""
    x = np.zeros(n)
    x[on:off] = 1.0
    sos = signal.bessel(order, fc, fs=fs, norm="mag", output="sos")
    return signal.sosfilt(sos, x)


# ------------------------------------------------------------------------------------------ registration
def test_stages_fit_the_contract_and_register():
    class Plugin:
        @impactline.hookimpl
        def impactline_stages(self):
            return list(MINE)

    registry = PluginRegistry(autoload=False)
    registry.register(Plugin(), "measures-under-test")
    for cls in MINE:
        assert cls in STAGES
        assert check_stage_class(cls) == []
        assert registry.get("measure", cls.name).cls is cls
    declared = [name for cls in MINE for name in cls.columns]
    assert len(declared) == len(set(declared)), "two extractors declare the same column"
    assert not CONTRACT_COLUMNS & set(declared)
    assert PulseShape.columns["subpeak_times_s"].length == SUBPEAK_SLOTS


def test_conformance_kit():
    from impactline.testing import check_stage

    for stage in (BaselineContext(), PulseShape(), BandwidthLimit(), PulseShape(levels_of="plateau")):
        check_stage(stage)


def test_parameters_take_units():
    assert BaselineContext(context="2 ms", guard="20 us").context_samples(100e3) == (202, 202)
    assert PulseShape(subpeak_min_distance="20 us").subpeak_min_distance == pytest.approx(20e-6)
    with pytest.raises(impactline.ParameterError, match="levels_of"):
        PulseShape(levels_of="top")


# ------------------------------------------------------------------------------------------ rise time
def test_rise_time_of_exponential_approach():
    # First-order step response 1 - exp(-t/tau): 10-90 % in tau*ln(9) (common practice; exact algebra).
    fs, tau = 1e6, 50e-6
    t = np.arange(3000) / fs
    x = np.where(t >= 200e-6, -np.expm1(-(t - 200e-6) / tau), 0.0)
    p = make_pulse(window(x, 200, 3000, fs), 200, 0)
    assert rise_time_s(p) == pytest.approx(tau * math.log(9.0), rel=1e-3)


@pytest.mark.parametrize(("order", "rise_fc"), [(2, 0.3421), (4, 0.3501), (6, 0.3494), (8, 0.3466)])
def test_rise_time_of_bessel_step(order, rise_fc):
    # REFERENCES.md: 10-90 % step rise time x fc of Bessel filters (computed from the analog prototypes,
    # scipy.signal.bessel norm='mag'). Referenced to the plateau, as those constants are.
    fc, fs = 1e3, 200e3
    x = bessel_pulse(order, fc, fs)
    p = make_pulse(window(x, 2000, 12000, fs), 5000, 5000, reference="plateau")
    assert rise_time_s(p) * fc == pytest.approx(rise_fc, rel=2e-3)
    # A linear filter delays both edges alike, so the 50 % width of a long pulse is its true width.
    assert fwhm_s(p) == pytest.approx(10000 / fs, rel=1e-6)


def test_peak_referenced_rise_time_counts_the_overshoot():
    # Reference: the analog 4-pole Bessel step response (scipy.signal.step), timed between 10 % and 90 % of
    # its own maximum (1.0084: the 0.84 % overshoot of REFERENCES.md).
    fc, fs = 1e3, 200e3
    b, a = signal.bessel(4, 2 * math.pi * fc, analog=True, norm="mag")
    t, y = signal.step((b, a), T=np.linspace(0, 5 / fc, 20001))
    assert y.max() == pytest.approx(1.0084, abs=1e-4)
    rising = slice(0, int(np.argmax(y)) + 1)
    t10, t90 = np.interp([0.1 * y.max(), 0.9 * y.max()], y[rising], t[rising])
    p = make_pulse(window(bessel_pulse(4, fc, fs), 2000, 12000, fs), 5000, 5000)
    assert rise_time_s(p) == pytest.approx(t90 - t10, rel=2e-3)
    assert rise_time_s(p) * fc > 0.3501 * 1.01


# ------------------------------------------------------------------------------------------ width, peak
def test_fwhm_and_peak_time_of_gaussian():
    # FWHM of a Gaussian = 2 sqrt(2 ln 2) sigma (common practice; exact algebra).
    fs, sigma, centre = 1e5, 37.3, 1000.3
    t = np.arange(2000.0)
    x = 3e-12 * np.exp(-0.5 * ((t - centre) / sigma) ** 2)
    w = window(x, 900, 1100, fs)
    out = PulseShape().measure(w)
    assert out["fwhm_s"] == pytest.approx(2 * math.sqrt(2 * math.log(2)) * sigma / fs, rel=1e-3)
    assert out["peak_time_s"] * fs == pytest.approx(centre - 900, abs=0.02)
    assert out["subpeak_count"] == 1
    assert out["subpeak_times_s"][0] * fs == 100.0
    assert all(math.isnan(v) for v in out["subpeak_times_s"][1:])


def test_triangle_shape_and_charge_on_drifting_baseline():
    # A sampled triangle (rise 20 samples, fall 30) on a linear baseline drift. With vertices on samples:
    # 10-90 % rise = 0.8 x 20 samples, FWHM = 25 samples, base = 50 samples, and the sum of the samples
    # equals the area 25 A (trapezoid rule is exact for piecewise-linear curves).
    fs, amp = 100e3, 80e-12
    k = np.arange(600.0)
    tri = amp * np.clip(np.minimum((k - 200) / 20, (250 - k) / 30), 0, None)
    drift = 1e-9 + 2e-14 * k
    x = drift + tri
    w = window(x, 200, 251, fs, baseline=float(drift[200]))
    # Shape features use the detector's (flat) baseline: measure them on the flat version.
    shape = PulseShape().measure(window(1e-9 + tri, 200, 251, fs, baseline=1e-9))
    assert shape["rise_time_s"] * fs == pytest.approx(16.0, rel=1e-9)
    assert shape["fwhm_s"] * fs == pytest.approx(25.0, rel=1e-9)
    assert shape["duration_extrapolated_s"] * fs == pytest.approx(50.0, rel=1e-9)
    context = BaselineContext().measure(w)
    assert context["charge_linear_baseline_C"] == pytest.approx(25 * amp / fs, rel=1e-9)
    # Each side's median sits on the drift line at the side's centre: [95, 195) and [256, 356).
    assert context["baseline_before_A"] == pytest.approx(1e-9 + 2e-14 * 144.5, rel=1e-12)
    assert context["baseline_after_A"] == pytest.approx(1e-9 + 2e-14 * 305.5, rel=1e-12)
    assert context["baseline_step_A"] == pytest.approx(2e-14 * 161, rel=1e-9)
    assert context["mean_current_A"] == pytest.approx(float(x[200:251].mean()), rel=1e-12)
    assert context["local_noise_rms_A"] < 1e-22  # the drift is removed to rounding error


def test_rectangle_charge_and_local_noise():
    fs, amp, sigma = 100e3, 50e-12, 2e-12
    rng = np.random.default_rng(7)
    k = np.arange(600.0)
    rect = np.where((k >= 200) & (k < 250), amp, 0.0)
    noise = rng.normal(0.0, sigma, k.size)
    drift = 2e-9 - 1e-14 * k
    w = window(drift + rect + noise, 200, 250, fs, baseline=2e-9)
    out = BaselineContext().measure(w)
    # Exact for the noiseless part; the noise adds its own sum over the 50 event samples.
    line_free = 50 * amp / fs + noise[200:250].sum() / fs
    # The line through two medians of 100 noisy samples is off by ~sigma/sqrt(100) at each side.
    assert out["charge_linear_baseline_C"] == pytest.approx(line_free, abs=50 * 4 * sigma / 10 / fs)
    assert out["local_noise_rms_A"] == pytest.approx(sigma, rel=0.15)
    assert BaselineContext(noise_estimator="mad").measure(w)["local_noise_rms_A"] == pytest.approx(sigma, rel=0.2)
    assert out["snr_local"] == pytest.approx((amp + 2.5 * sigma) / sigma, rel=0.25)


def test_guard_band_follows_the_filter_rise_time():
    # Through a slow 4-pole Bessel (rise time 0.3501/fc = 350 us; REFERENCES.md, Bessel 10-90 % rise x fc,
    # computed from the analog prototype) the falling flank reaches ~40 samples past
    # where a threshold would end the event; two rise times of guard keep it out of the context. The
    # median shrugs the flank off, the rms of the context does not.
    fc, fs = 1e3, 100e3
    amp = 1e-10
    x = amp * bessel_pulse(4, fc, fs, n=3000, on=1000, off=1500)
    info = FilterInfo(cutoff_hz=fc, rise_time_s=0.3501 / fc, delay_s=0.0)
    blind = BaselineContext(guard=0.0).measure(window(x, 1030, 1530, fs, info=FilterInfo()))
    guarded = BaselineContext(guard=0.0).measure(window(x, 1030, 1530, fs, info=info))
    assert blind["local_noise_rms_A"] > 0.05 * amp
    assert guarded["local_noise_rms_A"] < 1e-3 * amp
    assert abs(guarded["baseline_after_A"]) < 2e-3 * amp
    # A guard longer than the context leaves no baseline: NaN, not a biased value.
    short = BaselineContext(guard=0.0, context="0.5 ms").measure(window(x, 1030, 1530, fs, info=info))
    assert math.isnan(short["baseline_after_A"]) and math.isnan(short["charge_linear_baseline_C"])


# ------------------------------------------------------------------------------------------ decay, sub-peaks
def test_decay_constant_of_exponential():
    fs, tau, amp = 100e3, 200e-6, 100e-12
    t = np.arange(600) / fs
    clean = np.where(t >= 1e-3, amp * np.exp(-(t - 1e-3) / tau), 0.0)
    assert PulseShape().measure(window(clean, 100, 160, fs))["decay_time_s"] == pytest.approx(tau, rel=1e-6)
    rng = np.random.default_rng(3)
    sigma = 5e-12
    shape = PulseShape()
    fits = [shape.measure(window(clean + rng.normal(0, sigma, t.size), 100, 160, fs, noise=sigma))["decay_time_s"]
            for _ in range(100)]
    fits = np.asarray(fits)
    assert np.isfinite(fits).all()
    # Peak/noise = 20: the mean of 100 fits within 3 % (standard error ~0.4 %), each within 20 %.
    assert fits.mean() == pytest.approx(tau, rel=0.03)
    assert np.abs(fits / tau - 1).max() < 0.2
    loglinear = PulseShape(decay_fit="log-linear").measure(window(clean, 100, 160, fs))["decay_time_s"]
    assert loglinear == pytest.approx(tau, rel=1e-9)


def test_no_subpeaks_from_noise_on_a_long_tail():
    # A 1 nA spike decaying over 3 ms at 250 kHz, with band-limited noise of 3 pA rms: along the tail the
    # best noise wiggles pass 4 noise rms of prominence; 2 % of the peak does not let them through.
    fs = 250e3
    k = np.arange(3500.0)
    clean = 1e-9 * np.exp(-np.clip(k - 100, 0, None) / 750.0) * (k >= 100)
    info = FilterInfo(cutoff_hz=25e3, rise_time_s=0.3501 / 25e3)  # REFERENCES.md: 4-pole Bessel rise x fc
    loose, default = [], []
    for seed in range(10):
        noise = gaussian_filter1d(np.random.default_rng(seed).normal(0, 1, k.size), 3.0)
        w = window(clean + noise * 3e-12 / noise.std(), 100, 3200, fs, noise=3e-12, info=info)
        loose.append(PulseShape(subpeak_fraction=0.0).measure(w)["subpeak_count"])
        default.append(PulseShape().measure(w)["subpeak_count"])
    assert default == [1] * 10
    assert sum(loose) > 10


def test_subpeaks_of_a_burst():
    fs, sigma_noise = 100e3, 3e-12
    k = np.arange(400.0)
    centres, heights = (150.0, 180.0, 230.0), (100e-12, 70e-12, 90e-12)
    burst = sum(h * np.exp(-0.5 * ((k - c) / 3.0) ** 2) for c, h in zip(centres, heights, strict=True))
    info = FilterInfo(cutoff_hz=None, rise_time_s=5 / fs)
    shape = PulseShape()
    rng = np.random.default_rng(11)
    for _ in range(50):
        out = shape.measure(window(burst + rng.normal(0, sigma_noise, k.size), 135, 245, fs,
                                   noise=sigma_noise, info=info))
        assert out["subpeak_count"] == 3
        found = np.asarray(out["subpeak_times_s"][:3]) * fs + 135
        assert np.abs(found - centres).max() <= 1.0
        assert len(out["subpeak_times_s"]) == SUBPEAK_SLOTS
    # Noise in the 50-sample gap between the last two spikes has maxima of prominence above 4 noise rms;
    # only the height criterion keeps them out.
    loose = PulseShape(subpeak_height=0.5).measure(window(burst + np.random.default_rng(13).normal(
        0, sigma_noise, k.size), 135, 245, fs, noise=sigma_noise, info=info))
    assert loose["subpeak_count"] > 3
    # Ten spikes: all counted, the first eight listed.
    ten = sum(50e-12 * np.exp(-0.5 * ((k - c) / 2.0) ** 2) for c in range(100, 300, 20))
    out = shape.measure(window(ten, 90, 300, fs, noise=1e-12))
    assert out["subpeak_count"] == 10
    assert np.allclose(np.asarray(out["subpeak_times_s"]) * fs, np.arange(10, 170, 20))


# ------------------------------------------------------------------------------------------ bandwidth
def test_gaussian_rise_time_constant():
    # Gaussian step response 0.5 (1 + erf(t / (sqrt 2 sigma))): 10-90 % in 2 sqrt(2) erfinv(0.8) sigma, with
    # sigma = sqrt(ln 2) / (2 pi fc); REFERENCES.md lists 0.3396 (computed).
    exact = 2 * math.sqrt(2) * erfinv(0.8) * math.sqrt(math.log(2)) / (2 * math.pi)
    assert GAUSSIAN_RISE_TIME_FC == pytest.approx(exact, abs=5e-5)


@pytest.mark.parametrize(("rise_times", "fraction"), [(1.0, 0.800), (1.5, 0.945), (2.0, 0.990)])
def test_gaussian_peak_fraction_reference_values(rise_times, fraction):
    # REFERENCES.md: a Gaussian filter keeps erf(w / (2 sqrt 2 sigma)) of a rectangular pulse of width w;
    # w = Tr -> 0.800, 1.5 Tr -> 0.945, 2 Tr -> 0.990 (Tr = 0.3396/fc).
    fc = 10e3
    assert gaussian_peak_fraction(rise_times * GAUSSIAN_RISE_TIME_FC / fc, fc) == pytest.approx(fraction, abs=5e-4)


@pytest.mark.parametrize("rise_times", [0.5, 1.0, 1.5, 4.0])
def test_bandwidth_limit_on_gaussian_filtered_rectangles(rise_times):
    # Reference filter: scipy.ndimage.gaussian_filter1d; a Gaussian of sigma_t has fc = sqrt(ln 2)/(2 pi sigma_t).
    fs, sigma_t = 1e6, 20e-6
    fc = math.sqrt(math.log(2)) / (2 * math.pi * sigma_t)
    tr = GAUSSIAN_RISE_TIME_FC / fc
    width = rise_times * tr
    edges = np.arange(4001) - 0.5
    on = 2000
    rect = np.clip(np.minimum(edges[1:], on + width * fs) - np.maximum(edges[:-1], on), 0, 1)  # exact area
    y = 40e-12 * gaussian_filter1d(rect, sigma_t * fs, truncate=8)
    kept = y.max() / 40e-12
    assert kept == pytest.approx(float(erf(width / (2 * math.sqrt(2) * sigma_t))), abs=1e-3)
    w = window(y, on - 30, on + int(width * fs) + 30, fs, info=FilterInfo(cutoff_hz=fc, rise_time_s=tr))
    out = BandwidthLimit().measure(w)
    assert out["expected_peak_fraction"] == pytest.approx(kept, rel=5e-3)
    assert out["equivalent_width_s"] == pytest.approx(width, rel=1e-2)
    assert out["short_event"] is (rise_times < 2)


@pytest.mark.parametrize(("rise_times", "tolerance"), [(0.5, 0.1), (1.0, 0.03), (1.5, 0.03), (2.0, 0.03)])
def test_bandwidth_limit_through_a_bessel_filter(rise_times, tolerance):
    # Reference: rectangles through a digital 4-pole Bessel (scipy.signal), whose 10-90 % rise time is
    # 0.3501/fc (REFERENCES.md). The Gaussian model is approximate for it: within 0.03 from one rise time
    # up, and the documented loss of precision below.
    fs, fc = 1e6, 10e3
    tr = 0.3501 / fc
    n = round(rise_times * tr * fs)
    x = np.zeros(6000)
    x[2000:2000 + n] = 1.0
    y = signal.sosfilt(signal.bessel(4, fc, fs=fs, norm="mag", output="sos"), x)
    out = BandwidthLimit().measure(window(y, 2000, 2000 + n + 40, fs,
                                          info=FilterInfo(cutoff_hz=fc, rise_time_s=tr)))
    assert out["expected_peak_fraction"] == pytest.approx(min(y.max(), 1.0), abs=tolerance)


def test_bandwidth_unknown_and_width_inversion():
    x = np.zeros(100)
    x[40:50] = 1e-12
    out = BandwidthLimit().measure(window(x, 40, 50, 1e5))
    assert out["short_event"] is None and math.isnan(out["expected_peak_fraction"])
    # Gaussian filter: 10-90 % rise x fc = 0.3396, sigma = sqrt(ln 2)/(2 pi fc) (REFERENCES.md, Gaussian filter;
    # Colquhoun & Sigworth 1995); the width inversion is exact algebra on erf.
    assert effective_bandwidth(FilterInfo(cutoff_hz=None, rise_time_s=0.3396e-4)) == pytest.approx((1e4, 0.3396e-4))
    fc = 5e3
    sigma = math.sqrt(math.log(2)) / (2 * math.pi * fc)
    for width in (1e-6, 3e-5, 2e-4, 5e-3):
        ratio = width / erf(width / (2 * math.sqrt(2) * sigma))
        assert rectangle_width_s(ratio, fc) == pytest.approx(width, rel=1e-8)
    assert math.isnan(rectangle_width_s(0.9 * math.sqrt(2 * math.pi) * sigma, fc))


# ------------------------------------------------------------------------------------------ robustness
def _all_columns_present(stage, out):
    assert set(out) == set(stage.columns)
    for name, column in stage.columns.items():
        value = out[name]
        if column.dtype.startswith("float"):
            assert isinstance(value, float)
        elif column.dtype.startswith("int"):
            assert isinstance(value, int)
        elif column.dtype == "bool":
            assert value is None or isinstance(value, bool)
        else:
            assert len(value) == column.length


def _edge_cases():
    fs = 1e5
    info = FilterInfo(cutoff_hz=20e3, rise_time_s=0.3501 / 20e3)
    spike = np.zeros(300)
    spike[150] = 10e-12
    cases = {"one sample": window(spike, 150, 151, fs, noise=1e-12, info=info)}
    two = spike.copy()
    two[151] = 6e-12
    cases["two samples"] = window(two, 150, 152, fs, noise=1e-12, info=info)
    three = two.copy()
    three[149] = 4e-12
    cases["three samples"] = window(three, 149, 152, fs, noise=1e-12, info=info)
    ramp = np.linspace(20e-12, 0, 300)
    cases["at recording start"] = window(ramp, 0, 40, fs, noise=1e-12, info=info)
    cases["at recording end"] = window(ramp[::-1].copy(), 260, 300, fs, noise=1e-12, info=info)
    cases["whole window"] = window(np.hanning(50) * 1e-11, 0, 50, fs, noise=1e-12, info=info)
    cases["flat"] = window(np.full(300, 1e-9), 100, 150, fs, baseline=1e-9, noise=1e-12, info=info)
    cases["wrong polarity"] = window(-spike, 150, 151, fs, noise=1e-12, info=info)
    cases["zero noise"] = window(spike, 150, 151, fs, info=info)
    with_nan = spike.copy()
    with_nan[140:150] = np.nan
    cases["nan context"] = window(with_nan, 150, 151, fs, noise=1e-12, info=info)
    cases["nan event"] = window(np.full(300, np.nan), 100, 150, fs, noise=1e-12, info=info)
    cases["empty event"] = window(spike, 150, 150, fs, noise=1e-12, info=info)
    cases["empty window"] = window(np.zeros(0), 0, 0, fs, noise=1e-12, info=info)
    return cases


@pytest.mark.parametrize("stage", [BaselineContext(), PulseShape(), BandwidthLimit(),
                                   PulseShape(levels_of="plateau", decay_fit="log-linear")],
                         ids=lambda s: s.name)
@pytest.mark.parametrize("case", list(_edge_cases()))
def test_edge_cases_never_raise(stage, case):
    with np.errstate(all="raise"):  # no silent floating-point trouble either
        out = stage.measure(_edge_cases()[case])
    _all_columns_present(stage, out)


def test_edge_case_values():
    cases = _edge_cases()
    shape = PulseShape()
    one = shape.measure(cases["one sample"])
    assert one["peak_time_s"] == 0.0 and one["subpeak_count"] == 1
    assert one["fwhm_s"] == pytest.approx(1e-5)  # crossings at +-0.5 sample on a lone sample
    start = shape.measure(cases["at recording start"])
    assert math.isnan(start["rise_time_s"]) and math.isfinite(start["decay_time_s"])
    # A context without noise gives no finite signal-to-noise ratio.
    assert math.isnan(BaselineContext().measure(cases["zero noise"])["snr_local"])
    flat = shape.measure(cases["flat"])
    assert flat["subpeak_count"] == 0 and math.isnan(flat["fwhm_s"])
    context = BaselineContext().measure(cases["at recording start"])
    assert math.isnan(context["baseline_before_A"]) and math.isfinite(context["baseline_after_A"])
    assert math.isfinite(context["charge_linear_baseline_C"]) and math.isnan(context["baseline_step_A"])


def test_cathodic_event_mirrors_anodic():
    fs, base = 100e3, 5e-10
    rng = np.random.default_rng(5)
    k = np.arange(600.0)
    pulse = 60e-12 * np.exp(-np.clip(k - 200, 0, None) / 15.0) * (k >= 200) + rng.normal(0, 3e-12, k.size)
    info = FilterInfo(cutoff_hz=10e3, rise_time_s=0.3501e-4)
    up = window(base + pulse, 200, 240, fs, baseline=base, noise=3e-12, info=info)
    down = window(base - pulse, 200, 240, fs, baseline=base, noise=3e-12, polarity=-1, info=info)
    for stage in (PulseShape(), BandwidthLimit()):
        a, b = stage.measure(up), stage.measure(down)
        for name in stage.columns:
            np.testing.assert_allclose(np.asarray(a[name], float), np.asarray(b[name], float), rtol=1e-12)
    a, b = BaselineContext().measure(up), BaselineContext().measure(down)
    assert b["charge_linear_baseline_C"] == pytest.approx(-a["charge_linear_baseline_C"], rel=1e-9)
    assert b["baseline_step_A"] == pytest.approx(-a["baseline_step_A"], rel=1e-6, abs=1e-24)
    assert b["snr_local"] == pytest.approx(a["snr_local"], rel=1e-9)
    assert b["local_noise_rms_A"] == pytest.approx(a["local_noise_rms_A"], rel=1e-9)


def test_results_do_not_depend_on_extra_context():
    # The runner hands every extractor the widest context any of them asked for; results must not change.
    fs = 100e3
    rng = np.random.default_rng(9)
    k = np.arange(2000.0)
    x = 1e-9 + 40e-12 * np.exp(-0.5 * ((k - 1000) / 4.0) ** 2) + rng.normal(0, 2e-12, k.size)
    info = FilterInfo(cutoff_hz=10e3, rise_time_s=0.3501e-4)
    for stage in (BaselineContext(), PulseShape(), BandwidthLimit()):
        pre, post = stage.context_samples(fs)
        tight = window(x[990 - pre:1010 + post], pre, pre + 20, fs, baseline=1e-9, noise=2e-12, info=info)
        wide = window(x, 990, 1010, fs, baseline=1e-9, noise=2e-12, info=info)
        a, b = stage.measure(tight), stage.measure(wide)
        for name in stage.columns:
            np.testing.assert_array_equal(np.asarray(a[name], float), np.asarray(b[name], float))


def test_extrapolated_duration_needs_both_edges():
    fs = 1e5
    k = np.arange(300.0)
    step = np.clip((k - 100) / 10, 0, 1) * 1e-11  # rises and never falls inside the window
    p = make_pulse(window(step, 100, 300, fs), 100, 0)
    assert math.isnan(extrapolated_duration_s(p))
    assert math.isnan(decay_time_constant_s(p, 1e-13))
    assert peak_time_s(p) >= 0
