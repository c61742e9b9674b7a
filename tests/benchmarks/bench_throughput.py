"""Throughput and memory of the streaming runner against plain numpy/scipy scripts, measured in one run.

Run by hand (figures go in the issue note)::

    python3 tests/benchmarks/bench_throughput.py --samples 1e8 --memory-max-exp 28

or through pytest (smaller sizes): ``python3 -m pytest -m benchmark tests/benchmarks/bench_throughput.py -s``.

What is compared, on the same int16 recording with a JSON sidecar:

* ours: ``impactline run pipelines/default.toml`` (through the Python API, one process);
* plain: a whole-file numpy/scipy script doing the same job (zero-phase Bessel with ``sosfiltfilt``,
  median/MAD threshold, runs above threshold as events, ``find_peaks`` for the peaks, per-event
  integration);
* bare: a chunked read plus one causal Bessel pass (``sosfilt`` with carried state), the least work any
  tool must do on the file;
* bare zero-phase: a chunked read plus the zero-phase Bessel the default pipeline applies (forward pass
  with carried state, backward pass over each chunk and the margin after it), the least work for this
  pipeline's filtering.

``ours`` is timed twice on the same file: the first call includes the one-time start-up of a process
(imports, plugin discovery), reported separately as ``startup_s``; the second is the steady cost. A run of one
file reads and filters the next chunk in a second thread while the detector works (``read_ahead``), so its
wall time uses a second core; its CPU time (``ours_cpu_s``) is reported beside it.

Peak resident memory is measured in a fresh process per file size (``ru_maxrss``).
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pytest
from scipy import signal

ROOT = Path(__file__).resolve().parents[2]
FS = 250e3
GAIN = 1e-13  # A per count
CUTOFF = 15e3  # keep in step with pipelines/default.toml
ORDER = 4


def write_recording(path: Path, n_samples: int, seed: int = 0, block: int = 1 << 22) -> None:
    """Gaussian noise (~1 pA rms) plus exponential spikes at Poisson times (~20 per s), as int16 + sidecar."""
    rng = np.random.default_rng(seed)
    with open(path, "wb") as handle:
        for start in range(0, n_samples, block):
            n = min(block, n_samples - start)
            x = 10.0 * rng.standard_normal(n)
            n_spikes = rng.poisson(20 * n / FS)
            for s in rng.integers(0, max(n - 400, 1), n_spikes):
                x[s:s + 400] += 150.0 * np.exp(-np.arange(min(400, n - s)) / 60.0)
            np.clip(np.round(x), -32768, 32767).astype("<i2").tofile(handle)
    path.with_suffix(".json").write_text(json.dumps({"sample_rate_hz": FS, "dtype": "<i2", "gain_A_per_count": GAIN}))


def plain_script(path: Path, k_sigma: float = 5.0) -> int:
    """The whole-file script a user would write with numpy/scipy."""
    x = np.fromfile(path, dtype="<i2").astype(np.float64) * GAIN
    sos = signal.bessel(ORDER, CUTOFF, fs=FS, output="sos", norm="mag")
    y = signal.sosfiltfilt(sos, x)
    baseline = np.median(y)
    sigma = 1.4826 * np.median(np.abs(y - baseline))
    excursion = y - baseline
    above = np.concatenate([[False], excursion > k_sigma * sigma, [False]])
    edges = np.flatnonzero(np.diff(above.astype(np.int8)))
    starts, ends = edges[::2], edges[1::2]
    peaks, _ = signal.find_peaks(excursion, height=k_sigma * sigma)
    cumulative = np.concatenate([[0.0], np.cumsum(excursion)])
    charges = (cumulative[ends] - cumulative[starts]) / FS
    return int(min(len(charges), len(peaks)))


def bare_read_and_filter(path: Path, chunk: int = 1 << 20) -> None:
    """Chunked read plus one causal Bessel pass: a floor for any tool's cost."""
    counts = np.memmap(path, dtype="<i2", mode="r")
    sos = signal.bessel(ORDER, CUTOFF, fs=FS, output="sos", norm="mag")
    zi = np.zeros((sos.shape[0], 2))
    for start in range(0, counts.size, chunk):
        _, zi = signal.sosfilt(sos, counts[start:start + chunk] * GAIN, zi=zi)


def bare_read_and_zero_phase(path: Path, chunk: int = 1 << 20) -> None:
    """Chunked read plus a zero-phase Bessel pass: forward with carried state, backward per chunk.

    The backward pass of each chunk starts ``margin`` samples later, on forward output of the next chunk,
    so its start-up transient has decayed: the same scheme any streaming zero-phase filter needs.
    """
    counts = np.memmap(path, dtype="<i2", mode="r")
    sos = signal.bessel(ORDER, CUTOFF, fs=FS, output="sos", norm="mag")
    margin = int(5 * FS / CUTOFF)  # the impulse response is below 1e-12 of its peak after this (checked numerically)
    zi = np.zeros((sos.shape[0], 2))
    held = np.empty(0)
    for start in range(0, counts.size, chunk):
        forward, zi = signal.sosfilt(sos, counts[start:start + chunk] * GAIN, zi=zi)
        pending = np.concatenate([held, forward])
        ready = max(pending.size - margin, 0) if start + chunk < counts.size else pending.size
        signal.sosfilt(sos, pending[::-1])[::-1][:ready]
        held = pending[ready:]


