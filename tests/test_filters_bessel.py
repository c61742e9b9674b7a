"""Bessel low-pass filter: streaming equivalence, -3 dB point, rise time, delay, overshoot, errors."""

import numpy as np
import pytest
from impactline import ParameterError
from impactline.bandwidth import rise_time_10_90, run_filters, step_response
from impactline.registry import default_registry
from impactline_plugins.filters import Bessel
from scipy import signal

FS = 250e3  # Hz, a common sampling rate of collision recordings


def _recording(n=120_000, seed=1):
    """1 nA baseline, 5 pA white noise, a slow drift and a few 60 pA pulses of 40-400 us (anodic)."""
    rng = np.random.default_rng(seed)
    t = np.arange(n) / FS
    x = 1e-9 + 2e-12 * np.sin(2 * np.pi * 3.0 * t) + 5e-12 * rng.standard_normal(n)
    for start, width in [(5_000, 10), (31_000, 100), (70_001, 37), (119_950, 40)]:
        x[start:start + width] += 60e-12
    return x


@pytest.mark.parametrize("mode", ["causal", "zero-phase"])
@pytest.mark.parametrize("order", [2, 8])
def test_chunked_equals_whole(mode, order):
    x = _recording()
    stage = Bessel(order=order, cutoff="10 kHz", mode=mode)
    whole = run_filters([stage], x, FS)
    assert whole.shape == x.shape
    scale = np.std(x)
    # 50 is smaller than the zero-phase margin: nothing is emitted for a while, then it catches up.
    for chunk in (50, 4096, 10_007, len(x) - 1):
        chunked = run_filters([stage], x, FS, chunk_samples=chunk)
        assert chunked.shape == x.shape
        if mode == "causal":
            # sosfilt with the carried state performs the very same operations.
            np.testing.assert_array_equal(chunked, whole)
        else:
            # Stated tolerance: 1e-9 of the signal scale (the margin leaves about 1e-12).
            assert np.max(np.abs(chunked - whole)) < 1e-9 * scale


def test_zero_phase_whole_is_forward_backward_with_steady_state_ends():
    # Independent reference: the definition written out with scipy.signal directly.
    x = _recording(30_000)
    stage = Bessel(order=4, cutoff="20 kHz")
    sos = stage.design(FS).sos
    zi = signal.sosfilt_zi(sos)
    forward, _ = signal.sosfilt(sos, x, zi=zi * x[0])
    backward, _ = signal.sosfilt(sos, forward[::-1], zi=zi * forward[-1])
    expected = backward[::-1]
    np.testing.assert_allclose(run_filters([stage], x, FS), expected, rtol=0, atol=1e-15 * np.max(np.abs(x)))


def test_zero_phase_interior_matches_scipy_sosfiltfilt():
    # scipy.signal.sosfiltfilt (general-purpose reference) pads the ends differently (odd extension);
    # away from the ends both are the same forward-backward filter.
    x = _recording(60_000)
    stage = Bessel(order=6, cutoff="15 kHz")
    design = stage.design(FS)
    ours = run_filters([stage], x, FS)
    reference = signal.sosfiltfilt(design.sos, x)
    edge = 4 * design.margin
    mismatch = np.max(np.abs(ours[edge:-edge] - reference[edge:-edge]))
    assert mismatch < 1e-9 * np.std(x)
    # ...and they do differ at the ends, so the comparison above is not trivially true.
    assert np.max(np.abs(ours[:10] - reference[:10])) > 1e-6 * np.std(x)


@pytest.mark.parametrize("mode", ["causal", "zero-phase"])
@pytest.mark.parametrize("order", [1, 2, 4, 7, 10])
def test_minus_3db_point_is_the_cutoff(mode, order):
    cutoff = 12.5e3
    stage = Bessel(order=order, cutoff=cutoff, mode=mode)
    info = stage.info(FS)
    assert info.cutoff_hz == pytest.approx(cutoff, rel=1e-9)
    h = stage.frequency_response(np.array([0.0, cutoff]), FS)
    assert np.abs(h[0]) == pytest.approx(1.0, abs=1e-12)
    assert np.abs(h[1]) ** 2 == pytest.approx(0.5, rel=1e-9)
    # End to end: a sinusoid at the cutoff comes out with amplitude 1/sqrt(2) (least-squares fit of the
    # steady part, after the start-up of the causal filter).
    n = 50_000
    t = np.arange(n) / FS
    y = run_filters([stage], np.sin(2 * np.pi * cutoff * t), FS, chunk_samples=8192)
    part = slice(5_000, n - 5_000)
    basis = np.column_stack([np.sin(2 * np.pi * cutoff * t[part]), np.cos(2 * np.pi * cutoff * t[part])])
    coef, *_ = np.linalg.lstsq(basis, y[part], rcond=None)
    assert np.hypot(*coef) == pytest.approx(2**-0.5, rel=1e-6)


def test_zero_phase_pass_is_designed_above_the_cutoff():
    stage = Bessel(order=4, cutoff="10 kHz")
    pass_hz = stage.pass_cutoff_hz(FS)
    assert pass_hz > 10e3
    single = signal.sosfreqz(stage.design(FS).sos, worN=[10e3], fs=FS)[1][0]
    assert np.abs(single) ** 4 == pytest.approx(0.5, rel=1e-9)
    assert Bessel(order=4, cutoff="10 kHz", mode="causal").pass_cutoff_hz(FS) == 10e3


