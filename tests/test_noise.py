"""Noise analysis: streaming Welch, the noise-model fit, Bessel noise integrals, detection limits, CLI."""

import math

import numpy as np
import pyarrow.parquet as pq
import pytest
from impactline import InputError
from impactline.cli import main as cli_main
from impactline.noise import (
    analyze_noise,
    band_rms,
    capacitive_rms_brickwall,
    compare_capacitance,
    cumulative_rms,
    detection_limits,
    filtered_model_rms,
    filtered_spectrum_rms,
    find_mains_peaks,
    fit_noise_model,
    johnson_current_psd,
    model_psd,
    noise_bandwidth_factors,
    open_recording,
    optimal_cutoff,
    pulse_peak_fraction,
    rms_versus_bandwidth,
    segment_samples,
    shot_noise_psd,
    welch_spectrum,
)
from impactline.noise.events import reference_scale
from impactline.noise.filters import _normalised_integral, _power_response_normalised, _prototype, bessel_step_shape
from impactline.noise.model import parse_voltage_noise
from impactline.noise.spectrum import Spectrum, WelchAccumulator, bin_correlation, effective_averages
from impactline.noise.synth import NoiseSynthesizer
from impactline.physics import charge_from_diameter
from impactline.registry import default_registry
from scipy import integrate, signal

FS = 100e3  # Hz
T_REF = 298.0  # K, the temperature of the worked Johnson-noise example
B_1G = 4 * 1.380649e-23 * T_REF / 1e9  # 4kT/R for 1 GOhm, A^2/Hz
E_N = 5e-9  # V/sqrt(Hz)


def d_coeff(c_in, e_n=E_N):
    return (2 * math.pi * c_in * e_n) ** 2


def synth(coefs, n, seed, fs=FS, **kw):
    """Time-domain synthetic noise (see impactline.noise.synth) as one array."""
    gen = NoiseSynthesizer(coefs, fs, seed=seed, f_min_hz=kw.pop("f_min_hz", 1.0), **kw)
    return np.concatenate(list(gen.chunks(n, 1 << 16))), gen


# ------------------------------------------------------------------------------------------ streaming Welch
@pytest.mark.parametrize("settings", [
    dict(nperseg=1024, noverlap=512, window="hann", detrend="constant"),
    dict(nperseg=1000, noverlap=0, window="boxcar", detrend=False),
    dict(nperseg=777, noverlap=600, window="blackman", detrend="linear"),
])
@pytest.mark.parametrize("engine", ["fft", "scipy"])
def test_streaming_welch_equals_scipy_on_whole_array(settings, engine):
    rng = np.random.default_rng(0)
    x = 1e-9 + 3e-12 * rng.standard_normal(30_003) + 1e-12 * np.sin(np.arange(30_003) * 0.01)
    _, ref = signal.welch(x, fs=FS, **settings)  # scipy, general-purpose reference
    for chunk in (3000, 4096, 10_007, len(x)):
        acc = WelchAccumulator(FS, **settings, engine=engine)
        for start in range(0, len(x), chunk):
            acc.update(x[start:start + chunk])
        spec = acc.result()
        np.testing.assert_allclose(spec.psd, ref, rtol=1e-10, atol=0)
    step = settings["nperseg"] - settings["noverlap"]
    assert spec.n_segments == (len(x) - settings["noverlap"]) // step
    assert spec.mean_A == pytest.approx(np.mean(x[:spec.n_samples]), rel=1e-12)


def test_welch_refuses_recording_shorter_than_a_segment():
    with pytest.raises(ValueError, match="fewer than one segment of 4096"):
        welch_spectrum(np.zeros(1000), FS, nperseg=4096)
    with pytest.raises(InputError, match="fewer than one Welch segment"):
        analyze_noise(np.zeros(1000), FS, segment=4096)


def test_segment_given_in_samples_or_seconds():
    assert segment_samples(4096, FS) == 4096
    assert segment_samples("4096", FS) == 4096
    assert segment_samples("10 ms", FS) == 1000
    assert segment_samples(0.01, FS) == 1000
    default = segment_samples(None, 1e6, 60_000_000)
    assert default == 1 << 18  # power of two nearest 0.25 s at 1 MHz
    assert segment_samples(None, 1e6, 1_000_000) < 1_000_000 // 8 + 1


# ------------------------------------------------------------------------------------------ Parseval
def test_parseval_exact_for_boxcar_without_detrending():
    # Parseval's theorem: the one-sided PSD integrates to the mean square (exact for a boxcar, no detrend).
    rng = np.random.default_rng(1)
    x = 2e-12 * rng.standard_normal(40_000) + 5e-12
    for nperseg in (1000, 1001):  # even (Nyquist bin) and odd segment lengths
        spec = welch_spectrum(x, FS, nperseg=nperseg, noverlap=0, window="boxcar", detrend=False)
        assert band_rms(spec, masked=False) ** 2 == pytest.approx(np.mean(x[:spec.n_samples] ** 2), rel=1e-12)
        assert cumulative_rms(spec, masked=False)[-1] == pytest.approx(band_rms(spec, masked=False), rel=1e-12)


def test_parseval_for_hann_spectrum_and_model():
    # Parseval with the default Hann window: the spectrum integrates to the variance (statistically), and
    # the integral of the generator's exact PSD over 0..Nyquist is the variance it was built with.
    coefs = [0.0, B_1G, 0.0, d_coeff(10e-12)]
    x, gen = synth(coefs, 1 << 18, seed=2)
    spec = welch_spectrum(x, FS, nperseg=2048)
    assert band_rms(spec) ** 2 == pytest.approx(np.var(x), rel=0.02)
    f = np.linspace(0, FS / 2, 200_001)
    expected = integrate.trapezoid(gen.psd(f), f)
    assert band_rms(spec) ** 2 == pytest.approx(expected, rel=0.03)


