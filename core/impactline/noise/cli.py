"""The ``impactline noise`` command: spectra, noise-model fit, detection limits, capacitance comparison.

Exit codes follow :mod:`impactline.cli`: 0 success, 1 some recordings failed (the others are written),
2 invalid arguments or output folder.
"""

from __future__ import annotations

import argparse
import math
import shlex
import sys
from typing import Any, TextIO

from ..errors import ImpactlineError
from ..units import QuantityError, format_quantity, parse_quantity
from . import (
    DOUBLE_LAYER_TYPICAL_F_PER_M2,
    CapacitanceComparison,
    NoiseAnalysis,
    analyze_noise,
    compare_capacitance,
)
from .events import DEFAULT_RELEASE_SIGMA, DEFAULT_THRESHOLD_SIGMA, EVENT_MODES
from .model import TERM_NAMES, parse_voltage_noise
from .output import NoiseTableWriter

__all__ = ["register_cli", "run_noise", "format_summary", "format_comparison"]

EXIT_OK, EXIT_FILES_FAILED, EXIT_USAGE = 0, 1, 2


def register_cli(subparsers: Any) -> None:
    """Add the ``noise`` sub-command (handler :func:`run_noise`)."""
    p = subparsers.add_parser(
        "noise", help="noise spectrum, noise-model fit (C_in), rms vs bandwidth and detection limits",
        description="Welch spectrum of the noise between events (segments holding an event are left out) "
                    "with mains lines masked, fit of A/f + B + C f + D f^2 (input-referred "
                    "current noise), rms noise versus bandwidth, detection limits at a Bessel cutoff, and the "
                    "capacitance a cell adds relative to a reference recording. Quantities take SI prefixes: "
                    "'10 kHz', '5 nV', '5 um', '100 us'.")
    p.add_argument("files", nargs="+", metavar="FILE", help="recordings (any format a reader plugin reads)")
    p.add_argument("--out", default="impactline-noise", help="output folder for the Parquet tables")
    p.add_argument("--overwrite", action="store_true", help="replace tables already in --out")
    g = p.add_argument_group("spectrum")
    g.add_argument("--segment", help="Welch segment: samples ('65536') or a duration ('0.25 s'); default a power "
                                     "of two near 0.25 s, shortened when too few segments are free of events")
    g.add_argument("--overlap", default="0.5", help="segment overlap fraction (default 0.5)")
    g.add_argument("--window", default="hann", help="window name (scipy.signal.get_window; default hann)")
    g.add_argument("--mains", default="auto", help="mains frequency: auto (50 or 60 Hz), '50 Hz', '60 Hz' or off")
    g.add_argument("--chunk-samples", type=int, default=1 << 20, help="samples read per chunk")
    g.add_argument("--events", choices=EVENT_MODES, default="exclude",
                   help="exclude (default): leave out segments that hold an event, so the noise is measured "
                        "between events (the file is read three times); keep: average every segment")
    g.add_argument("--event-threshold", default=f"{DEFAULT_THRESHOLD_SIGMA:g}",
                   help="an event is an excursion beyond this many robust standard deviations of the noise "
                        f"(default {DEFAULT_THRESHOLD_SIGMA:g})")
    g = p.add_argument_group("model fit")
    g.add_argument("--fit-min", help="lowest fitted frequency (default 5 spectrum bins)")
    g.add_argument("--fit-max", help="highest fitted frequency (default 0.4 x sampling rate; keep it below the "
                                     "recording's anti-alias filter)")
    g.add_argument("--terms", default=",".join(TERM_NAMES),
                   help=f"model terms to fit, comma-separated among {', '.join(TERM_NAMES)}")
    g.add_argument("--temperature", default="298.15 K", help="temperature (default 298.15 K)")
    g.add_argument("--voltage-noise", help="amplifier input voltage noise e_n, e.g. '5 nV' (per sqrt(Hz)); "
                                           "gives C_in")
    area = g.add_mutually_exclusive_group()
    area.add_argument("--electrode-radius", help="disc electrode radius, e.g. '5 um' (area = pi r^2)")
    area.add_argument("--area", help="electrode area in m^2, e.g. '7.85e-11'")
    g.add_argument("--compare", metavar="FILE", help="reference recording (e.g. open circuit): report the "
                                                     "capacitance each FILE adds")
    g = p.add_argument_group("detection limits")
    g.add_argument("--cutoff", help="Bessel -3 dB frequency (default a tenth of the sampling rate)")
    g.add_argument("--order", type=int, default=4, help="Bessel order (default 4)")
    g.add_argument("--k-sigma", default="5", help="threshold in noise standard deviations (default 5)")
    g.add_argument("--material", help="particle material for equivalent diameters, e.g. Cu, Ag")
    g.add_argument("--target-duration", help="event duration of interest, e.g. '200 us': charge limit and "
                                             "the cutoff that detects such events best")
    g = p.add_argument_group("reading")
    g.add_argument("--reader", help="reader plugin (default: by extension and content)")
    g.add_argument("--sample-rate", help="sampling rate when the file does not state it, e.g. '250 kHz'")
    g.add_argument("--reader-param", action="append", default=[], metavar="KEY=VALUE",
                   help="extra reader parameter (repeatable), e.g. dtype=int16")
    p.add_argument("--quiet", action="store_true", help="no per-file progress on stderr")
    p.set_defaults(func=run_noise)


