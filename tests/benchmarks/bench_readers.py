"""Throughput of the bundled readers against a plain whole-file NumPy/SciPy/h5py read, measured in one run.

Run by hand::

    python3 tests/benchmarks/bench_readers.py --samples 1e7 --text-rows 1e6

or through pytest (smaller sizes): ``python3 -m pytest -m benchmark tests/benchmarks/bench_readers.py -s``.

For each format the same file is read twice: by the reader, chunk by chunk (1 Mi samples, the runner's
default) and converted to amperes; and by the plain library call that loads the whole file at once
(``numpy.fromfile``, ``numpy.load``, ``h5py`` ``ds[:]``, ``scipy.io.wavfile.read``, ``numpy.loadtxt``).
The ratio (reader time / plain time) is what to compare across machines; the plain read holds the whole
file in memory, the reader one chunk.
"""

from __future__ import annotations

import argparse
import json
import sys
import tempfile
import time
from pathlib import Path

import h5py
import numpy as np
import pytest
from impactline_plugins.readers import Hdf5Reader, NumpyReader, RawReader, TextReader, WavReader
from scipy.io import wavfile

FS = 250_000.0
GAIN = 1e-13
CHUNK = 1 << 20


def _best(func, repeats: int = 3) -> float:
    times = []
    for _ in range(repeats):
        start = time.perf_counter()
        func()
        times.append(time.perf_counter() - start)
    return min(times)


def _drain(recording) -> int:
    return sum(chunk.size for chunk in recording.iter_chunks(CHUNK))


def measure(folder: Path, n_samples: int, text_rows: int) -> list[dict]:
    """Write one file per format and time reader against plain read; return one row per format."""
    counts = np.random.default_rng(0).normal(0, 300, n_samples).astype(np.int16)
    current = counts.astype(np.float64) * GAIN
    cases = []

    raw = folder / "ink.bin"
    counts.tofile(raw)
    (folder / "ink.json").write_text(json.dumps({"sample_rate_hz": FS, "gain_A_per_count": GAIN,
                                                 "dtype": "<i2"}))
    cases.append(("raw int16", lambda: _drain(RawReader().open(raw)),
                  lambda: np.fromfile(raw, dtype="<i2").astype(np.float64) * GAIN, n_samples))

    npy = folder / "ink.npy"
    np.save(npy, current)
    cases.append(("npy float64", lambda: _drain(NumpyReader(sample_rate=FS).open(npy)),
                  lambda: np.load(npy) * 1.0, n_samples))

    npz = folder / "ink_packed.npz"
    np.savez_compressed(npz, current=counts, fs=FS, gain_A_per_count=GAIN)
    cases.append(("npz compressed int16", lambda: _drain(NumpyReader().open(npz)),
                  lambda: np.load(npz)["current"].astype(np.float64) * GAIN, n_samples))

    h5 = folder / "ink.h5"
    with h5py.File(h5, "w") as f:
        ds = f.create_dataset("current", data=counts, chunks=(65536,))
        ds.attrs.update({"sample_rate_hz": FS, "gain_A_per_count": GAIN})

    def plain_h5():
        with h5py.File(h5, "r") as f:
            return f["current"][:].astype(np.float64) * GAIN

    cases.append(("hdf5 int16 chunked", lambda: _drain(Hdf5Reader().open(h5)), plain_h5, n_samples))

    wav = folder / "ink_audio.wav"
    wavfile.write(wav, int(FS), counts)
    cases.append(("wav int16", lambda: _drain(WavReader(gain=GAIN).open(wav)),
                  lambda: wavfile.read(wav)[1].astype(np.float64) * GAIN, n_samples))

    csv = folder / "ink_text.csv"
    rows = min(text_rows, n_samples)
    np.savetxt(csv, np.column_stack([np.arange(rows) / FS, counts[:rows] * 0.1]), delimiter=",",
               fmt=["%.9f", "%.1f"], header="time_s,current_pA", comments="")
    cases.append(("text csv (time checked)", lambda: _drain(TextReader().open(csv)),
                  lambda: np.loadtxt(csv, delimiter=",", skiprows=1)[:, 1] * 1e-12, rows))

    results = []
    for name, ours, plain, n in cases:
        t_ours = _best(ours)
        t_plain = _best(plain)
        results.append({"format": name, "samples": n, "reader_s": t_ours, "plain_s": t_plain,
                         "reader_samples_per_s": n / t_ours, "ratio": t_ours / t_plain})
    return results


def report(results: list[dict]) -> str:
    lines = [f"{'format':26s} {'samples':>10s} {'reader s':>9s} {'plain s':>9s} {'reader Msamp/s':>15s} "
             f"{'ratio':>6s}"]
    for r in results:
        lines.append(f"{r['format']:26s} {r['samples']:10d} {r['reader_s']:9.3f} {r['plain_s']:9.3f} "
                     f"{r['reader_samples_per_s'] / 1e6:15.1f} {r['ratio']:6.2f}")
    return "\n".join(lines)


@pytest.mark.benchmark
def test_reader_throughput(tmp_path):
    results = measure(tmp_path, 2_000_000, 200_000)
    print("\n" + report(results))
    assert all(r["reader_s"] > 0 for r in results)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--samples", type=float, default=1e7, help="samples per binary file")
    parser.add_argument("--text-rows", type=float, default=1e6, help="rows of the CSV file")
    args = parser.parse_args(argv)
    with tempfile.TemporaryDirectory() as folder:
        print(report(measure(Path(folder), int(args.samples), int(args.text_rows))))
    return 0


if __name__ == "__main__":
    sys.exit(main())