# ------------------------------------------------------------------------------------------ physics of noise
def test_johnson_and_shot_noise_worked_examples():
    # Johnson (1928), Nyquist (1928): i_n = sqrt(4kTB/R); 1 GOhm, 10 kHz, 298 K -> 0.4057 pA rms
    # (REFERENCES.md, amplifier and cell noise).
    assert math.sqrt(johnson_current_psd(1e9, 298.0) * 10e3) == pytest.approx(0.4057e-12, rel=2e-4)
    # Schottky shot noise sqrt(2qIB): 1 nA over 10 kHz -> 1.790 pA (REFERENCES.md).
    assert math.sqrt(shot_noise_psd(1e-9) * 10e3) == pytest.approx(1.790e-12, rel=3e-4)


def test_capacitive_noise_b_cubed_law_and_crossover():
    # Levis & Rae (1993): i^2 = (4 pi^2/3) e_n^2 C^2 B^3; e_n 5 nV/rtHz, 10 pF, 100 kHz -> 5.736 pA;
    # with 1 GOhm Johnson noise (1.283 pA) -> 5.877 pA; the two PSD terms cross at 12.9 kHz (REFERENCES.md).
    assert capacitive_rms_brickwall(5e-9, 10e-12, 100e3) == pytest.approx(5.736e-12, rel=2e-4)
    coefs = np.array([0.0, B_1G, 0.0, d_coeff(10e-12)])
    # A noise-free spectrum equal to the model: the fit must return it, and the brick-wall integral the sum.
    freqs = np.linspace(0, 250e3, 2 ** 14 + 1)
    psd = np.concatenate(([0.0], model_psd(freqs[1:], coefs)))
    spec = Spectrum(freqs_hz=freqs, psd=psd, sample_rate_hz=500e3, nperseg=2 ** 15, noverlap=2 ** 14, window="hann",
                    detrend="constant", n_segments=100, n_samples=100 * 2 ** 14 + 2 ** 14, mean_A=0.0)
    fit = fit_noise_model(spec, f_hi_hz=200e3, temperature_k=T_REF)
    np.testing.assert_allclose(fit.coefficients, coefs, rtol=1e-6, atol=1e-45)
    corner, _ = fit.corner_frequencies()["white_capacitive"]
    assert corner == pytest.approx(12.9e3, rel=2e-3)
    row = rms_versus_bandwidth(spec, fit, order=4, f_low_hz=1e-9, bandwidths_hz=[100e3])[0]
    assert row.brickwall_model_A == pytest.approx(5.877e-12, rel=2e-4)
    assert row.brickwall_measured_A == pytest.approx(5.877e-12, rel=1e-3)  # rectangle rule over the bins
    assert fit.equivalent_resistance()[0] == pytest.approx(1e9, rel=1e-6)
    assert fit.input_capacitance(E_N)[0] == pytest.approx(10e-12, rel=1e-6)


def test_voltage_noise_text():
    assert parse_voltage_noise("5 nV") == pytest.approx(5e-9)
    assert parse_voltage_noise("5 nV/sqrt(Hz)") == pytest.approx(5e-9)
    assert parse_voltage_noise(3e-9) == 3e-9
    with pytest.raises(ValueError):
        parse_voltage_noise("5 pA")


# ------------------------------------------------------------------------------------------ Bessel filters
@pytest.mark.parametrize("order, rise, delay, overshoot", [
    (2, 0.3421, 0.2167, 0.0043), (4, 0.3501, 0.3364, 0.0084), (6, 0.3494, 0.4303, 0.0064), (8, 0.3466, 0.5061, 0.0034),
])
def test_bessel_prototype_figures(order, rise, delay, overshoot):
    # REFERENCES.md, Bessel filters: 10-90 % rise time x fc, group delay at DC x fc, step overshoot,
    # computed from the analog prototypes (scipy.signal.bessel, norm='mag').
    shape = bessel_step_shape(order)
    assert shape.rise_time == pytest.approx(rise, abs=1e-4)
    assert shape.delay == pytest.approx(delay, abs=1e-4)
    assert shape.overshoot == pytest.approx(overshoot, abs=1e-4)


def test_bessel_noise_bandwidth_factors():
    # REFERENCES.md: a 4-pole Bessel passes white noise like a brick wall at 1.046 fc (8-pole 1.044 fc),
    # f^2 noise at 2.14x (8-pole 2.04x) the brick-wall value fc^3/3.
    white4, f2_4 = noise_bandwidth_factors(4)
    white8, f2_8 = noise_bandwidth_factors(8)
    assert white4 == pytest.approx(1.046, abs=6e-4) and f2_4 == pytest.approx(2.14, abs=6e-3)
    assert white8 == pytest.approx(1.044, abs=6e-4) and f2_8 == pytest.approx(2.04, abs=6e-3)


