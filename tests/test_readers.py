"""Bundled readers: round trips through the writers of NumPy, SciPy and h5py, chunking, sidecar precedence,
content sniffing, and every kind of bad input the readers promise to explain.

Files are written with general-purpose writers (numpy.tofile/save/savez, numpy.savetxt, scipy.io.wavfile,
h5py) and read back; values must come back bit for bit and the sample rate exactly. The scenario is our
own: a copper nanoparticle ink batch check recorded at 250 kHz.
"""

from __future__ import annotations

import json
import struct
import tracemalloc
import wave
from collections.abc import Callable
from pathlib import Path

import h5py
import numpy as np
import pytest
from impactline import InputError, ParameterError, hookimpl
from impactline.registry import PluginRegistry, check_stage_class
from impactline_plugins.readers import STAGES, Hdf5Reader, NumpyReader, RawReader, TextReader, WavReader
from impactline_plugins.readers.text import split_unit
from scipy.io import wavfile

FS = 250_000.0
N = 3000
CHUNKS = (1, 7, 1000, N, N + 5)


def _counts(n: int = N, dtype=np.int16, seed: int = 0) -> np.ndarray:
    """Amplifier counts: a baseline with noise and a few anodic spikes, like a collision trace."""
    rng = np.random.default_rng(seed)
    x = rng.normal(200.0, 40.0, n)
    x[rng.integers(0, n, 8)] += 3000.0
    info = np.iinfo(dtype) if np.dtype(dtype).kind in "iu" else None
    return np.clip(np.round(x), info.min, info.max).astype(dtype) if info else x.astype(dtype)


def _amperes(n: int = N, seed: int = 1) -> np.ndarray:
    rng = np.random.default_rng(seed)
    return rng.normal(50e-12, 4e-12, n)


def _read(recording, chunk: int | None = None) -> np.ndarray:
    size = chunk or max(recording.n_samples or 0, 1 << 20)
    return np.concatenate(list(recording.iter_chunks(size)))


def _sidecar(path: Path, **settings) -> Path:
    side = path.with_suffix(".json")
    side.write_text(json.dumps(settings))
    return side


def _scaled(counts: np.ndarray, gain: float, offset: float = 0.0, zero: float = 0.0) -> np.ndarray:
    x = counts.astype(np.float64)
    if zero:
        x -= zero
    x *= gain
    if offset:
        x += offset
    return x


# ---------------------------------------------------------------------------------------------- writers
# Each case writes a file with an outside writer and returns (reader class, params, path, expected A).
def raw_int16_sidecar(d: Path):
    counts = _counts()
    path = d / "batch07.bin"
    counts.astype("<i2").tofile(path)
    _sidecar(path, sample_rate_hz=250000, gain_A_per_count=3.05e-13, offset_A=-2e-12, dtype="<i2")
    return RawReader, {}, path, _scaled(counts, 3.05e-13, -2e-12)


def raw_float32_big_params(d: Path):
    current = _amperes().astype(np.float32)
    path = d / "batch07.raw"
    current.astype(">f4").tofile(path)
    params = {"dtype": "float32", "byte_order": "big", "sample_rate": "250 kHz"}
    return RawReader, params, path, current.astype(np.float64)


def raw_int32_interleaved_header(d: Path):
    frames = np.stack([_counts(dtype=np.int32, seed=s) for s in range(3)], axis=1)
    path = d / "three_channels.bin"
    with open(path, "wb") as handle:
        handle.write(bytes(range(256)) * 2)  # 512-byte instrument header
        handle.write(frames.astype(">i4").tobytes())
    _sidecar(path, dtype=">i4", header_bytes=512, n_channels=3, channel=1, sample_rate_hz=FS)
    return RawReader, {"gain": "0.5 pA"}, path, _scaled(frames[:, 1], 0.5e-12)


def raw_float64_dat(d: Path):
    current = _amperes()
    path = d / "dump.dat"
    current.tofile(path)
    _sidecar(path, dtype="float64", sample_rate_hz=FS)
    return RawReader, {}, path, current


def text_csv_units(d: Path):
    values = np.round(_amperes() * 1e12, 6)
    path = d / "batch07.csv"
    with open(path, "w") as handle:
        handle.write("# copper ink batch 07, carbon microdisc, +0.4 V\ntime_s,current_pA\n")
        for i, v in enumerate(values.tolist()):
            handle.write(f"{i / FS:.9f},{v!r}\n")
    return TextReader, {}, path, values * 1e-12


def text_tsv_no_header(d: Path):
    current = _amperes()
    path = d / "batch07.tsv"
    np.savetxt(path, np.column_stack([np.arange(N) / FS, current]), delimiter="\t")
    return TextReader, {}, path, current


def text_semicolon_decimal_comma(d: Path):
    values = np.round(_amperes() * 1e9, 5)
    path = d / "export.txt"
    lines = ["t (ms);I (nA)"] + [
        f"{i / FS * 1e3:.4f};{v:.5f}".replace(".", ",") for i, v in enumerate(values)
    ]
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return TextReader, {}, path, np.array([float(f"{v:.5f}") for v in values]) * 1e-9


