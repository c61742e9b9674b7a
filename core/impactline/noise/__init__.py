"""Noise, bandwidth and input-capacitance analysis of current recordings.

What it answers, for each recording (a file read through the plugin readers, or an array):

* the one-sided power spectral density by Welch's method, streamed chunk by chunk (A^2/Hz), with mains
  lines found and masked, and with the segments that hold events left out (the noise between events);
* rms noise over any band and versus bandwidth (brick wall, and after a Bessel filter);
* the fit of the input-referred current-noise model ``A/f + B + C f + D f^2`` with uncertainties, corner
  frequencies, the equivalent resistance of the white floor and the input capacitance ``C_in`` from the
  amplifier's voltage noise ``e_n`` (or the product ``e_n C_in``);
* detection limits at a Bessel cutoff and a k-sigma threshold (peak current, charge, particle diameter,
  shortest full-amplitude event) and the cutoff that best detects events of a given duration;
* comparing a recording with a reference (open circuit): the capacitance the cell adds, per electrode area.

Modules
-------
spectrum   streaming Welch, mains lines, band rms
events     finding events (robust noise scale, excursions) and keeping them out of the spectrum
model      the four-term model, its fit, derived quantities
filters    analog Bessel responses, rise time, pulse peak, noise integrals
limits     detection limits and the optimal cutoff
synth      synthetic noise with a chosen model spectrum (tests, benchmarks)
output     Parquet tables with units
cli        the ``impactline noise`` command

Examples
--------
>>> from impactline.noise import analyze_noise
>>> result = analyze_noise("cell.npy", voltage_noise="5 nV", cutoff_hz=10e3)      # doctest: +SKIP
>>> result.fit.input_capacitance(result.voltage_noise)                           # doctest: +SKIP
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Iterator, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import InputError
from ..stages import Recording
from ..units import parse_quantity
from .events import (
    DEFAULT_RELEASE_SIGMA,
    DEFAULT_THRESHOLD_SIGMA,
    EVENT_MODES,
    EventExclusion,
    choose_segment,
    find_events,
)
from .filters import bessel_power_response, noise_bandwidth_factors, pulse_peak_fraction
from .limits import (
    DetectionLimits,
    OptimalCutoff,
    detection_limits,
    filtered_model_rms,
    filtered_spectrum_rms,
    optimal_cutoff,
)
from .model import (
    TERM_NAMES,
    NoiseFit,
    capacitive_rms_brickwall,
    fit_noise_model,
    johnson_current_psd,
    model_psd,
    parse_voltage_noise,
    shot_noise_psd,
)
from .spectrum import (
    MainsPeak,
    Spectrum,
    WelchAccumulator,
    band_rms,
    cumulative_rms,
    default_segment_samples,
    find_mains_peaks,
    welch_spectrum,
)

__all__ = [
    "NoiseAnalysis",
    "BandwidthRow",
    "CapacitanceComparison",
    "DetectionLimits",
    "EVENT_MODES",
    "EventExclusion",
    "MainsPeak",
    "NoiseFit",
    "OptimalCutoff",
    "Spectrum",
    "WelchAccumulator",
    "analyze_noise",
    "band_rms",
    "bessel_power_response",
    "capacitive_rms_brickwall",
    "compare_capacitance",
    "cumulative_rms",
    "default_bandwidths",
    "detection_limits",
    "filtered_model_rms",
    "filtered_spectrum_rms",
    "find_events",
    "find_mains_peaks",
    "fit_noise_model",
    "johnson_current_psd",
    "model_psd",
    "noise_bandwidth_factors",
    "open_recording",
    "optimal_cutoff",
    "pulse_peak_fraction",
    "register_cli",
    "rms_versus_bandwidth",
    "segment_samples",
    "shot_noise_psd",
    "welch_spectrum",
    "DOUBLE_LAYER_TYPICAL_F_PER_M2",
    "DOUBLE_LAYER_PLAUSIBLE_F_PER_M2",
]

DEFAULT_CHUNK_SAMPLES = 1 << 20
#: Typical double-layer capacitance of metal electrodes, 10-40 uF/cm^2 (Bard & Faulkner, Electrochemical
#: Methods, 2nd ed., section 1.2), in F/m^2 (1 uF/cm^2 = 0.01 F/m^2).
DOUBLE_LAYER_TYPICAL_F_PER_M2 = (0.10, 0.40)
#: Outside about 5-100 uF/cm^2 a fitted capacitance per area is suspicious (wrong area, e_n or model).
DOUBLE_LAYER_PLAUSIBLE_F_PER_M2 = (0.05, 1.0)


# ------------------------------------------------------------------------------------------------ input
def open_recording(path: str | Path, reader_params: Mapping[str, Any] | None = None, *,
                   reader: str | None = None) -> Recording:
    """Open a recording through the installed reader plugins.

    The reader is the one named, else the one whose ``extensions`` contain the file's suffix, ties (or no
    match) broken by the readers' ``sniff`` of the file's first 4 KiB (:func:`impactline.pipeline.choose_reader`).

    Parameters
    ----------
    path : str or Path
        The data file.
    reader_params : mapping, optional
        Parameters of the reader (``sample_rate``, ``gain``, ``offset``, format-specific ones).
    reader : str, optional
        Reader name (see ``impactline plugins reader``).

    Returns
    -------
    Recording
        Its ``metadata["reader"]`` names the reader used.

    Raises
    ------
    InputError
        When no reader recognises the file, or the reader cannot read it.
    """
    from ..pipeline import choose_reader
    from ..registry import default_registry

    path = Path(path)
    if not path.is_file():
        raise InputError(path, "file not found", "check the path (globs are expanded by the shell)")
    registry = default_registry()
    name = reader or choose_reader(registry, path)
    try:
        stage = registry.create("reader", name, dict(reader_params or {}))
    except KeyError as exc:
        raise InputError(path, str(exc).strip("'\""), "name an installed reader", key="reader") from None
    recording = stage.open(path)
    recording.metadata = {**recording.metadata, "reader": name}
    return recording


def segment_samples(segment: int | float | str | None, sample_rate_hz: float, n_samples: int | None = None) -> int:
    """Welch segment length in samples.

    Parameters
    ----------
    segment : int, float, str or None
        ``int`` or a bare integer string: samples; ``float`` or a string with a unit (``"0.5 s"``,
        ``"100 ms"``): seconds; None: :func:`impactline.noise.spectrum.default_segment_samples`.
    sample_rate_hz : float
        Sampling rate, Hz.
    n_samples : int, optional
        Recording length (used by the default).
    """
    if segment is None:
        return default_segment_samples(sample_rate_hz, n_samples)
    if isinstance(segment, str):
        text = segment.strip()
        if text.isdigit():
            return int(text)
        seconds = parse_quantity(text, "s")
    elif isinstance(segment, (int, np.integer)) and not isinstance(segment, bool):
        return int(segment)
    else:
        seconds = float(segment)
    samples = int(round(seconds * sample_rate_hz))
    if samples < 8:
        raise ValueError(f"segment {segment!r} is only {samples} samples at {sample_rate_hz:g} Hz; need >= 8")
    return samples


def _chunks_of(source: Any, chunk_samples: int) -> Iterator[np.ndarray]:
    if isinstance(source, np.ndarray):
        for start in range(0, len(source), chunk_samples):
            yield source[start:start + chunk_samples]
    else:
        yield from source


# ------------------------------------------------------------------------------------------------ analysis
@dataclass
class BandwidthRow:
    """rms noise at one bandwidth (A): brick wall and Bessel, from the measured spectrum and from the fit."""

    bandwidth_hz: float
    brickwall_measured_A: float
    brickwall_model_A: float
    bessel_measured_A: float
    bessel_model_A: float


@dataclass
class NoiseAnalysis:
    """Everything :func:`analyze_noise` found for one recording.

    Attributes
    ----------
    name : str
        File path or a label.
    spectrum : Spectrum
        Welch spectrum with mains mask.
    fit : NoiseFit
        Noise-model fit.
    f_low_hz : float
        Lowest frequency counted in rms integrals (half the resolution: the first bin's lower edge), Hz.
    voltage_noise : float or None
        Amplifier voltage noise used for ``C_in``, V/sqrt(Hz).
    bandwidth : list of BandwidthRow
        rms noise versus bandwidth.
    bessel_order : int
        Order of the Bessel filter in :attr:`bandwidth` and :attr:`limits`.
    limits : DetectionLimits
        Detection limits at the chosen cutoff.
    reader : str
        Reader used ("array" for an array).
    events : EventExclusion or None
        How events were kept out of the spectrum and how much was left out.
    """

    name: str
    spectrum: Spectrum
    fit: NoiseFit
    f_low_hz: float
    voltage_noise: float | None
    bandwidth: list[BandwidthRow]
    bessel_order: int
    limits: DetectionLimits
    reader: str = "array"
    events: EventExclusion | None = None

    @property
    def input_capacitance(self) -> tuple[float, float]:
        """``(C_in, stderr)`` in F, NaN without a voltage noise."""
        if self.voltage_noise is None:
            return math.nan, math.nan
        return self.fit.input_capacitance(self.voltage_noise)

    @property
    def nyquist_hz(self) -> float:
        return self.spectrum.sample_rate_hz / 2.0


def default_bandwidths(spec: Spectrum) -> list[float]:
    """1-2-5 steps from 10 resolution bins up to the Nyquist frequency (which is included), Hz."""
    nyquist = spec.sample_rate_hz / 2.0
    start = 10.0 * spec.resolution_hz
    values = [m * 10.0 ** e for e in range(-1, 10) for m in (1.0, 2.0, 5.0)]
    return [v for v in values if start <= v < nyquist] + [nyquist]


def rms_versus_bandwidth(spec: Spectrum, fit: NoiseFit, *, order: int, f_low_hz: float,
                         bandwidths_hz: Iterable[float] | None = None) -> list[BandwidthRow]:
    """rms noise versus bandwidth: integrated spectrum and Bessel-filtered, measured and from the model.

    Default bandwidths: :func:`default_bandwidths`. Integrals start at ``f_low_hz``; the Bessel ones stop
    at the Nyquist frequency.
    """
    nyquist = spec.sample_rate_hz / 2.0
    if bandwidths_hz is None:
        bandwidths_hz = default_bandwidths(spec)
    a, b, c, d = fit.coefficients
    rows = []
    for bw in sorted(set(float(v) for v in bandwidths_hz)):
        lo = f_low_hz
        brick_model = (a * math.log(bw / lo) + b * (bw - lo) + c / 2.0 * (bw ** 2 - lo ** 2)
                       + d / 3.0 * (bw ** 3 - lo ** 3)) if bw > lo else 0.0
        rows.append(BandwidthRow(
            bandwidth_hz=bw,
            brickwall_measured_A=band_rms(spec, f_low_hz, bw),
            brickwall_model_A=math.sqrt(max(brick_model, 0.0)),
            bessel_measured_A=filtered_spectrum_rms(spec, bw, order, f_lo_hz=f_low_hz),
            bessel_model_A=filtered_model_rms(fit.coefficients, bw, order, f_low_hz, nyquist),
        ))
    return rows


def analyze_noise(source: str | Path | np.ndarray | Iterable[np.ndarray], sample_rate_hz: float | None = None, *,
                  name: str | None = None, reader: str | None = None,
                  reader_params: Mapping[str, Any] | None = None, segment: int | float | str | None = None,
                  overlap: float = 0.5, window: str = "hann", detrend: str | bool = "constant",
                  mains: float | str = "auto", fit_f_lo_hz: float | None = None, fit_f_hi_hz: float | None = None,
                  terms: tuple[str, ...] = TERM_NAMES, temperature_k: float = 298.15,
                  voltage_noise: float | str | None = None, cutoff_hz: float | None = None, order: int = 4,
                  k_sigma: float = 5.0, material: str | None = None, target_duration_s: float | None = None,
                  n_samples: int | None = None, chunk_samples: int = DEFAULT_CHUNK_SAMPLES,
                  events: str = "exclude", event_threshold: float = DEFAULT_THRESHOLD_SIGMA) -> NoiseAnalysis:
    """Spectrum, noise-model fit, rms versus bandwidth and detection limits of one recording.

    Parameters
    ----------
    source : path, ndarray or iterable of ndarray
        A file (read through the reader plugins), an array of current (A), or an iterable of chunks. With
        ``events="exclude"`` the recording is read three times, so an iterable must be re-iterable (a
        list of chunks, not a generator).
    sample_rate_hz : float, optional
        Sampling rate, Hz (required for arrays and chunk iterables; for files it comes from the reader).
    name : str, optional
        Label in tables (default: the path, or "array").
    reader, reader_params
        See :func:`open_recording`.
    segment : int, float or str, optional
        Welch segment (see :func:`segment_samples`). Given, it is used as is; by default it is shortened
        when too few segments are free of events (see :mod:`impactline.noise.events`).
    overlap : float
        Segment overlap as a fraction of the segment (0 to < 1).
    window : str
        Window name.
    detrend : {"constant", "linear", False}
        Per-segment detrending.
    mains : float or "auto"
        Mains frequency, Hz ("auto": 50 or 60 Hz; 0: no search).
    fit_f_lo_hz, fit_f_hi_hz : float, optional
        Fitted band, Hz (see :func:`impactline.noise.model.fit_noise_model`).
    terms : tuple of str
        Model terms to fit.
    temperature_k : float
        Temperature, K.
    voltage_noise : float or str, optional
        Amplifier voltage noise ``e_n`` (V/sqrt(Hz), or text such as ``"5 nV"``) for ``C_in``.
    cutoff_hz : float, optional
        Bessel cutoff for the detection limits, Hz (default: a tenth of the sampling rate).
    order : int
        Bessel order.
    k_sigma : float
        Detection threshold, standard deviations.
    material : str, optional
        Particle material for equivalent diameters (:func:`impactline.physics.get_material`).
    target_duration_s : float, optional
        Event duration of interest, s (charge limit and optimal cutoff).
    n_samples : int, optional
        Length of a chunk iterable, if known (for the default segment).
    chunk_samples : int
        Samples read per chunk.
    events : {"exclude", "keep"}
        "exclude" (default): segments holding an event (an excursion beyond ``event_threshold`` robust
        standard deviations) are left out of the spectrum, so the noise is measured between events;
        "keep": every segment is averaged.
    event_threshold : float
        Excursion threshold, robust standard deviations of the noise.

    Returns
    -------
    NoiseAnalysis
    """
    if events not in EVENT_MODES:
        raise ValueError(f"events must be one of {', '.join(EVENT_MODES)}, got {events!r}")
    if not event_threshold > DEFAULT_RELEASE_SIGMA:
        raise ValueError(f"event threshold must be above the release level of {DEFAULT_RELEASE_SIGMA:g} standard "
                         f"deviations, got {event_threshold!r}")
    reader_name = "array"
    if isinstance(source, (str, Path)):
        recording = open_recording(source, reader_params, reader=reader)
        reader_name = recording.metadata.get("reader", reader or "")
        fs = float(sample_rate_hz or recording.sample_rate_hz)
        length = recording.n_samples
        label = name or str(source)

        def read() -> Iterator[np.ndarray]:
            return recording.iter_chunks(chunk_samples)
    else:
        if sample_rate_hz is None:
            raise ValueError("sample_rate_hz is required when the recording is given as an array or chunks")
        fs = float(sample_rate_hz)
        length = len(source) if isinstance(source, np.ndarray) else n_samples
        label = name or "array"
        if not isinstance(source, np.ndarray) and iter(source) is source and events == "exclude":
            raise ValueError("events='exclude' reads the recording three times; give an array, a file or a "
                             "list of chunks instead of a one-shot iterator, or events='keep'")

        def read() -> Iterator[np.ndarray]:
            return _chunks_of(source, chunk_samples)
    if not 0 <= overlap < 1:
        raise ValueError(f"overlap must be a fraction from 0 to below 1, got {overlap!r}")
    nperseg = segment_samples(segment, fs, length)
    if length is not None and length < nperseg:
        raise InputError(label, f"recording has {length} samples, fewer than one Welch segment ({nperseg})",
                         "give a shorter --segment")
    if events == "exclude":
        found = find_events(read, nperseg, threshold=event_threshold, sample_rate_hz=fs)
        if found.n_samples < nperseg:
            raise InputError(label, f"recording has {found.n_samples} samples, fewer than one Welch segment "
                             f"({nperseg})", "give a shorter --segment")
        chosen, found.candidates = choose_segment(found.starts, found.ends, found.n_samples, nperseg, overlap,
                                                  adapt=segment is None)
        found.segment_requested, found.segment_used = nperseg, chosen
        nperseg = chosen
        exclude = found.intervals
        fix = "give a shorter --segment, a higher --event-threshold, or --events keep"
    else:
        found = EventExclusion(mode="keep", segment_requested=nperseg, segment_used=nperseg, sample_rate_hz=fs)
        exclude = None
        fix = "give a shorter --segment"
    acc = WelchAccumulator(fs, nperseg, int(round(overlap * nperseg)), window, detrend, exclude=exclude)
    for chunk in read():
        acc.update(chunk)
    try:
        spec = acc.result()
    except ValueError as exc:
        raise InputError(label, str(exc), fix) from None
    if events == "keep":
        found.n_samples = acc.n_seen
    find_mains_peaks(spec, mains)
    fit = fit_noise_model(spec, f_lo_hz=fit_f_lo_hz, f_hi_hz=fit_f_hi_hz, terms=tuple(terms),
                          temperature_k=temperature_k)
    en = parse_voltage_noise(voltage_noise) if voltage_noise is not None else None
    f_low = spec.resolution_hz / 2.0
    nyquist = fs / 2.0
    cutoff = float(cutoff_hz) if cutoff_hz else fs / 10.0
    bandwidth = rms_versus_bandwidth(spec, fit, order=order, f_low_hz=f_low,
                                     bandwidths_hz=[*default_bandwidths(spec), cutoff])
    limits = detection_limits(fit.coefficients, cutoff_hz=cutoff, order=order, k_sigma=k_sigma, f_lo_hz=f_low,
                              f_hi_hz=nyquist, spectrum=spec, target_duration_s=target_duration_s,
                              material=material)
    return NoiseAnalysis(name=label, spectrum=spec, fit=fit, f_low_hz=f_low, voltage_noise=en,
                         bandwidth=bandwidth, bessel_order=order, limits=limits, reader=reader_name, events=found)


# ------------------------------------------------------------------------------------------------ comparison
@dataclass
class CapacitanceComparison:
    """Capacitance a cell adds to the amplifier input, from two recordings' f^2 terms.

    ``C_in = sqrt(D) / (2 pi e_n)`` for each; the added capacitance is the difference (capacitances in
    parallel add). Without ``e_n`` only the products ``e_n C`` are known.

    Attributes
    ----------
    reference, cell : str
        Names of the reference (e.g. open circuit) and cell recordings.
    added_product : float
        ``e_n (C_cell - C_ref)``, V F / sqrt(Hz); :attr:`added_product_stderr` its standard error.
    added_capacitance_F : float
        ``C_cell - C_ref``, F (NaN without ``e_n``); :attr:`added_capacitance_stderr_F` its standard error.
    area_m2 : float
        Electrode area, m^2 (NaN if not given).
    capacitance_per_area_F_per_m2 : float
        Added capacitance per area, F/m^2 (1 F/m^2 = 100 uF/cm^2); with its standard error.
    within_typical, plausible : bool
        Whether it lies in 10-40 uF/cm^2 (typical double layer) and in 5-100 uF/cm^2 (plausible).
    warning : str
        Empty, or why the value is suspicious.
    """

    reference: str
    cell: str
    added_product: float
    added_product_stderr: float
    added_capacitance_F: float = math.nan
    added_capacitance_stderr_F: float = math.nan
    area_m2: float = math.nan
    capacitance_per_area_F_per_m2: float = math.nan
    capacitance_per_area_stderr_F_per_m2: float = math.nan
    within_typical: bool | None = None
    plausible: bool | None = None
    warning: str = ""


def compare_capacitance(reference: NoiseFit, cell: NoiseFit, *, voltage_noise: float | None = None,
                        area_m2: float | None = None, reference_name: str = "reference",
                        cell_name: str = "cell") -> CapacitanceComparison:
    """Added input capacitance of ``cell`` relative to ``reference``, and per electrode area.

    Parameters
    ----------
    reference, cell : NoiseFit
        Fits of the reference (e.g. open circuit, or the electrode out of solution) and of the cell.
    voltage_noise : float, optional
        Amplifier ``e_n``, V/sqrt(Hz).
    area_m2 : float, optional
        Electrode area, m^2 (a disc of radius r: ``pi r^2``).

    Returns
    -------
    CapacitanceComparison
        The standard errors add in quadrature (independent recordings).
    """
    p_ref, s_ref = reference.voltage_capacitance_product()
    p_cell, s_cell = cell.voltage_capacitance_product()
    out = CapacitanceComparison(reference=reference_name, cell=cell_name, added_product=p_cell - p_ref,
                                added_product_stderr=math.hypot(s_ref, s_cell))
    warnings = []
    if out.added_product <= 0:
        warnings.append("the cell recording does not show more f^2 noise than the reference")
    if voltage_noise is not None:
        out.added_capacitance_F = out.added_product / voltage_noise
        out.added_capacitance_stderr_F = out.added_product_stderr / voltage_noise
        if area_m2 is not None:
            if not area_m2 > 0:
                raise ValueError(f"electrode area must be > 0 m^2, got {area_m2!r}")
            out.area_m2 = float(area_m2)
            out.capacitance_per_area_F_per_m2 = out.added_capacitance_F / area_m2
            out.capacitance_per_area_stderr_F_per_m2 = out.added_capacitance_stderr_F / area_m2
            value = out.capacitance_per_area_F_per_m2
            lo, hi = DOUBLE_LAYER_TYPICAL_F_PER_M2
            out.within_typical = bool(lo <= value <= hi)
            plo, phi = DOUBLE_LAYER_PLAUSIBLE_F_PER_M2
            out.plausible = bool(plo <= value <= phi)
            if not out.plausible:
                warnings.append(
                    f"{value * 100:.3g} uF/cm^2 is far from the 10-40 uF/cm^2 typical of a double layer "
                    "(Bard & Faulkner); check the electrode area, the amplifier's e_n and the fit band"
                )
    out.warning = "; ".join(warnings)
    return out


def register_cli(subparsers: Any) -> None:
    """Add the ``noise`` sub-command to the ``impactline`` parser (see :mod:`impactline.noise.cli`)."""
    from .cli import register_cli as _register

    _register(subparsers)