@pytest.mark.parametrize("order", [1, 4, 8])
def test_noise_integrals_match_adaptive_quadrature(order):
    # The fast log-space Gauss-Legendre rule against scipy.integrate.quad (general-purpose reference).
    b, a = _prototype(order)
    for power, lo, hi in [(-1, 1e-4, 3.0), (0, 1e-3, 50.0), (1, 0.0, 20.0), (2, 1e-6, 1e3)]:
        pieces = [lo, *[e for e in (1e-2, 1.0, 10.0, 100.0) if lo < e < hi], hi]
        def integrand(x, power=power):
            return x ** power * _power_response_normalised(np.asarray(x), b, a)

        ref = sum(integrate.quad(integrand, p, q, limit=200, epsrel=1e-12, epsabs=0)[0]
                  for p, q in zip(pieces[:-1], pieces[1:], strict=True))
        assert _normalised_integral(order, power, lo, hi) == pytest.approx(ref, rel=1e-9)


def _simulated_peak(width, fc, order):
    """Peak of a unit rectangular pulse through a digital Bessel filter sampled at 2000 fc (sosfilt)."""
    fs = 2000.0 * fc
    sos = signal.bessel(order, fc, norm="mag", output="sos", fs=fs)
    u = np.zeros(int((width + 10.0 / fc) * fs))
    u[int(1.0 / fc * fs):int(1.0 / fc * fs) + int(round(width * fs))] = 1.0
    return signal.sosfilt(sos, u).max()


def test_pulse_peak_against_simulated_filter():
    # Independent check: rectangular pulses through a finely sampled digital Bessel filter (bilinear transform
    # at 2000 fc, where it matches the analog prototype closely).
    fc = 1e3
    tr = bessel_step_shape(4).rise_time / fc
    for width in (0.3 * tr, tr, 2 * tr, 10 * tr):
        assert float(pulse_peak_fraction(width, fc, 4)) == pytest.approx(_simulated_peak(width, fc, 4), abs=2e-3)
    # Long events keep their height plus the overshoot; two rise times keep about 99 % (REFERENCES.md:
    # the Gaussian filter keeps 0.990 at 2 Tr; "events longer than two rise times keep their amplitude").
    assert float(pulse_peak_fraction(1.0, fc, 4)) == pytest.approx(1.0084, abs=1e-4)
    assert 0.98 < float(pulse_peak_fraction(2 * tr, fc, 4)) < 1.01


# ------------------------------------------------------------------------------------------ model fit
def test_synthetic_recording_gives_back_input_capacitance_and_white_floor():
    # White floor of 1 GOhm at 298 K, C_in = 10 pF with e_n = 5 nV/rtHz, and 1/f noise with a 200 Hz corner,
    # made in the time domain (white noise; differentiated white noise for the f^2 term; a 1/f filter bank).
    coefs = [200.0 * B_1G, B_1G, 0.0, d_coeff(10e-12)]
    x, _ = synth(coefs, 1 << 19, seed=3)
    result = analyze_noise(x, FS, voltage_noise="5 nV", temperature_k=T_REF, cutoff_hz=5e3, segment=2048)
    c_in, c_err = result.input_capacitance
    assert c_in == pytest.approx(10e-12, rel=0.05)
    assert result.fit.white == pytest.approx(B_1G, rel=0.05)
    assert result.fit.equivalent_resistance()[0] == pytest.approx(1e9, rel=0.05)
    assert 0 < c_err < 0.05 * c_in
    assert 0.7 < result.fit.reduced_chi2 < 1.4
    # The model through the filter agrees with the measured spectrum through the same filter.
    lim = result.limits
    assert lim.noise_rms_A == pytest.approx(lim.noise_rms_measured_A, rel=0.03)


def test_fit_uncertainties_agree_with_monte_carlo():
    # Monte Carlo: refit independent realisations; the scatter of each coefficient must match the standard
    # error the fit reports (30 draws: the sample sd is known to about 13 %, so 0.7-1.4 is a 3-sigma band).
    truth = np.array([2000.0 * B_1G, B_1G, 0.0, d_coeff(10e-12)])  # 1/f corner 2 kHz
    terms = ("flicker", "white", "capacitive")
    estimates, errors = [], []
    for seed in range(30):
        x, _ = synth(truth, 1 << 15, seed=100 + seed, f_min_hz=10.0)
        fit = fit_noise_model(welch_spectrum(x, FS, nperseg=512), terms=terms)
        estimates.append(fit.coefficients)
        errors.append(fit.stderr)
    estimates, errors = np.array(estimates), np.array(errors)
    for j in (0, 1, 3):
        ratio = estimates[:, j].std(ddof=1) / errors[:, j].mean()
        assert 0.7 < ratio < 1.4, (j, ratio)
        # and no bias beyond the Monte Carlo's own uncertainty
        assert abs(estimates[:, j].mean() - truth[j]) < 4 * estimates[:, j].std(ddof=1) / math.sqrt(30)


def test_fit_keeps_coefficients_non_negative_and_flags_zero_terms():
    x, _ = synth([0.0, B_1G, 0.0, d_coeff(10e-12)], 1 << 17, seed=4)
    fit = fit_noise_model(welch_spectrum(x, FS, nperseg=1024))
    assert np.all(fit.coefficients >= 0)
    assert fit.at_zero[1] == False and fit.at_zero[3] == False  # noqa: E712 - numpy bools
    assert np.all(fit.stderr >= 0)
    with pytest.raises(ValueError, match="terms must be"):
        fit_noise_model(welch_spectrum(x, FS, nperseg=1024), terms=("pink",))


def test_bin_correlation_of_hann_window():
    # Percival & Walden (1993), section 6.6: neighbouring Hann-window periodogram bins correlate at 4/9.
    rho = bin_correlation(signal.get_window("hann", 1024))
    np.testing.assert_allclose(rho, [1.0, 4 / 9, 1 / 36], rtol=1e-9)