def _options(args: argparse.Namespace) -> tuple[dict[str, Any], dict[str, Any], float | None, float | None]:
    """Analysis keyword arguments, reader parameters, e_n and electrode area from the parsed arguments."""

    def q(value: str | None, unit: str) -> float | None:
        return None if value is None else parse_quantity(value, unit)

    reader_params: dict[str, Any] = {}
    if args.sample_rate:
        reader_params["sample_rate"] = args.sample_rate
    for item in args.reader_param:
        key, sep, value = item.partition("=")
        if not sep or not key.strip():
            raise ValueError(f"--reader-param {item!r}: expected KEY=VALUE")
        reader_params[key.strip()] = value.strip()
    mains: float | str = "auto"
    if args.mains.strip().lower() in ("off", "none", "0"):
        mains = 0.0
    elif args.mains.strip().lower() != "auto":
        mains = parse_quantity(args.mains, "Hz")
    terms = tuple(t.strip() for t in args.terms.split(",") if t.strip())
    unknown = [t for t in terms if t not in TERM_NAMES]
    if unknown:
        raise ValueError(f"--terms: unknown {', '.join(unknown)}; choose among {', '.join(TERM_NAMES)}")
    en = parse_voltage_noise(args.voltage_noise) if args.voltage_noise else None
    area = _parse_area(args.area) if args.area else None
    if args.electrode_radius:
        area = math.pi * parse_quantity(args.electrode_radius, "m") ** 2
    if area is not None and not area > 0:
        raise ValueError(f"electrode area must be > 0, got {area!r}")
    options = dict(
        reader=args.reader, segment=args.segment, overlap=parse_quantity(args.overlap, ""), window=args.window,
        mains=mains, fit_f_lo_hz=q(args.fit_min, "Hz"), fit_f_hi_hz=q(args.fit_max, "Hz"), terms=terms,
        temperature_k=parse_quantity(args.temperature, "K"), voltage_noise=en, cutoff_hz=q(args.cutoff, "Hz"),
        order=args.order, k_sigma=parse_quantity(args.k_sigma, ""), material=args.material,
        target_duration_s=q(args.target_duration, "s"), chunk_samples=args.chunk_samples,
        events=args.events, event_threshold=parse_quantity(args.event_threshold, ""),
    )
    if not options["event_threshold"] > DEFAULT_RELEASE_SIGMA:
        raise ValueError(f"--event-threshold must be above {DEFAULT_RELEASE_SIGMA:g} (the level where an excursion "
                         f"ends), got {args.event_threshold!r}")
    if args.material:
        from ..physics import get_material

        get_material(args.material)  # fail before reading any file
    return options, reader_params, en, area


def _parse_area(text: str) -> float:
    """An area in m^2: a bare number, or a number with a squared length unit ('78.5 um^2', '0.01 mm^2')."""
    stripped = text.strip()
    if stripped.endswith("^2"):
        number, _, unit = stripped[:-2].rpartition(" ") if " " in stripped else ("", "", "")
        if not number:  # '78.5um^2': split the number from the unit
            head = stripped[:-2].rstrip("abcdefghijklmnopqrstuvwxyz\u00b5\u03bcABCDEFGHIJKLMNOPQRSTUVWXYZ")
            number, unit = head, stripped[len(head):-2]
        return parse_quantity(number, "") * parse_quantity(f"1 {unit.strip()}", "m") ** 2
    return parse_quantity(stripped, "")