def text_single_column_declared_rate(d: Path):
    current = _amperes()
    path = d / "single.txt"
    with open(path, "w") as handle:
        handle.write("# sample rate: 250 kHz\n# current in A\n\n")
        for i, v in enumerate(current.tolist()):
            handle.write(f"{v!r}   # first\n" if i == 0 else f"{v!r}\n")
            if i == 10:
                handle.write("\n# a note in the middle\n")
    return TextReader, {}, path, current


def text_quoted_three_columns(d: Path):
    current = _amperes()
    path = d / "three.csv"
    with open(path, "w") as handle:
        handle.write('"Time (s)","Voltage (V)","Current (A)"\n')
        for i, v in enumerate(current.tolist()):
            handle.write(f"{i / FS!r},0.4,{v!r}\n")
    return TextReader, {}, path, current


def npy_float64_sidecar(d: Path):
    current = _amperes()
    path = d / "batch07.npy"
    np.save(path, current)
    _sidecar(path, sample_rate_hz=FS)
    return NumpyReader, {}, path, current


def npy_int16_two_channels(d: Path):
    counts = np.stack([_counts(seed=3), _counts(seed=4)], axis=1)
    path = d / "two.npy"
    np.save(path, counts)
    return (
        NumpyReader,
        {"channel": 1, "gain": "0.305 pA", "sample_rate": FS},
        path,
        _scaled(counts[:, 1], 0.305e-12),
    )


def npz_stored_with_rate(d: Path):
    current = _amperes()
    path = d / "batch07.npz"
    np.savez(path, current=current, sample_rate_hz=FS, voltage=np.full(N, 0.4))
    return NumpyReader, {}, path, current


def npz_compressed_counts(d: Path):
    counts = _counts(dtype=np.int32)
    path = d / "packed.npz"
    np.savez_compressed(path, counts=counts, fs=FS, gain_A_per_count=1e-13, offset_A=5e-12)
    return NumpyReader, {}, path, _scaled(counts, 1e-13, 5e-12)


def npz_compressed_fortran(d: Path):
    trace = np.asfortranarray(np.stack([_amperes(seed=5), _amperes(seed=6)], axis=1).astype(np.float32))
    path = d / "fortran.npz"
    np.savez_compressed(path, trace=trace, other=np.arange(5))
    return (
        NumpyReader,
        {"array": "trace", "channel": 1, "sample_rate": FS},
        path,
        trace[:, 1].astype(np.float64),
    )


def npz_stored_fortran_big_endian(d: Path):
    trace = np.asfortranarray(np.stack([_amperes(seed=7), _amperes(seed=8)], axis=1).astype(">f8"))
    path = d / "fortran_stored.npz"
    np.savez(path, current=trace, sample_rate_hz=np.array([FS]))
    return NumpyReader, {"channel": 0}, path, trace[:, 0].astype(np.float64)


def hdf5_float_attrs(d: Path):
    current = _amperes()
    path = d / "batch07.h5"
    with h5py.File(path, "w") as f:
        f.create_dataset("current", data=current).attrs["sample_rate_hz"] = FS
    return Hdf5Reader, {}, path, current


def hdf5_packed_counts_in_group(d: Path):
    counts = _counts()
    path = d / "packed.hdf5"
    with h5py.File(path, "w") as f:
        run = f.create_group("run1")
        run.attrs["sampling_rate"] = "250 kHz"
        adc = run.create_dataset("adc", data=counts)
        # CF conventions, section 8.1 "Packed data": value = stored * scale_factor + add_offset.
        adc.attrs.update({"scale_factor": 0.25, "add_offset": -3.0, "units": "pA"})
        run.create_dataset("voltage", data=np.full(N, 0.4))
    expected = (counts.astype(np.float64) * (0.25 * 1e-12)) + (-3.0 * 1e-12)
    return Hdf5Reader, {"dataset": "/run1/adc"}, path, expected


def hdf5_chunked_two_channels(d: Path):
    data = np.stack([_amperes(seed=9), _amperes(seed=10)], axis=1)
    path = d / "chunked.h5"
    with h5py.File(path, "w") as f:
        f.attrs["dt"] = 1 / FS
        f.create_dataset("trace", data=data, chunks=(256, 2), compression="gzip")
    return Hdf5Reader, {"dataset": "trace", "channel": 0}, path, data[:, 0]


def wav_int16_sidecar_gain(d: Path):
    counts = _counts()
    path = d / "batch07.wav"
    wavfile.write(path, 250000, counts)
    _sidecar(path, gain_A_per_count=3.05e-13)
    return WavReader, {}, path, _scaled(counts, 3.05e-13)


def wav_float32_stereo(d: Path):
    data = np.stack([_amperes(seed=11), _amperes(seed=12)], axis=1).astype(np.float32)
    path = d / "stereo.wav"
    wavfile.write(path, 250000, data)
    return WavReader, {"channel": 1}, path, data[:, 1].astype(np.float64)