# ------------------------------------------------------------------------------------------ mains
def test_mains_lines_found_masked_and_kept_out_of_the_fit():
    n = 1 << 19
    x, _ = synth([0.0, B_1G, 0.0, d_coeff(10e-12)], n, seed=5)
    t = np.arange(n) / FS
    lines = {1: 2e-12, 3: 1e-12, 5: 0.5e-12}  # amplitudes of 50, 150, 250 Hz, A
    hum = sum(amp * np.sin(2 * np.pi * 50.0 * h * t + h) for h, amp in lines.items())
    clean = welch_spectrum(x, FS, nperseg=8192)
    spec = find_mains_peaks(welch_spectrum(x + hum, FS, nperseg=8192))
    assert spec.mains_hz == 50.0
    found = {p.harmonic: p for p in spec.mains_peaks}
    assert set(found) == set(lines)
    for h, amp in lines.items():
        assert found[h].line_rms_A == pytest.approx(amp / math.sqrt(2), rel=0.1)
        assert found[h].frequency_hz == pytest.approx(50.0 * h, abs=spec.resolution_hz)
    # Masked, the band rms matches the spectrum without hum; unmasked it carries the lines' power.
    assert band_rms(spec, 20.0, 1000.0) == pytest.approx(band_rms(clean, 20.0, 1000.0, masked=False), rel=0.05)
    hum_power = sum(a ** 2 / 2 for a in lines.values())
    unmasked = band_rms(spec, 20.0, 1000.0, masked=False) ** 2 - band_rms(clean, 20.0, 1000.0, masked=False) ** 2
    assert unmasked == pytest.approx(hum_power, rel=0.1)
    assert fit_noise_model(spec).white == pytest.approx(fit_noise_model(clean).white, rel=0.02)
    assert find_mains_peaks(clean).mains_peaks == []


def test_no_mains_lines_taken_from_the_rise_of_flicker_noise_at_a_coarse_resolution():
    # Segments shortened to keep events out give a coarse resolution (24 Hz here): the 1/f rise next to DC
    # must not pass for mains lines (a running median over 31 bins, 0-750 Hz, sat far below the bins near
    # 50 Hz and found 1-3 "lines" in each of these recordings), while real hum is still found at 12 Hz (at
    # 24 Hz the Hann main lobes of 50 Hz harmonics, +-2 bins, overlap and cover the floor).
    n = 1 << 19
    t = np.arange(n) / FS
    lines = {1: 2e-12, 3: 1e-12, 5: 0.5e-12}
    hum = sum(amp * np.sin(2 * np.pi * 50.0 * h * t + h) for h, amp in lines.items())
    for seed in (21, 22, 23):
        x, _ = synth([100 * B_1G, B_1G, 0.0, d_coeff(10e-12)], n, seed=seed)
        assert find_mains_peaks(welch_spectrum(x, FS, nperseg=4096)).mains_peaks == []
        spec = find_mains_peaks(welch_spectrum(x + hum, FS, nperseg=8192))
        assert spec.mains_hz == 50.0 and {p.harmonic for p in spec.mains_peaks} == set(lines)


# ------------------------------------------------------------------------------------------ detection limits
def test_detection_limits_and_particle_size():
    coefs = np.array([0.0, B_1G, 0.0, d_coeff(10e-12)])
    cutoff = 5e3
    lim = detection_limits(coefs, cutoff_hz=cutoff, order=4, k_sigma=5.0, f_lo_hz=1.0, f_hi_hz=50e3,
                           material="Cu")
    # White part through a 4-pole Bessel: B * 1.046 fc (REFERENCES.md); f^2 part: D * 2.14 fc^3 / 3.
    expected = math.sqrt(B_1G * 1.0464 * cutoff + coefs[3] * 2.138 * cutoff ** 3 / 3)
    assert lim.noise_rms_A == pytest.approx(expected, rel=2e-3)
    assert lim.min_peak_A == pytest.approx(5 * lim.noise_rms_A)
    assert lim.rise_time_s == pytest.approx(0.3501 / cutoff, rel=1e-3)
    assert lim.min_full_amplitude_duration_s == pytest.approx(2 * 0.3501 / cutoff, rel=1e-3)
    assert lim.min_charge_impulse_C < lim.min_charge_C
    # Faraday's law round trip with impactline.physics (Cu -> Cu2+, n = 2).
    assert charge_from_diameter(lim.min_diameter_m, "Cu") == pytest.approx(lim.min_charge_C, rel=1e-9)
    with pytest.raises(ValueError, match="Nyquist"):
        detection_limits(coefs, cutoff_hz=80e3, f_lo_hz=1.0, f_hi_hz=50e3)


