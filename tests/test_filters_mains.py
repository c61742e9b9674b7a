"""Mains notch filter: hum removal at every harmonic, flat passband, streaming, Nyquist errors."""

import numpy as np
import pytest
from impactline import ParameterError
from impactline.bandwidth import explain_cascade, run_filters
from impactline_plugins.filters import Bessel, Mains

FS = 10e3  # Hz; low enough to keep the 50 Hz notches' long ring-down cheap in a unit test


def _amplitude(y, f, t):
    """Amplitude of the component at f (least-squares sine + cosine fit)."""
    basis = np.column_stack([np.sin(2 * np.pi * f * t), np.cos(2 * np.pi * f * t), np.ones_like(t)])
    coef, *_ = np.linalg.lstsq(basis, y, rcond=None)
    return float(np.hypot(coef[0], coef[1]))


def _hum(n, mains=50.0, harmonics=3, seed=0):
    """Synthetic hum: fundamental and harmonics of decreasing size with random phases, on noise."""
    rng = np.random.default_rng(seed)
    t = np.arange(n) / FS
    x = 1e-9 + 0.2e-12 * rng.standard_normal(n)
    amplitudes = [20e-12 / k for k in range(1, harmonics + 1)]
    for k, a in enumerate(amplitudes, start=1):
        x += a * np.sin(2 * np.pi * k * mains * t + rng.uniform(0, 2 * np.pi))
    return t, x, amplitudes


@pytest.mark.parametrize("mains", [50.0, 60.0])
@pytest.mark.parametrize("mode", ["causal", "zero-phase"])
def test_hum_attenuated_by_more_than_30_db_at_every_harmonic(mains, mode):
    n = 200_000  # 20 s
    t, x, amplitudes = _hum(n, mains, harmonics=5)
    stage = Mains(frequency=mains, harmonics=5, mode=mode)
    y = run_filters([stage], x, FS, chunk_samples=16_384)
    steady = slice(40_000, n - 40_000)  # well past the notches' ring-down (q / (pi f) = 64 ms at 50 Hz: envelope
    # time constant 1/(pi * bandwidth) of a second-order notch; common practice)
    for k, a in enumerate(amplitudes, start=1):
        before = _amplitude(x[steady], k * mains, t[steady])
        after = _amplitude(y[steady], k * mains, t[steady])
        assert before == pytest.approx(a, rel=0.01)
        assert 20 * np.log10(before / after) > 30.0, f"harmonic {k}"
    # Away from the lines the noise passes: its rms is unchanged within 2 %.
    assert np.std(y[steady] - 1e-9) == pytest.approx(0.2e-12, rel=0.05)


def test_mistuned_mains_still_attenuated_with_the_default_q():
    # Grid frequency wanders by a few tens of mHz (common practice); with q = 10 a line 0.05 Hz off
    # (0.15 Hz at the third harmonic) still loses more than 30 dB, where q = 30 would not.
    off = np.array([50.05, 100.1, 150.15])
    loss = -20 * np.log10(np.abs(Mains().frequency_response(off, FS)))
    assert np.all(loss > 30.0)
    assert np.all(-20 * np.log10(np.abs(Mains(q=30).frequency_response(off, FS))) < 30.0)
    n = 200_000
    t = np.arange(n) / FS
    y = run_filters([Mains()], 20e-12 * np.sin(2 * np.pi * 50.05 * t), FS, chunk_samples=16_384)
    assert 20 * np.log10(20e-12 / _amplitude(y[40_000:], 50.05, t[40_000:])) > 30.0


def test_passband_is_flat_away_from_the_lines():
    stage = Mains(frequency=50.0, harmonics=3, q=30)
    # Between the lines (at least 5 notch widths away) the gain is within 0.1 dB of 1; from ten times
    # the fundamental on, where events live, within 0.001 dB.
    between = np.array([0.0, 1.0, 75.0, 125.0, 200.0])
    above = np.array([500.0, 1e3, 4e3, 4.9e3])
    assert np.max(np.abs(20 * np.log10(np.abs(stage.frequency_response(between, FS))))) < 0.1
    assert np.max(np.abs(20 * np.log10(np.abs(stage.frequency_response(above, FS))))) < 0.001
    # End to end: test tones at 75 Hz and 1 kHz come out with their amplitude.
    n = 100_000
    t = np.arange(n) / FS
    for f in (75.0, 1e3):
        y = run_filters([stage], 5e-12 * np.sin(2 * np.pi * f * t), FS)
        assert _amplitude(y[30_000:], f, t[30_000:]) == pytest.approx(5e-12, rel=0.003)
    # ...while each line itself is removed completely (a zero on the unit circle).
    lines = np.abs(stage.frequency_response(np.array([50.0, 100.0, 150.0]), FS))
    assert np.all(lines < 1e-9)


def test_notch_width_follows_q():
    # The -3 dB width of each notch is (line frequency) / q (scipy.signal.iirnotch's definition).
    stage = Mains(frequency=50.0, harmonics=2, q=25)
    for line in (50.0, 100.0):
        f = np.linspace(line - line / 25, line + line / 25, 20_001)
        power = np.abs(stage.frequency_response(f, FS)) ** 2
        below = f[power < 0.5]
        assert below[-1] - below[0] == pytest.approx(line / 25, rel=0.01)


@pytest.mark.parametrize("mode", ["causal", "zero-phase"])
def test_chunked_equals_whole(mode):
    _, x, _ = _hum(120_000)
    stage = Mains(mode=mode)
    whole = run_filters([stage], x, FS)
    assert whole.shape == x.shape
    for chunk in (4096, 10_007, 50_000):
        chunked = run_filters([stage], x, FS, chunk_samples=chunk)
        if mode == "causal":
            np.testing.assert_array_equal(chunked, whole)
        else:
            assert np.max(np.abs(chunked - whole)) < 1e-9 * np.std(x)


def test_info_and_cascade_note():
    causal = Mains().info(FS)
    assert causal.cutoff_hz is None and causal.rise_time_s is None
    assert 0 < causal.delay_s < 0.1 / FS  # a fraction of a sample at the frequencies of events
    assert Mains(mode="zero-phase").info(FS).delay_s == 0.0
    report = explain_cascade([Mains(), Bessel(cutoff="1 kHz")], FS)
    assert report.info.cutoff_hz == pytest.approx(1e3, rel=1e-9)
    assert report.notes == ["mains: not a low-pass filter; left out of the bandwidth and rise time"]


def test_lines_beyond_nyquist_are_refused_with_the_limit():
    with pytest.raises(ParameterError) as excinfo:
        Mains(frequency=60.0, harmonics=10).start(1e3)
    message = str(excinfo.value)
    assert "harmonics" in message and "Nyquist limit 500 Hz" in message and "600 Hz" in message
    assert "harmonics = 8 or fewer" in message
    with pytest.raises(ValueError, match="'frequency'.*Nyquist limit 25 Hz"):
        Mains(frequency=50.0).start(50.0)