def ours(path: Path, out: Path) -> int:
    from impactline.pipeline import load_pipeline
    from impactline.runner import run

    result = run(load_pipeline(ROOT / "pipelines" / "default.toml"), [path], out, overwrite=True, resume=False)
    assert not result.failed, result.files.to_pylist()
    return result.events.num_rows


def timed(function, *args) -> tuple[float, object]:
    started = time.perf_counter()
    value = function(*args)
    return time.perf_counter() - started, value


# VmHWM (this process's own peak resident set), not ru_maxrss: Linux carries ru_maxrss over from the parent
# at fork and keeps it across exec, so a child of a big parent would report the parent's peak.
_RSS_SCRIPT = """
import sys
from impactline.pipeline import load_pipeline
from impactline.runner import run
run(load_pipeline(sys.argv[1]), [sys.argv[2]], sys.argv[3], overwrite=True, resume=False)
status = open("/proc/self/status").read().split("VmHWM:")[1]
print(int(status.split()[0]))
"""


def peak_rss_mb(path: Path, out: Path) -> float:
    """Peak resident memory (MB) of a fresh process running the default pipeline on ``path``."""
    done = subprocess.run([sys.executable, "-c", _RSS_SCRIPT, str(ROOT / "pipelines" / "default.toml"), str(path),
                           str(out)], capture_output=True, text=True, check=True)
    return int(done.stdout.strip().splitlines()[-1]) / 1024.0


def measure(n_samples: int, memory_exps: list[int], workdir: Path) -> dict:
    path = workdir / "throughput.bin"
    write_recording(path, n_samples)
    t_bare, _ = timed(bare_read_and_filter, path)
    t_bare_zero, _ = timed(bare_read_and_zero_phase, path)
    t_plain, n_plain = timed(plain_script, path)
    t_first, n_ours = timed(ours, path, workdir / "run")
    cpu = time.process_time()
    t_ours, n_ours = timed(ours, path, workdir / "run")
    cpu_ours = time.process_time() - cpu
    cpu = time.process_time()
    bare_read_and_zero_phase(path)
    cpu_bare_zero = time.process_time() - cpu
    report = {
        "samples": n_samples,
        "ours_s": t_ours, "ours_first_call_s": t_first, "startup_s": t_first - t_ours,
        "plain_s": t_plain, "bare_s": t_bare, "bare_zero_phase_s": t_bare_zero,
        "ours_samples_per_s": n_samples / t_ours,
        "speedup_vs_plain": t_plain / t_ours,
        "speedup_vs_plain_first_call": t_plain / t_first,
        "fraction_of_bare_speed": t_bare / t_ours,
        "fraction_of_bare_zero_phase_speed": t_bare_zero / t_ours,
        # A run of one file reads and filters ahead in a second thread: CPU time shows the work, wall the wait.
        "ours_cpu_s": cpu_ours, "bare_zero_phase_cpu_s": cpu_bare_zero,
        "fraction_of_bare_zero_phase_cpu": cpu_bare_zero / cpu_ours,
        "events_ours": n_ours, "events_plain": n_plain,
        "peak_rss_mb": {},
    }
    path.unlink()
    for exp in memory_exps:
        file = workdir / f"mem{exp}.bin"
        write_recording(file, 1 << exp, seed=exp)
        report["peak_rss_mb"][f"2^{exp}"] = peak_rss_mb(file, workdir / f"run{exp}")
        file.unlink()
    return report


@pytest.mark.benchmark
def test_throughput_and_memory(tmp_path):
    report = measure(20_000_000, [22, 24], tmp_path)
    print(json.dumps(report, indent=2))
    sizes = list(report["peak_rss_mb"].values())
    assert sizes[-1] < 1.3 * sizes[0] + 50, "memory should stay flat as the file grows"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--samples", type=float, default=1e8)
    parser.add_argument("--memory-max-exp", type=int, default=28, help="largest file is 2^N samples")
    parser.add_argument("--workdir", default=None)
    args = parser.parse_args()
    exps = list(range(args.memory_max_exp - 2, args.memory_max_exp + 1))
    with tempfile.TemporaryDirectory(dir=args.workdir) as workdir:
        print(json.dumps(measure(int(args.samples), exps, Path(workdir)), indent=2))


if __name__ == "__main__":
    main()