def test_optimal_cutoff_for_white_noise_scales_with_duration():
    # For white noise the ratio p(w fc) / sqrt(fc) depends on w fc only, so the best fc * w is one number,
    # whatever w and the noise level. Check it and that no other cutoff (scanned independently, with the
    # peak from lsim) does better.
    products = []
    for w, b in [(100e-6, B_1G), (1e-3, 7 * B_1G)]:
        opt = optimal_cutoff([0.0, b, 0.0, 0.0], w, 4, f_lo_hz=0.01, f_hi_hz=1e7)
        products.append(opt.cutoff_hz * w)
        assert not opt.at_bound
    assert products[0] == pytest.approx(products[1], rel=1e-3)
    w = 100e-6
    opt = optimal_cutoff([0.0, B_1G, 0.0, 0.0], w, 4, f_lo_hz=0.01, f_hi_hz=1e7)
    best = opt.peak_fraction / opt.noise_rms_A
    num, den = signal.bessel(4, 1.0, analog=True, norm="mag")
    for fc in opt.cutoff_hz * np.array([0.5, 0.8, 0.9, 1.1, 1.25, 2.0]):
        def power_gain(f, fc=fc):
            return abs(np.polyval(num, 1j * f / fc) / np.polyval(den, 1j * f / fc)) ** 2

        gain = integrate.quad(power_gain, 0.01, 50 * fc, limit=200)[0]
        assert _simulated_peak(w, fc, 4) / math.sqrt(B_1G * gain) < best * (1 + 2e-3)


def test_optimal_cutoff_drops_when_capacitive_noise_dominates():
    w = 100e-6
    white = optimal_cutoff([0.0, B_1G, 0.0, 0.0], w, 4, f_lo_hz=1.0, f_hi_hz=1e6)
    with_cap = optimal_cutoff([0.0, B_1G, 0.0, d_coeff(30e-12)], w, 4, f_lo_hz=1.0, f_hi_hz=1e6)
    assert with_cap.cutoff_hz < white.cutoff_hz
    assert with_cap.min_peak_A > white.min_peak_A


# ------------------------------------------------------------------------------------------ comparison
def test_added_capacitance_and_double_layer_check():
    ref, _ = synth([0.0, B_1G, 0.0, d_coeff(10e-12)], 1 << 18, seed=6)
    cell, _ = synth([0.0, B_1G, 0.0, d_coeff(25e-12)], 1 << 18, seed=7)
    fit_ref = fit_noise_model(welch_spectrum(ref, FS, nperseg=2048))
    fit_cell = fit_noise_model(welch_spectrum(cell, FS, nperseg=2048))
    # 15 pF on a 5 um-radius disc (7.854e-7 cm^2) is 19.1 uF/cm^2: within 10-40 uF/cm^2 (Bard & Faulkner;
    # REFERENCES.md: such a disc has 7.9-31 pF).
    area = math.pi * (5e-6) ** 2
    cmp = compare_capacitance(fit_ref, fit_cell, voltage_noise=E_N, area_m2=area)
    assert cmp.added_capacitance_F == pytest.approx(15e-12, rel=0.05)
    assert abs(cmp.added_capacitance_F - 15e-12) < 4 * cmp.added_capacitance_stderr_F
    assert cmp.capacitance_per_area_F_per_m2 * 100 == pytest.approx(19.1, rel=0.05)  # uF/cm^2
    assert cmp.within_typical and cmp.plausible and cmp.warning == ""
    # The same 15 pF on a 50 um disc would be 0.19 uF/cm^2: flagged.
    small = compare_capacitance(fit_ref, fit_cell, voltage_noise=E_N, area_m2=math.pi * (50e-6) ** 2)
    assert not small.plausible and "uF/cm^2" in small.warning
    # Without e_n only the product e_n * delta C is known.
    product = compare_capacitance(fit_ref, fit_cell)
    assert math.isnan(product.added_capacitance_F)
    assert product.added_product == pytest.approx(E_N * 15e-12, rel=0.05)


# ------------------------------------------------------------------------------------------ files and CLI
def _numpy_reader_installed():
    return any(e.name == "numpy" for e in default_registry().stages("reader"))


@pytest.mark.skipif(not _numpy_reader_installed(), reason="no numpy reader registered")
def test_file_through_reader_equals_array_and_chunking_changes_nothing(tmp_path):
    x, _ = synth([50 * B_1G, B_1G, 0.0, d_coeff(10e-12)], 100_000, seed=8)
    path = tmp_path / "cell.npy"
    np.save(path, x)
    rec = open_recording(path, {"sample_rate": FS})
    assert rec.metadata["reader"] == "numpy"
    from_file = analyze_noise(path, reader_params={"sample_rate": "100 kHz"}, segment=1024, chunk_samples=3000)
    from_array = analyze_noise(x, FS, segment=1024, chunk_samples=len(x))
    np.testing.assert_allclose(from_file.spectrum.psd, from_array.spectrum.psd, rtol=1e-10)
    np.testing.assert_allclose(from_file.fit.coefficients, from_array.fit.coefficients, rtol=1e-6, atol=1e-45)
    assert from_file.reader == "numpy"
    with pytest.raises(InputError, match="file not found"):
        open_recording(tmp_path / "missing.npy")