# 10-90 % rise time x fc, group delay at DC x fc, step overshoot (%), of the analog Bessel prototypes
# normalised to the -3 dB frequency. Source: /work/shared/REFERENCES.md, "Bessel and Gaussian low-pass
# filters" (computed from the analog prototypes, scipy.signal.bessel norm='mag').
ANALOG = {
    2: (0.3421, 0.2167, 0.43),
    4: (0.3501, 0.3364, 0.84),
    6: (0.3494, 0.4303, 0.64),
    8: (0.3466, 0.5061, 0.34),
}


@pytest.mark.parametrize("order", sorted(ANALOG))
def test_digital_filter_approaches_analog_prototype(order):
    rise_fc, delay_fc, overshoot_pct = ANALOG[order]
    fc = 1e3
    # At fs >> fc the bilinear-transformed filter approaches its analog prototype.
    stage = Bessel(order=order, cutoff=fc, mode="causal")
    info = stage.info(1000 * fc)
    assert info.rise_time_s * fc == pytest.approx(rise_fc, abs=2e-4)
    assert info.delay_s * fc == pytest.approx(delay_fc, abs=2e-4)
    _, y = step_response([stage], 1000 * fc, settle_hz=fc)
    assert (y.max() - 1.0) * 100 == pytest.approx(overshoot_pct, abs=0.006)
    # Second check of the rise time: the analog prototype's step response straight from scipy.signal.
    b, a = signal.bessel(order, 2 * np.pi * fc, norm="mag", analog=True)
    t = np.linspace(0, 5 / fc, 10_001)
    _, ya = signal.step((b, a), T=t)
    analog_rise = rise_time_10_90(np.append(ya, 1.0), 1 / (t[1] - t[0]))
    assert info.rise_time_s == pytest.approx(analog_rise, rel=5e-4)


def test_group_delay_shifts_a_slow_pulse_by_the_reported_delay():
    # A causal Bessel delays a pulse much slower than the cutoff by its group delay at DC; the
    # zero-phase filter does not move it.
    fc = 10e3
    n = 20_000
    t = np.arange(n) / FS
    centre = 0.04
    pulse = np.exp(-0.5 * ((t - centre) / 200e-6) ** 2)
    for mode in ("causal", "zero-phase"):
        stage = Bessel(order=4, cutoff=fc, mode=mode)
        y = run_filters([stage], pulse, FS, chunk_samples=3000)
        shift = np.sum(t * y) / np.sum(y) - np.sum(t * pulse) / np.sum(pulse)
        assert shift == pytest.approx(stage.info(FS).delay_s, abs=1e-9)
    assert Bessel(cutoff=fc, mode="zero-phase").info(FS).delay_s == 0.0


def test_zero_phase_step_is_point_symmetric():
    stage = Bessel(order=4, cutoff="10 kHz")
    t, y = step_response([stage], FS, settle_hz=10e3)
    # The step is between samples -1 and 0: y[k] + y[-1-k] = 1 around it, so no delay and no phase.
    k0 = int(np.flatnonzero(t == 0)[0])
    left = y[k0 - 200:k0][::-1]
    right = y[k0:k0 + 200]
    np.testing.assert_allclose(left + right, 1.0, atol=1e-9)
    assert np.min(y) < 0  # the pre-shoot that every zero-phase filter shows before an edge


def test_cutoff_above_nyquist_names_the_limit():
    with pytest.raises(ValueError) as excinfo:
        Bessel(cutoff="150 kHz", mode="causal").start(FS)
    message = str(excinfo.value)
    assert isinstance(excinfo.value, ParameterError)
    assert "cutoff" in message and "150 kHz" in message and "Nyquist limit 125 kHz" in message
    assert "250 kHz" in message


def test_zero_phase_cutoff_out_of_reach_states_the_highest_possible():
    # 124.99 kHz is below Nyquist, but each pass would have to be designed above Nyquist to reach it.
    with pytest.raises(ValueError) as excinfo:
        Bessel(cutoff="124.99 kHz").start(FS)
    message = str(excinfo.value)
    assert "Nyquist limit 125 kHz" in message and "124.99 kHz" in message
    assert "highest zero-phase cutoff" in message and "causal" in message
    highest = float(message.split("is about ")[1].split(" kHz")[0]) * 1e3
    assert 124.9e3 < highest < 124.99e3
    Bessel(cutoff=highest - 50.0).start(FS)  # just below the stated limit works
    Bessel(cutoff="124.99 kHz", mode="causal").start(FS)


def test_registered_and_parameters_parse_units():
    entry = default_registry().get("filter", "bessel")
    assert entry.cls is Bessel
    stage = entry.cls(cutoff="20 kHz", order=6, mode="causal")
    assert stage.cutoff == 20e3 and stage.order == 6
    with pytest.raises(ParameterError, match="order"):
        Bessel(order=11)
    with pytest.raises(ParameterError, match="did you mean 'causal'"):
        Bessel(mode="casual")