def wav_int32_param_gain(d: Path):
    counts = _counts(dtype=np.int32)
    path = d / "deep.wav"
    wavfile.write(path, 250000, counts)
    return WavReader, {"gain": "10 fA", "offset": "1 pA"}, path, _scaled(counts, 1e-14, 1e-12)


def wav_uint8(d: Path):
    codes = np.clip(_counts(dtype=np.int16) // 40 + 100, 0, 255).astype(np.uint8)
    path = d / "eight.wav"
    wavfile.write(path, 250000, codes)
    # 8-bit PCM is unsigned with zero at 128 (WAVE PCM format, IBM & Microsoft 1991; from memory).
    return WavReader, {"gain": "1 pA"}, path, _scaled(codes, 1e-12, zero=128.0)


CASES: list[Callable] = [
    raw_int16_sidecar,
    raw_float32_big_params,
    raw_int32_interleaved_header,
    raw_float64_dat,
    text_csv_units,
    text_tsv_no_header,
    text_semicolon_decimal_comma,
    text_single_column_declared_rate,
    text_quoted_three_columns,
    npy_float64_sidecar,
    npy_int16_two_channels,
    npz_stored_with_rate,
    npz_compressed_counts,
    npz_compressed_fortran,
    npz_stored_fortran_big_endian,
    hdf5_float_attrs,
    hdf5_packed_counts_in_group,
    hdf5_chunked_two_channels,
    wav_int16_sidecar_gain,
    wav_float32_stereo,
    wav_int32_param_gain,
    wav_uint8,
]


@pytest.mark.parametrize("case", CASES, ids=lambda c: c.__name__)
def test_round_trip_exact(case, tmp_path):
    cls, params, path, expected = case(tmp_path)
    recording = cls(**params).open(path)
    assert recording.sample_rate_hz == FS
    assert recording.n_samples in (None, len(expected))
    if cls is not TextReader:
        assert recording.n_samples == len(expected)
    got = _read(recording)
    assert got.dtype == np.float64 and got.ndim == 1
    np.testing.assert_array_equal(got, expected)
    json.dumps(recording.metadata)  # must be JSON-serialisable
    side = path.with_suffix(".json")
    assert recording.extra_files == ([side] if side.exists() else [])


@pytest.mark.parametrize("case", CASES, ids=lambda c: c.__name__)
def test_chunked_equals_whole(case, tmp_path):
    cls, params, path, _ = case(tmp_path)
    recording = cls(**params).open(path)
    whole = _read(recording)
    for chunk in CHUNKS:
        pieces = list(recording.iter_chunks(chunk))
        assert all(p.dtype == np.float64 and p.ndim == 1 and 0 < p.size <= chunk for p in pieces)
        assert all(p.size == chunk for p in pieces[:-1])  # only the last chunk may be short
        np.testing.assert_array_equal(np.concatenate(pieces), whole)


def test_chunk_size_must_be_positive(tmp_path):
    _, params, path, _ = raw_int16_sidecar(tmp_path)
    recording = RawReader(**params).open(path)
    with pytest.raises(ValueError, match="positive integer"):
        next(recording.iter_chunks(0))


# ---------------------------------------------------------------------------------------------- registration
class _ReadersPlugin:
    @hookimpl
    def impactline_stages(self):
        return STAGES


def _registry() -> PluginRegistry:
    registry = PluginRegistry(autoload=False)
    registry.register(_ReadersPlugin(), "readers-under-test")
    return registry


def test_every_reader_fits_the_contract():
    assert {cls.name for cls in STAGES} == {"raw", "text", "numpy", "hdf5", "wav"}
    for cls in STAGES:
        assert check_stage_class(cls) == [], cls
        assert all(ext.startswith(".") and ext == ext.lower() for ext in cls.extensions)
        for key in ("sample_rate", "gain", "offset"):
            assert key in cls.params
    assert [e.name for e in _registry().stages("reader")] == ["hdf5", "numpy", "raw", "text", "wav"]


# ---------------------------------------------------------------------------------------------- sniffing
def _head(path: Path) -> bytes:
    return path.read_bytes()[:4096]


def test_each_sniff_recognises_only_its_own_content(tmp_path):
    samples = {
        "raw": raw_int16_sidecar(tmp_path)[2],
        "text": text_csv_units(tmp_path)[2],
        "numpy": npy_float64_sidecar(tmp_path)[2],
        "npz": npz_compressed_counts(tmp_path)[2],
        "hdf5": hdf5_float_attrs(tmp_path)[2],
        "wav": wav_int16_sidecar_gain(tmp_path)[2],
    }
    for cls in STAGES:
        for kind, path in samples.items():
            expected = cls.name == kind or (cls.name == "numpy" and kind == "npz")
            assert cls.sniff(path, _head(path)) is expected, (cls.name, kind)


def test_sniffing_picks_the_reader_for_an_ambiguous_extension(tmp_path):
    from impactline.pipeline import choose_reader

    registry = _registry()
    text = tmp_path / "text.dat"
    np.savetxt(text, np.column_stack([np.arange(100) / FS, _amperes(100)]))
    binary = tmp_path / "binary.dat"
    _counts(100).tofile(binary)
    assert choose_reader(registry, text) == "text"
    assert choose_reader(registry, binary) == "raw"
    # No extension match at all: content alone decides.
    mystery = tmp_path / "acquisition.xyz"
    with h5py.File(mystery, "w") as f:
        f["current"] = _amperes(100)
    assert choose_reader(registry, mystery) == "hdf5"
    npz = tmp_path / "arrays.data"
    with open(npz, "wb") as handle:  # a file name would get ".npz" appended
        np.savez(handle, current=_amperes(100))
    assert choose_reader(registry, npz) == "numpy"


def test_hdf5_signature_after_user_block(tmp_path):
    path = tmp_path / "userblock.h5"
    with h5py.File(path, "w", userblock_size=512) as f:
        f.create_dataset("current", data=_amperes(100)).attrs["fs"] = FS
    assert Hdf5Reader.sniff(path, _head(path))
    np.testing.assert_array_equal(_read(Hdf5Reader().open(path)), _amperes(100))


def test_text_sniff_accepts_header_and_rejects_prose(tmp_path):
    assert TextReader.sniff(tmp_path, b"# note\ntime,current\n0,1\n1e-6,2\n")
    assert TextReader.sniff(tmp_path, b"0,25;1,5\n0,5;1,25\n")
    assert not TextReader.sniff(tmp_path, b"Dear colleague,\nthe ink batch is late.\n")
    assert not TextReader.sniff(tmp_path, b"")


def test_split_unit_reads_what_labs_write():
    assert split_unit("current_pA", "A") == ("current", 1e-12)
    assert split_unit("I (nA)", "A") == ("i", 1e-9)
    assert split_unit("I [uA]", "A") == ("i", 1e-6)
    assert split_unit("I/fA", "A") == ("i", 1e-15)
    assert split_unit("Current (A)", "A") == ("current", 1.0)
    assert split_unit("time_ms", "s") == ("time", 1e-3)
    assert split_unit("t (\u00b5s)", "s") == ("t", 1e-6)
    assert split_unit("current_pA", "s") == ("current_pa", None)
    assert split_unit("voltage", "A") == ("voltage", None)


# ---------------------------------------------------------------------------------------------- precedence
def test_sample_rate_precedence_pipeline_sidecar_header(tmp_path):
    path = tmp_path / "ink.wav"
    wavfile.write(path, 100000, np.zeros(10, dtype=np.float32))
    header = WavReader().open(path)
    assert header.sample_rate_hz == 100000 and header.metadata["sources"]["sample_rate_hz"] == "file"
    _sidecar(path, sample_rate_hz=200000)
    side = WavReader().open(path)
    assert side.sample_rate_hz == 200000 and side.metadata["sources"]["sample_rate_hz"] == "sidecar"
    pipe = WavReader(sample_rate="250 kHz").open(path)
    assert pipe.sample_rate_hz == 250000 and pipe.metadata["sources"]["sample_rate_hz"] == "pipeline"


def test_gain_and_offset_precedence_hdf5(tmp_path):
    counts = _counts(50)
    path = tmp_path / "gain.h5"
    with h5py.File(path, "w") as f:
        ds = f.create_dataset("adc", data=counts)
        ds.attrs.update({"gain_A_per_count": 1e-12, "offset_A": 1e-12, "sample_rate_hz": FS})
    np.testing.assert_array_equal(_read(Hdf5Reader().open(path)), _scaled(counts, 1e-12, 1e-12))
    _sidecar(path, gain_A_per_count=2e-12)
    got = Hdf5Reader().open(path)
    np.testing.assert_array_equal(_read(got), _scaled(counts, 2e-12, 1e-12))
    sources = got.metadata["sources"]
    assert (sources["sample_rate_hz"], sources["gain_A_per_count"], sources["offset_A"]) == (
        "file",
        "sidecar",
        "file",
    )
    got = Hdf5Reader(gain="3 pA", offset=0).open(path)
    np.testing.assert_array_equal(_read(got), _scaled(counts, 3e-12))
    assert got.metadata["sources"]["gain_A_per_count"] == "pipeline"


def test_raw_layout_precedence(tmp_path):
    counts = _counts(64)
    path = tmp_path / "order.bin"
    counts.astype(">i2").tofile(path)
    _sidecar(path, dtype=">i2", sample_rate_hz=FS, gain_A_per_count=1e-12)
    got = RawReader().open(path)
    assert (
        got.metadata["settings"]["byte_order"] == "big" and got.metadata["sources"]["byte_order"] == "sidecar"
    )
    np.testing.assert_array_equal(_read(got), _scaled(counts, 1e-12))
    # The pipeline's byte order wins (reading the big-endian bytes as little-endian swaps them).
    swapped = _read(RawReader(byte_order="little").open(path))
    np.testing.assert_array_equal(swapped, _scaled(counts.byteswap(), 1e-12))
    # The pipeline's dtype wins over the sidecar's: 64 int16 read as 32 int32.
    assert RawReader(dtype="int32").open(path).n_samples == 32


def test_text_time_column_only_used_without_an_explicit_rate(tmp_path):
    path = tmp_path / "jitter.csv"
    times = np.arange(20) / FS
    times[10] = times[9]  # a duplicated time stamp
    np.savetxt(
        path, np.column_stack([times, np.arange(20.0)]), delimiter=",", header="time_s,current_A", comments=""
    )
    with pytest.raises(InputError, match="line 12") as info:
        _read(TextReader().open(path))
    assert info.value.sample_index == 10 and "not uniformly sampled" in str(info.value)
    _sidecar(path, sample_rate_hz=FS)
    assert TextReader().open(path).metadata["time_checked"] is False
    np.testing.assert_array_equal(_read(TextReader().open(path)), np.arange(20.0))
    assert TextReader(sample_rate="100 kHz").open(path).sample_rate_hz == 100000


def test_text_current_unit_sidecar_header_precedence(tmp_path):
    path = tmp_path / "units.csv"
    path.write_text("time_s,current_pA\n0,1.5\n0.000004,2.5\n")
    np.testing.assert_array_equal(_read(TextReader().open(path)), np.array([1.5, 2.5]) * 1e-12)
    _sidecar(path, gain_A_per_count=1e-9)
    np.testing.assert_array_equal(_read(TextReader().open(path)), np.array([1.5, 2.5]) * 1e-9)
    np.testing.assert_array_equal(
        _read(TextReader(current_unit="fA").open(path)), np.array([1.5, 2.5]) * 1e-15
    )
    np.testing.assert_array_equal(_read(TextReader(gain="2 pA").open(path)), [3e-12, 5e-12])
    with pytest.raises(ParameterError, match="not both"):
        TextReader(gain="1 pA", current_unit="pA")


def test_text_columns_by_name_and_index(tmp_path):
    path = tmp_path / "cols.csv"
    path.write_text("t,ch_a,ch_b\n0,1,10\n0.000004,2,20\n0.000008,3,30\n")
    with pytest.raises(InputError, match="cannot tell which column") as info:
        TextReader().open(path)
    assert "'ch_a'" in str(info.value) and info.value.key == "current_column"
    np.testing.assert_array_equal(_read(TextReader(current_column="ch_b").open(path)), [10, 20, 30])
    np.testing.assert_array_equal(_read(TextReader(current_column=1).open(path)), [1, 2, 3])
    assert TextReader(current_column="CH_B").open(path).sample_rate_hz == FS
    # Explicit delimiter and time unit: the same steps read as milliseconds are 1000x shorter.
    reader = TextReader(current_column="ch_a", delimiter="comma", time_unit="ms")
    assert reader.open(path).sample_rate_hz == 250e6
    with pytest.raises(InputError, match="the names are 't,ch_a,ch_b'"):  # a wrong delimiter shows
        TextReader(delimiter="semicolon", current_column="ch_a").open(path)
    with pytest.raises(InputError, match="'ch_c' is not a column name; the names are 't', 'ch_a', 'ch_b'"):
        TextReader(current_column="ch_c").open(path)
    with pytest.raises(InputError, match="rows have 3 columns"):
        TextReader(current_column=5).open(path)


# ------------------------------------------------------------------------------------------ bounded memory
def _peak_bytes(recording, chunk: int) -> int:
    tracemalloc.start()
    try:
        total = sum(p.size for p in recording.iter_chunks(chunk))
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert total > 0
    return peak


@pytest.mark.parametrize("fmt", ["raw", "npz_compressed", "hdf5", "wav"])
def test_binary_readers_hold_one_chunk_not_the_file(fmt, tmp_path):
    n = 400_000  # 3.2 MB as float64
    data = np.random.default_rng(2).normal(0, 1e-12, n)
    if fmt == "raw":
        path = tmp_path / "big.bin"
        data.tofile(path)
        recording = RawReader(dtype="float64", sample_rate=FS).open(path)
    elif fmt == "npz_compressed":
        path = tmp_path / "big.npz"
        np.savez_compressed(path, current=data, fs=FS)
        recording = NumpyReader().open(path)
    elif fmt == "hdf5":
        path = tmp_path / "big.h5"
        with h5py.File(path, "w") as f:
            f.create_dataset("current", data=data, chunks=(16384,)).attrs["fs"] = FS
        recording = Hdf5Reader().open(path)
    else:
        path = tmp_path / "big.wav"
        wavfile.write(path, 250000, data.astype(np.float32))
        recording = WavReader().open(path)
    assert _peak_bytes(recording, 16384) < 1_000_000  # the whole signal would be 3.2 MB as float64


def test_text_reader_streams(tmp_path):
    path = tmp_path / "long.csv"
    n = 40_000
    np.savetxt(path, np.column_stack([np.arange(n) / FS, np.zeros(n)]), delimiter=",", fmt="%.9f")
    recording = TextReader().open(path)
    assert recording.n_samples is None
    # Held as Python rows the whole file would take about 14 MB (some 360 bytes a row).
    assert _peak_bytes(recording, 2000) < 1_000_000


# ---------------------------------------------------------------------------------------------- bad input
def _readers_with_params():
    return [
        (RawReader, {"dtype": "int16", "gain": 1e-12, "sample_rate": FS}, ".bin"),
        (TextReader, {"sample_rate": FS}, ".csv"),
        (NumpyReader, {"sample_rate": FS}, ".npy"),
        (Hdf5Reader, {"sample_rate": FS}, ".h5"),
        (WavReader, {}, ".wav"),
    ]


@pytest.mark.parametrize("cls,params,ext", _readers_with_params(), ids=lambda v: getattr(v, "name", ""))
def test_empty_missing_and_folder(cls, params, ext, tmp_path):
    empty = tmp_path / f"empty{ext}"
    empty.write_bytes(b"")
    with pytest.raises(InputError, match="empty") as info:
        cls(**params).open(empty)
    assert info.value.path == empty
    with pytest.raises(InputError, match="not found"):
        cls(**params).open(tmp_path / f"absent{ext}")
    folder = tmp_path / f"folder{ext}"
    folder.mkdir()
    with pytest.raises(InputError, match="folder"):
        cls(**params).open(folder)


def test_well_formed_files_without_samples(tmp_path):
    wav = tmp_path / "none.wav"
    wavfile.write(wav, 250000, np.zeros(0, dtype=np.int16))
    npy = tmp_path / "none.npy"
    np.save(npy, np.zeros(0))
    h5 = tmp_path / "none.h5"
    with h5py.File(h5, "w") as f:
        f.create_dataset("current", data=np.zeros(0)).attrs["fs"] = FS
    text = tmp_path / "none.csv"
    text.write_text("# exported with no rows\ntime_s,current_pA\n")
    cases = [(WavReader(gain=1e-12), wav, "no samples"), (NumpyReader(sample_rate=FS), npy, "not empty"),
             (Hdf5Reader(), h5, "not empty"), (TextReader(), text, "no data rows")]
    for reader, path, problem in cases:
        with pytest.raises(InputError, match=problem):
            reader.open(path)


@pytest.mark.parametrize("cls,params,ext", _readers_with_params(), ids=lambda v: getattr(v, "name", ""))
def test_garbage_content_is_reported(cls, params, ext, tmp_path):
    path = tmp_path / f"garbage{ext}"
    path.write_bytes(b"\x01\x02garbage\xff" * 3 + b"x")  # 34 bytes: odd, not text, no magic number
    with pytest.raises(InputError) as info:
        cls(**params).open(path)
    assert info.value.path == path and info.value.fix


def test_raw_size_not_a_multiple_of_the_frame(tmp_path):
    path = tmp_path / "cut.bin"
    path.write_bytes(b"\x00\x01" * 100 + b"\x07")  # 201 bytes
    with pytest.raises(InputError) as info:
        RawReader(dtype="int16", sample_rate=FS, gain=1e-12).open(path)
    message = str(info.value)
    assert str(path) in message and "201 bytes" in message and "frame size 2 bytes" in message
    assert "1 bytes are left over" in message and "dtype, n_channels and header_bytes" in message
    assert "first 200 bytes hold 100 whole frames" in message
    with pytest.raises(InputError, match="frame size 12 bytes"):
        RawReader(dtype="int32", n_channels=3, sample_rate=FS, gain=1e-12).open(path)
    with pytest.raises(InputError, match="no samples after the 4096 header bytes"):
        RawReader(dtype="int16", header_bytes=4096, sample_rate=FS, gain=1e-12).open(path)


def test_raw_needs_a_dtype_and_a_known_one(tmp_path):
    path = tmp_path / "nodtype.bin"
    _counts(10).tofile(path)
    with pytest.raises(InputError, match='dtype = "int16"') as info:
        RawReader(sample_rate=FS).open(path)
    assert info.value.key == "dtype" and "nodtype.json" in str(info.value)
    _sidecar(path, dtype="<u8")
    with pytest.raises(InputError, match="'<u8' is not a supported sample type"):
        RawReader(sample_rate=FS).open(path)
    _sidecar(path, dtype=">i2", byte_order="little")
    with pytest.raises(InputError, match="byte_order") as info:
        RawReader(sample_rate=FS, gain=1).open(path)
    assert info.value.path == path.with_suffix(".json")


@pytest.mark.parametrize("fmt", ["raw", "text", "npy", "hdf5"])
def test_no_sample_rate_anywhere(fmt, tmp_path):
    if fmt == "raw":
        path = tmp_path / "ink.bin"
        _amperes(10).tofile(path)
        reader = RawReader(dtype="float64")
    elif fmt == "text":
        path = tmp_path / "ink.csv"
        path.write_text("current_pA\n1\n2\n")
        reader = TextReader()
    elif fmt == "npy":
        path = tmp_path / "ink.npy"
        np.save(path, _amperes(10))
        reader = NumpyReader()
    else:
        path = tmp_path / "ink.h5"
        with h5py.File(path, "w") as f:
            f["current"] = _amperes(10)
        reader = Hdf5Reader()
    with pytest.raises(InputError) as info:
        reader.open(path)
    message = str(info.value)
    assert str(path) in message and "no sample rate" in message
    assert "sample_rate" in message and "[reader]" in message and '"sample_rate_hz"' in message
    assert "ink.json" in message and info.value.key == "sample_rate"


def test_malformed_sidecar(tmp_path):
    path = tmp_path / "ink.npy"
    np.save(path, _amperes(10))
    side = path.with_suffix(".json")
    side.write_text('{"sample_rate_hz": 250000,,}')
    with pytest.raises(InputError, match="not valid JSON") as info:
        NumpyReader().open(path)
    assert info.value.path == side
    side.write_text('{"sample_rate_hz": "fast"}')
    with pytest.raises(InputError, match="expected a finite number") as info:
        NumpyReader().open(path)
    assert info.value.key == "sample_rate_hz" and info.value.path == side
    side.write_text("[250000]")
    with pytest.raises(InputError, match="must be a JSON object"):
        NumpyReader().open(path)
    side.write_text('{"sample_rate_hz": 250000, "dtype": 16}')
    with pytest.raises(InputError, match="expected a string"):
        NumpyReader().open(path)


@pytest.mark.parametrize("fmt", ["raw", "wav", "npy", "hdf5"])
def test_integer_counts_need_a_gain(fmt, tmp_path):
    counts = _counts(10)
    if fmt == "raw":
        path = tmp_path / "c.bin"
        counts.tofile(path)
        reader = RawReader(dtype="int16", sample_rate=FS)
    elif fmt == "wav":
        path = tmp_path / "c.wav"
        wavfile.write(path, 250000, counts)
        reader = WavReader()
    elif fmt == "npy":
        path = tmp_path / "c.npy"
        np.save(path, counts)
        reader = NumpyReader(sample_rate=FS)
    else:
        path = tmp_path / "c.h5"
        with h5py.File(path, "w") as f:
            f["adc"] = counts
        reader = Hdf5Reader(sample_rate=FS)
    with pytest.raises(InputError, match="integer counts") as info:
        reader.open(path)
    assert "gain_A_per_count" in str(info.value) and "c.json" in str(info.value) and info.value.key == "gain"
    with pytest.raises(InputError, match="gain is 0"):
        type(reader)(**{**reader.get_params(), "gain": 0}).open(path)


def test_text_non_numeric_cell_names_its_line(tmp_path):
    path = tmp_path / "bad.csv"
    rows = [f"{i / FS:.9f},{i}.5" for i in range(100)]
    rows[60] = f"{60 / FS:.9f},overload"
    path.write_text("# batch 07\ntime_s,current_pA\n" + "\n".join(rows) + "\n")
    # Found while opening: the first rows are parsed to derive the rate from the time column.
    with pytest.raises(InputError) as info:
        TextReader().open(path)
    assert "line 63" in str(info.value) and "'overload' is not a number" in str(info.value)
    assert "'current_pA'" in str(info.value) and info.value.sample_index == 60
    # Found while streaming: with an explicit rate the file is only parsed chunk by chunk.
    recording = TextReader(sample_rate=FS).open(path)
    with pytest.raises(InputError, match="line 63, column 1") as info:
        _read(recording, 16)
    assert info.value.sample_index == 60
    # Deep in a long file (lines are read in blocks; numbering must survive block edges and blank lines).
    long_rows = [f"{i / FS:.9f},{i}.5" for i in range(5000)]
    long_rows[2500] = f"{2500 / FS:.9f},1.5.5"
    long_rows[1200] += "\n"  # a blank line before row 1201
    path.write_text("time_s,current_pA\n" + "\n".join(long_rows) + "\n")
    with pytest.raises(InputError, match="line 2503, column 1 .*'1.5.5' is not a number") as info:
        _read(TextReader().open(path), 700)
    assert info.value.sample_index == 2500
    rows[60] = f"{60 / FS:.9f}"
    path.write_text("time_s,current_pA\n" + "\n".join(rows) + "\n")
    with pytest.raises(InputError, match="line 62 has 1 field"):
        TextReader().open(path)
    rows[1] = f"{1 / FS:.9f},"
    path.write_text("time_s,current_pA\n" + "\n".join(rows) + "\n")
    with pytest.raises(InputError, match="line 3, column 1 .* '' is not a number"):
        TextReader().open(path)  # within the rows read to find the rate, so found on opening


@pytest.mark.parametrize(
    "content,problem",
    [
        ("0,1\n0.00001,2\n0.00002,3\n0.00004,4\n0.00005,5\n", "line 4: step 2e-05 s .* expected 1e-05 s"),
        ("5,1\n4,2\n3,3\n", 'does not increase .* time_column = "none"'),
        ("time_s,current_A\n0,1\n", "single data row"),
        ("time_s,current_pA,extra\n0,1\n1e-6,2\n", "header on line 1 has 3 names but the first data row"),
        ("# nothing here\n\n", "no data rows"),
        ("time_s,current_pA\n", "header row but no data rows"),
        ("# sample_rate_hz = fast\n1\n2\n", "declares a sample rate that cannot be read"),
    ],
    ids=["gap", "decreasing", "one-row", "header-mismatch", "comments-only", "header-only", "bad-rate-note"],
)
def test_text_time_and_structure_problems(content, problem, tmp_path):
    path = tmp_path / "s.csv"
    path.write_text(content)
    with pytest.raises(InputError, match=problem) as info:
        TextReader().open(path)
    assert info.value.path == path and info.value.fix


def test_text_latin1_header(tmp_path):
    path = tmp_path / "old.txt"
    path.write_bytes("Zeit (s)\tI (\u00b5A)\n0\t1.5\n0.000004\t2.5\n".encode("latin-1"))
    recording = TextReader().open(path)
    assert recording.metadata["encoding"] == "latin-1" and recording.sample_rate_hz == FS
    np.testing.assert_array_equal(_read(recording), np.array([1.5, 2.5]) * 1e-6)


def test_numpy_array_choice_and_damage(tmp_path):
    path = tmp_path / "many.npz"
    np.savez(path, a=_amperes(10), b=_amperes(10), fs=FS)
    with pytest.raises(InputError, match=r"2 candidate arrays \('a' float64 \(10,\), 'b' float64 \(10,\)"):
        NumpyReader().open(path)
    with pytest.raises(InputError, match="no array named 'c'"):
        NumpyReader(array="c").open(path)
    assert NumpyReader(array="b").open(path).sample_rate_hz == FS
    objects = tmp_path / "objects.npy"
    np.save(objects, np.array([{"a": 1}, None], dtype=object), allow_pickle=True)
    with pytest.raises(InputError, match="unpickling"):
        NumpyReader(sample_rate=FS).open(objects)
    truncated = tmp_path / "short.npy"
    np.save(truncated, _amperes(100))
    truncated.write_bytes(truncated.read_bytes()[:-8])
    with pytest.raises(InputError, match="truncated"):
        NumpyReader(sample_rate=FS).open(truncated)
    bad_rate = tmp_path / "badrate.npz"
    np.savez(bad_rate, current=_amperes(10), fs=np.array([1.0, 2.0]))
    with pytest.raises(InputError, match="must hold one finite number"):
        NumpyReader().open(bad_rate)
    channels_first = tmp_path / "cf.npy"
    np.save(channels_first, np.zeros((2, 50)))
    with pytest.raises(InputError, match="more columns than rows"):
        NumpyReader(sample_rate=FS, channel=0).open(channels_first)


def test_hdf5_dataset_choice_and_bad_attributes(tmp_path):
    path = tmp_path / "many.h5"
    with h5py.File(path, "w") as f:
        f["run1/current"] = _amperes(10)
        f["run2/current"] = _amperes(10)
        f["notes"] = np.bytes_("ink batch 07")
    with pytest.raises(InputError, match="2 1-D numeric datasets") as info:
        Hdf5Reader(sample_rate=FS).open(path)
    assert "/run1/current float64 (10,)" in str(info.value) and "/run2/current" in str(info.value)
    with pytest.raises(InputError, match="'/run3/current' does not exist"):
        Hdf5Reader(dataset="/run3/current", sample_rate=FS).open(path)
    with pytest.raises(InputError, match="'run1' is a group"):
        Hdf5Reader(dataset="run1", sample_rate=FS).open(path)
    with h5py.File(path, "a") as f:
        f["run2"].attrs["sample_rate_hz"] = "fast"
    with pytest.raises(
        InputError, match="attribute 'sample_rate_hz' of /run2 must be a positive number in Hz"
    ):
        Hdf5Reader(dataset="/run2/current").open(path)


def test_wav_channels_and_24_bit(tmp_path):
    path = wav_float32_stereo(tmp_path)[2]
    with pytest.raises(InputError, match="2 channels and none is chosen"):
        WavReader().open(path)
    with pytest.raises(InputError, match="channel 2 chosen .* numbered 0 to 1"):
        WavReader(channel=2).open(path)
    path24 = tmp_path / "deep24.wav"
    with wave.open(str(path24), "wb") as handle:  # the standard library writes 24-bit PCM
        handle.setnchannels(1)
        handle.setsampwidth(3)
        handle.setframerate(250000)
        handle.writeframes(b"".join(struct.pack("<i", v)[:3] for v in range(-50, 50)))
    with pytest.raises(InputError, match="32-bit PCM"):
        WavReader(gain=1e-12).open(path24)