@pytest.mark.skipif(not _numpy_reader_installed(), reason="no numpy reader registered")
def test_cli_writes_tables_with_units_and_refuses_to_overwrite(tmp_path, capsys):
    for name, c_in, seed in (("open", 10e-12, 9), ("cell", 20e-12, 10)):
        x, _ = synth([0.0, B_1G, 0.0, d_coeff(c_in)], 100_000, seed=seed)
        np.save(tmp_path / f"{name}.npy", x)
    out = tmp_path / "out"
    args = ["noise", str(tmp_path / "cell.npy"), "--compare", str(tmp_path / "open.npy"), "--out", str(out),
            "--sample-rate", "100 kHz", "--segment", "2048", "--voltage-noise", "5 nV", "--electrode-radius", "40 um",
            "--cutoff", "5 kHz", "--material", "Cu", "--target-duration", "300 us", "--quiet"]
    assert cli_main(args) == 0
    printed = capsys.readouterr().out
    assert "input capacitance C_in" in printed and "added capacitance" in printed and "best cutoff" in printed
    fit = pq.read_table(out / "noise_fit.parquet")
    assert fit.num_rows == 2
    for column, unit in [("white_psd_A2_per_Hz", b"A^2/Hz"), ("f2_coeff_A2_per_Hz3", b"A^2/Hz^3"),
                         ("white_psd_A2_per_Hz_stderr", b"A^2/Hz"), ("input_capacitance_F", b"F")]:
        assert fit.schema.field(column).metadata[b"unit"] == unit
    rows = {r["file"]: r for r in fit.to_pylist()}
    assert rows[str(tmp_path / "cell.npy")]["input_capacitance_F"] == pytest.approx(20e-12, rel=0.05)
    compare = pq.read_table(out / "noise_compare.parquet").to_pylist()[0]
    assert compare["added_capacitance_F"] == pytest.approx(10e-12, rel=0.1)
    limits = pq.read_table(out / "noise_limits.parquet").to_pylist()
    assert all(r["min_diameter_m"] > 0 and r["optimal_cutoff_Hz"] > 0 for r in limits)
    spectrum = pq.read_table(out / "noise_spectrum.parquet")
    assert spectrum.num_rows == 2 * 1025
    assert spectrum.schema.field("psd_A2_per_Hz").metadata[b"unit"] == b"A^2/Hz"
    assert not [p for p in out.iterdir() if p.name.startswith(".")]  # no temporary file left
    # A second run into the same folder is refused (exit 2) unless --overwrite.
    assert cli_main(args) == 2
    assert "--overwrite" in capsys.readouterr().err
    assert cli_main([*args, "--overwrite"]) == 0
    # A missing file fails that file only (exit 1); the others are written.
    assert cli_main(["noise", str(tmp_path / "cell.npy"), str(tmp_path / "nope.npy"), "--out",
                     str(tmp_path / "out2"), "--sample-rate", "100 kHz", "--quiet"]) == 1
    assert "nope.npy" in capsys.readouterr().err
    assert pq.read_table(tmp_path / "out2" / "noise_fit.parquet").num_rows == 1
    # Bad arguments: exit 2 with the reason.
    assert cli_main(["noise", str(tmp_path / "cell.npy"), "--out", str(tmp_path / "o3"), "--terms", "pink"]) == 2
    assert "pink" in capsys.readouterr().err


def test_filtered_rms_of_measured_spectrum_matches_time_domain():
    # The measured spectrum through the analog Bessel response versus the same noise filtered in the time
    # domain by a digital Bessel (bilinear, cutoff pre-warped) well below Nyquist, where the two agree.
    x, _ = synth([0.0, B_1G, 0.0, d_coeff(10e-12)], 1 << 18, seed=11)
    spec = welch_spectrum(x, FS, nperseg=4096)
    sos = signal.bessel(4, 2e3, norm="mag", output="sos", fs=FS)
    y = signal.sosfilt(sos, x)[4096:]
    assert filtered_spectrum_rms(spec, 2e3, 4) == pytest.approx(np.std(y), rel=0.03)
    assert filtered_model_rms([0.0, B_1G, 0.0, d_coeff(10e-12)], 2e3, 4, spec.resolution_hz / 2, FS / 2) == \
        pytest.approx(np.std(y), rel=0.03)


# ------------------------------------------------------------------------------------------ events left out
def _with_pulses(x, rate_hz, seed, fs=FS, height=1e-9, tau=300e-6):
    """Noise plus exponentially decaying pulses (collision-like events) at Poisson times; returns (x, onsets)."""
    rng = np.random.default_rng(seed)
    onsets = np.flatnonzero(rng.random(len(x)) < rate_hz / fs)
    t = np.arange(int(12 * tau * fs)) / fs
    shape = height * np.exp(-t / tau)
    y = x.copy()
    for k in onsets:
        part = y[k:k + len(shape)]
        part += shape[: len(part)]
    return y, onsets