def run_noise(args: argparse.Namespace, stream: TextIO | None = None) -> int:
    """Handler of ``impactline noise``: analyse every file, write the tables, print a summary."""
    out = stream or sys.stdout
    try:
        options, reader_params, en, area = _options(args)
    except (ValueError, QuantityError, ImpactlineError) as exc:
        print(f"impactline noise: {exc}", file=sys.stderr)
        return EXIT_USAGE
    command = "impactline noise " + " ".join(shlex.quote(a) for a in sys.argv[2:]) if len(sys.argv) > 2 else ""
    try:
        writer = NoiseTableWriter(args.out, overwrite=args.overwrite, metadata={"command": command})
    except (FileExistsError, OSError) as exc:
        print(f"impactline noise: {exc}", file=sys.stderr)
        return EXIT_USAGE
    failed = 0
    reference: NoiseAnalysis | None = None
    try:
        if args.compare:
            reference = _analyse(args.compare, options, reader_params, args.quiet)
            if reference is None:
                writer.abort()
                return EXIT_USAGE
            writer.add(reference)
            print(format_summary(reference, heading="reference"), file=out)
        for path in args.files:
            analysis = _analyse(path, options, reader_params, args.quiet)
            if analysis is None:
                failed += 1
                continue
            writer.add(analysis)
            print(format_summary(analysis), file=out)
            if reference is not None:
                comparison = compare_capacitance(reference.fit, analysis.fit, voltage_noise=en, area_m2=area,
                                                 reference_name=reference.name, cell_name=analysis.name)
                writer.add_comparison(comparison)
                print(format_comparison(comparison), file=out)
        written = writer.close()
    except BaseException:
        writer.abort()
        raise
    if written:
        print(f"wrote {', '.join(p.name for p in written)} to {args.out}", file=out)
    if failed:
        print(f"impactline noise: {failed} of {len(args.files)} recordings failed", file=sys.stderr)
        return EXIT_FILES_FAILED
    return EXIT_OK


def _analyse(path: str, options: dict[str, Any], reader_params: dict[str, Any], quiet: bool) -> NoiseAnalysis | None:
    if not quiet:
        print(f"analysing {path} ...", file=sys.stderr, flush=True)
    try:
        return analyze_noise(path, reader_params=reader_params, **options)
    except (ImpactlineError, ValueError, OSError) as exc:
        print(f"impactline noise: {path}: {exc}", file=sys.stderr)
        return None


def _pm(value: float, error: float, unit: str) -> str:
    if not math.isfinite(value):
        return "n/a"
    text = format_quantity(value, unit)
    if math.isfinite(error):
        text += f" +- {format_quantity(error, unit, 2)}"
    return text


def format_summary(a: NoiseAnalysis, heading: str = "") -> str:
    """Readable summary of one analysis (every number from the data)."""
    s, fit, lim = a.spectrum, a.fit, a.limits
    lines = [f"{heading + ': ' if heading else ''}{a.name}  (reader {a.reader}, "
             f"{format_quantity(s.sample_rate_hz, 'Hz')}, {format_quantity(s.duration_s, 's')})"]
    lines.append(f"  spectrum: Welch, {s.window} window, {s.nperseg}-sample segments "
                 f"({format_quantity(s.segment_s, 's')}, resolution {format_quantity(s.resolution_hz, 'Hz')}), "
                 f"overlap {s.noverlap}, {s.n_segments} segments (~{s.effective_averages:.0f} independent)")
    lines.append(_events_line(a))
    if s.mains_peaks:
        total = math.sqrt(sum(p.line_rms_A ** 2 for p in s.mains_peaks))
        harmonics = ",".join(str(p.harmonic) for p in s.mains_peaks)
        lines.append(f"  mains: {s.mains_hz:g} Hz lines masked (harmonics {harmonics}), together "
                     f"{format_quantity(total, 'A')} rms")
    else:
        lines.append("  mains: no line found")
    total_rms = next((r.brickwall_measured_A for r in a.bandwidth if r.bandwidth_hz == a.nyquist_hz), math.nan)
    lines.append(f"  rms noise to Nyquist ({format_quantity(a.nyquist_hz, 'Hz')}): {format_quantity(total_rms, 'A')}")
    lines.append(f"  fit {format_quantity(fit.f_lo_hz, 'Hz')} - {format_quantity(fit.f_hi_hz, 'Hz')}, "
                 f"{fit.n_points} points, reduced chi2 {fit.reduced_chi2:.3g}:")
    names = {"flicker": ("1/f        A", "A^2"), "white": ("white      B", "A^2/Hz"),
             "dielectric": ("f          C", "A^2/Hz^2"), "capacitive": ("f^2        D", "A^2/Hz^3")}
    for j, term in enumerate(TERM_NAMES):
        if term not in fit.terms:
            continue
        label, unit = names[term]
        flag = "  (at zero)" if fit.at_zero[j] else ""
        lines.append(f"    {label} = {fit.coefficients[j]:.4g} +- {fit.stderr[j]:.2g} {unit}{flag}")
    if fit.reduced_chi2 > 1.0 + 3.0 * math.sqrt(2.0 / max(fit.n_points - len(fit.terms), 1)) and fit.reduced_chi2 > 3.0:
        lines.append("    the model misses structure (reduced chi2 >> 1): if the recording was low-pass filtered, "
                     "give --fit-max well below the filter's corner")
    r, sr = fit.equivalent_resistance()
    lines.append(f"    equivalent resistance 4kT/B: {_pm(r, sr, 'ohm')}")
    corners = fit.corner_frequencies()
    corner_text = ", ".join(f"{k.replace('_', '/')} {_pm(v, e, 'Hz')}" for k, (v, e) in corners.items()
                            if math.isfinite(v))
    if corner_text:
        lines.append(f"    corners: {corner_text}")
    if a.voltage_noise is not None:
        c, sc = a.input_capacitance
        lines.append(f"    input capacitance C_in: {_pm(c, sc, 'F')} "
                     f"(e_n = {format_quantity(a.voltage_noise, 'V')}/sqrt(Hz))")
    else:
        p, sp = fit.voltage_capacitance_product()
        lines.append(f"    e_n*C_in: {p:.4g} +- {sp:.2g} F V/sqrt(Hz) (give --voltage-noise for C_in)")
    lines.append(f"  detection, {lim.order}-pole Bessel at {format_quantity(lim.cutoff_hz, 'Hz')}, "
                 f"{lim.k_sigma:g} sigma:")
    lines.append(f"    rms noise {format_quantity(lim.noise_rms_A, 'A')} (model), "
                 f"{format_quantity(lim.noise_rms_measured_A, 'A')} (measured spectrum)")
    lines.append(f"    smallest peak {format_quantity(lim.min_peak_A, 'A')}; events keep their amplitude from "
                 f"{format_quantity(lim.min_full_amplitude_duration_s, 's')} (2 rise times of "
                 f"{format_quantity(lim.rise_time_s, 's')})")
    size = ""
    if lim.material:
        size = (f" -> {lim.material} particle {format_quantity(lim.min_diameter_m, 'm')}"
                f" (very short events: {format_quantity(lim.min_diameter_impulse_m, 'm')})")
    lines.append(f"    smallest charge {format_quantity(lim.min_charge_C, 'C')} for "
                 f"{format_quantity(lim.event_duration_s, 's')} events, "
                 f"{format_quantity(lim.min_charge_impulse_C, 'C')} for very short ones{size}")
    if lim.optimal is not None:
        o = lim.optimal
        bound = " (at Nyquist: more bandwidth would help)" if o.at_bound else ""
        lines.append(f"    best cutoff for {format_quantity(lim.event_duration_s, 's')} events: "
                     f"{format_quantity(o.cutoff_hz, 'Hz')}{bound}, keeps {o.peak_fraction * 100:.1f} % of the "
                     f"height, rms {format_quantity(o.noise_rms_A, 'A')}, smallest event "
                     f"{format_quantity(o.min_peak_A, 'A')}")
    return "\n".join(lines)