def test_simulated_collision_recording_gives_back_the_noise_between_events(tmp_path):
    # impactline.simulate: 4 s at 250 kHz, ~5 collisions/s of nA spikes, bursts and tails on 2.6 pA of noise
    # (5 fA/rtHz white floor, C_in 10 pF with e_n 5 nV/rtHz, 1/f corner 100 Hz). The amplifier filter is put
    # at 100 kHz so that it bends the spectrum by < 2 % below the 20 kHz fitted here (noise_psd_model, checked
    # below). The simulator's own noise model is the reference.
    from impactline.simulate import SimulationSpec, noise_psd_model, noise_rms, simulate

    spec = SimulationSpec(duration_s=4.0, bandwidth_hz=100e3, seed=2)
    sim = simulate(spec, tmp_path / "collisions.bin")
    white = spec.white_noise_A_per_rtHz ** 2
    f2 = (2 * math.pi * spec.input_capacitance_F * spec.voltage_noise_V_per_rtHz) ** 2
    gain2 = noise_psd_model(np.array([20e3]), spec, components=True)["amplifier_gain2"]
    assert gain2[0] > 0.98
    terms = ("flicker", "white", "capacitive")
    kept_out = analyze_noise(sim.data_path, fit_f_hi_hz=20e3, terms=terms, chunk_samples=300_000)
    averaged = analyze_noise(sim.data_path, fit_f_hi_hz=20e3, terms=terms, events="keep")
    rms = {a.events.mode: next(r.brickwall_measured_A for r in a.bandwidth if r.bandwidth_hz == a.nyquist_hz)
           for a in (kept_out, averaged)}
    assert kept_out.fit.white == pytest.approx(white, rel=0.1)
    assert kept_out.fit.capacitive == pytest.approx(f2, rel=0.1)
    assert rms["exclude"] == pytest.approx(noise_rms(spec), rel=0.1)
    assert 0.7 < kept_out.fit.reduced_chi2 < 1.5
    # With the events averaged in, the same analysis is far off: the test can fail.
    assert rms["keep"] > 10 * noise_rms(spec)
    assert not averaged.fit.white == pytest.approx(white, rel=0.5, abs=0)
    # Every true event lies inside an excursion; what was left out is reported.
    truth = pq.read_table(sim.truth_path).to_pylist()
    ev = kept_out.events
    peaks = np.array([round(r["peak_s"] * spec.sample_rate_hz) for r in truth])
    inside = np.searchsorted(ev.ends, peaks, side="right")
    assert np.all(ev.starts[inside] <= peaks)
    assert len(truth) <= ev.n_excursions + 2 and ev.n_excursions <= len(truth) + 2
    assert ev.sigma_A == pytest.approx(noise_rms(spec), rel=0.1)
    s = kept_out.spectrum
    assert 0 < s.n_segments_excluded < s.n_segments_total and s.n_segments >= 16
    assert 0 < ev.event_fraction < 0.2
    # The median of the periodograms (scipy.signal.welch, average="median", with its bias correction) is no
    # cure at this event rate: most segments hold an event.
    x = np.fromfile(sim.data_path, dtype="<f4").astype(float)
    f, p = signal.welch(x, fs=spec.sample_rate_hz, nperseg=ev.segment_requested, average="median")
    band = (f > 1e3) & (f < 10e3)
    assert np.mean(p[band] / noise_psd_model(f[band], spec)) > 10


def test_event_free_recording_gives_exactly_the_same_answer_in_both_modes():
    x, _ = synth([50 * B_1G, B_1G, 0.0, d_coeff(10e-12)], 1 << 18, seed=12)
    kept_out = analyze_noise(x, FS, segment=4096)
    averaged = analyze_noise(x, FS, segment=4096, events="keep")
    assert kept_out.events.n_excursions == 0 and kept_out.spectrum.n_segments_excluded == 0
    np.testing.assert_array_equal(kept_out.spectrum.psd, averaged.spectrum.psd)
    np.testing.assert_array_equal(kept_out.fit.coefficients, averaged.fit.coefficients)
    assert kept_out.spectrum.effective_averages == averaged.spectrum.effective_averages
    # The default segment is not shortened either.
    assert analyze_noise(x, FS).spectrum.nperseg == segment_samples(None, FS, len(x))


def test_event_exclusion_does_not_depend_on_the_chunk_size():
    x, _ = synth([50 * B_1G, B_1G, 0.0, d_coeff(10e-12)], 300_001, seed=13)
    y, _ = _with_pulses(x, 20.0, seed=14)
    ref = analyze_noise(y, FS, chunk_samples=len(y))
    assert ref.events.n_excursions > 0 and ref.spectrum.n_segments_excluded > 0
    for chunk in (3000, 4096, 10_007):
        a = analyze_noise([y[i:i + chunk] for i in range(0, len(y), chunk)], FS, n_samples=len(y))
        np.testing.assert_array_equal(a.events.starts, ref.events.starts)
        np.testing.assert_array_equal(a.events.ends, ref.events.ends)
        assert a.spectrum.n_segments == ref.spectrum.n_segments and a.spectrum.nperseg == ref.spectrum.nperseg
        np.testing.assert_allclose(a.spectrum.psd, ref.spectrum.psd, rtol=1e-10, atol=0)
        np.testing.assert_allclose(a.fit.coefficients, ref.fit.coefficients, rtol=1e-6, atol=1e-45)
    with pytest.raises(ValueError, match="one-shot iterator"):
        analyze_noise((y[i:i + 4096] for i in range(0, len(y), 4096)), FS)


def test_dense_events_shorten_the_default_segment_but_not_a_given_one():
    # 60 pulses/s of 1 nA (tau 300 us) on 1.3 pA of noise: few long segments are clean, shorter ones are.
    x, _ = synth([0.0, B_1G, 0.0, d_coeff(10e-12)], 1 << 19, seed=15)
    y, onsets = _with_pulses(x, 60.0, seed=16)
    a = analyze_noise(y, FS)
    ev = a.events
    assert ev.shortened and ev.segment_used < ev.segment_requested
    assert ev.candidates[0][2] < 16 <= ev.candidates[-1][2] == a.spectrum.n_segments
    assert a.fit.white == pytest.approx(B_1G, rel=0.1)
    assert a.fit.capacitive == pytest.approx(d_coeff(10e-12), rel=0.1)
    # A given segment is kept; when every segment holds an event the error says what to do.
    with pytest.raises(InputError, match="hold events.*--events keep"):
        analyze_noise(y, FS, segment=1 << 16)


def test_excursions_follow_the_tail_and_find_low_steps_by_averaging():
    from impactline.noise.events import BlockScale, ExcursionFinder, find_events, reference_scale

    rng = np.random.default_rng(17)
    sigma = 1e-12
    x = sigma * rng.standard_normal(1 << 17)
    # A pulse of 20 sigma decaying with tau = 200 samples: above 6 sigma for 240 samples, above the release
    # level of 2 sigma until 200 ln(10) = 460 samples after the onset; in means of 512 samples (sigma / 22.6)
    # its tail stays above the release level for two more means (e^-2.56 x 4000 / 512 = 0.6 sigma = 14 sigma_512).
    onset = 30_000
    x[onset:onset + 3000] += 20 * sigma * np.exp(-np.arange(3000) / 200.0)
    # A step of 2 sigma: invisible sample by sample, 45 sigma in means of 512 samples (sigma / sqrt(512)).
    step_at = 100_000
    x[step_at:] += 2 * sigma
    block = 1 << 15
    ev = find_events(lambda: iter((x,)), block)
    assert ev.averaging_samples == (1, 8, 64, 512)
    assert ev.sigma_A == pytest.approx(sigma, rel=0.05)
    # sigma of means of m independent samples is sigma / sqrt(m) (1.4826 MAD estimates it)
    assert ev.sigma_by_scale_A[2] == pytest.approx(sigma / 8, rel=0.1)
    first = np.searchsorted(ev.ends, onset, side="right")
    assert ev.starts[first] <= onset and 460 < ev.ends[first] - onset <= 3 * 512
    hit = np.searchsorted(ev.ends, step_at, side="right")
    assert ev.starts[hit] <= step_at < ev.ends[hit]
    # Sample by sample alone, the step is not an excursion.
    scan = BlockScale(block)
    scan.update(x)
    centres, scales = scan.result()
    raw = ExcursionFinder(centres, reference_scale(scales), block)
    raw.update(x)
    starts, ends = raw.result()
    assert not np.any((starts <= step_at) & (step_at < ends)) and np.any((starts <= onset) & (onset < ends))


def test_reference_scale_is_a_running_median_that_ignores_crowded_blocks():
    scales = np.ones(40)
    scales[[5, 6, 7, 20]] = 50.0  # blocks crowded with events
    np.testing.assert_array_equal(reference_scale(scales), np.ones(40))
    ramp = np.linspace(1.0, 2.0, 40)  # a noise level that changes slowly is followed
    np.testing.assert_allclose(reference_scale(ramp)[8:-8], ramp[8:-8])
    # 1.4826 = 1 / Phi^-1(3/4) makes the MAD a standard deviation for Gaussian noise (Donoho & Johnstone 1994;
    # REFERENCES.md, wavelet denoising).
    from impactline.robust import MAD_TO_SIGMA as _MAD_TO_SIGMA
    from scipy import stats

    assert _MAD_TO_SIGMA == pytest.approx(1 / stats.norm.ppf(0.75), rel=1e-12)


def test_effective_averages_count_the_overlapping_pairs_that_remain():
    w = signal.get_window("hann", 1024)
    k_all = effective_averages(w, 100, 512)
    np.testing.assert_allclose(effective_averages(w, 100, 512, lag_pairs=np.array([99])), k_all, rtol=1e-12)
    # Every other segment of a 50 % overlap grid: no two averaged segments overlap, so they are independent.
    assert effective_averages(w, 50, 512, lag_pairs=np.array([0])) == pytest.approx(50.0)
    # Streamed with a gap: the accumulator counts the pairs it really averaged (Welch 1967 variance formula).
    rng = np.random.default_rng(18)
    x = rng.standard_normal(512 * 21)
    acc = WelchAccumulator(FS, 1024, 512, exclude=(np.array([512 * 10 + 5]), np.array([512 * 10 + 6])))
    acc.update(x)
    spec = acc.result()
    assert (spec.n_segments, spec.n_segments_total) == (18, 20)  # segments 9 and 10 hold sample 5125
    assert spec.lag_pairs.tolist() == [16]  # neighbours (0,1)..(7,8) and (11,12)..(18,19)
    assert spec.used_samples == 2 * (8 * 512 + 1024)  # segments 0-8 and 11-19 cover 5120 samples each


def test_cli_reports_what_was_left_out(tmp_path, capsys):
    x, _ = synth([0.0, B_1G, 0.0, d_coeff(10e-12)], 200_000, seed=19)
    y, _ = _with_pulses(x, 15.0, seed=20)
    np.save(tmp_path / "cell.npy", y)
    common = [str(tmp_path / "cell.npy"), "--sample-rate", "100 kHz", "--quiet"]
    assert cli_main(["noise", *common, "--out", str(tmp_path / "a")]) == 0
    printed = capsys.readouterr().out
    assert "excursions beyond 6 sigma" in printed and "segments left out" in printed
    assert cli_main(["noise", *common, "--out", str(tmp_path / "b"), "--events", "keep"]) == 0
    assert "kept in the spectrum" in capsys.readouterr().out
    rows = [pq.read_table(tmp_path / d / "noise_fit.parquet").to_pylist()[0] for d in ("a", "b")]
    fit_table = pq.read_table(tmp_path / "a" / "noise_fit.parquet")
    assert fit_table.schema.field("event_time_s").metadata[b"unit"] == b"s"
    assert rows[0]["events_mode"] == "exclude" and rows[1]["events_mode"] == "keep"
    assert rows[0]["segments_excluded"] > 0 and rows[0]["n_event_excursions"] > 0
    assert rows[0]["segments_excluded_fraction"] == pytest.approx(
        rows[0]["segments_excluded"] / rows[0]["segments_total"])
    assert rows[1]["segments_excluded"] == 0 and rows[1]["n_event_excursions"] is None
    assert rows[0]["rms_total_A"] < rows[1]["rms_total_A"] / 10
    assert cli_main(["noise", *common, "--out", str(tmp_path / "c"), "--event-threshold", "0"]) == 2