def _events_line(a: NoiseAnalysis) -> str:
    """What was left out for events, in one line (two when the segment was shortened)."""
    s, ev = a.spectrum, a.events
    if ev is None or ev.mode == "keep":
        return "  events: kept in the spectrum (--events keep)"
    text = (f"  events: {ev.n_excursions} excursions beyond {ev.threshold_sigma:g} sigma "
            f"(sigma {format_quantity(ev.sigma_A, 'A')}), {format_quantity(ev.event_time_s, 's')} "
            f"({100 * ev.event_fraction:.2g} % of the time); {s.n_segments_excluded} of {s.n_segments_total} "
            f"segments left out ({100 * s.n_segments_excluded / s.n_segments_total:.0f} %), "
            f"{100 * s.used_samples / s.n_samples:.0f} % of the time used")
    if ev.shortened:
        text += (f"\n    segment shortened from {ev.segment_requested} to {ev.segment_used} samples so that "
                 f"enough segments are free of events ({', '.join(f'{n}: {c}/{t}' for n, t, c in ev.candidates)} "
                 "clean)")
    return text


def format_comparison(c: CapacitanceComparison) -> str:
    """Readable summary of a capacitance comparison."""
    if math.isfinite(c.added_capacitance_F):
        text = f"  added capacitance vs {c.reference}: {_pm(c.added_capacitance_F, c.added_capacitance_stderr_F, 'F')}"
    else:
        text = (f"  added e_n*C vs {c.reference}: {c.added_product:.4g} +- {c.added_product_stderr:.2g} "
                "F V/sqrt(Hz) (give --voltage-noise for the capacitance)")
    if math.isfinite(c.capacitance_per_area_F_per_m2):
        lo, hi = (v * 100 for v in DOUBLE_LAYER_TYPICAL_F_PER_M2)
        text += (f"\n    per area: {c.capacitance_per_area_F_per_m2 * 100:.3g} +- "
                 f"{c.capacitance_per_area_stderr_F_per_m2 * 100:.2g} uF/cm^2 "
                 f"(typical double layer {lo:g}-{hi:g} uF/cm^2, Bard & Faulkner)")
    if c.warning:
        text += f"\n    warning: {c.warning}"
    return text
