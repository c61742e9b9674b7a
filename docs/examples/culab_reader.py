"""Example of a lab's own reader plugin: the "CULAB1" format of a (fictional) copper-ink QC lab.

File layout: the 7 bytes ``CULAB1\\n``, one line of JSON with ``sample_rate_hz`` and ``gain_A_per_count``,
then little-endian int16 samples to the end of the file.

Use it either way:
* name this file in a pipeline file: ``[plugins] local = ["culab_reader.py"]``;
* or package it with an entry point in the group ``impactline.plugins`` (see docs/writing-a-reader.md).
"""

from __future__ import annotations

import json
from collections.abc import Iterator
from pathlib import Path

import numpy as np
from impactline import InputError, Param, Reader, Recording, hookimpl

MAGIC = b"CULAB1\n"


class CulabReader(Reader):
    """Reads CULAB1 files: a JSON header line, then int16 counts scaled by the header's gain."""

    name = "culab"
    summary = "CULAB1 files of the copper-ink QC lab (JSON header + int16)"
    version = "1.0"
    extensions = (".culab",)
    params = {
        **Reader.params,
        "invert": Param(False, kind=bool, doc="flip the sign (for rigs wired cathodic-positive)"),
    }

    @classmethod
    def sniff(cls, path: Path, head: bytes) -> bool:
        return head.startswith(MAGIC)

    def open(self, path: Path) -> Recording:
        path = Path(path)
        with open(path, "rb") as handle:
            if handle.read(len(MAGIC)) != MAGIC:
                raise InputError(path, "does not start with CULAB1", "is this a CULAB1 file?")
            line = handle.readline()
            data_offset = handle.tell()
        try:
            header = json.loads(line)
        except json.JSONDecodeError as exc:
            raise InputError(path, f"header line is not JSON ({exc.msg})", "rewrite the header") from None
        fs = self.sample_rate or header.get("sample_rate_hz")
        if not fs:
            raise InputError(path, "no sample rate", "add sample_rate_hz to the header", key="sample_rate_hz")
        gain = self.gain or header.get("gain_A_per_count", 1.0)
        sign = -1.0 if self.invert else 1.0
        counts = np.memmap(path, dtype="<i2", mode="r", offset=data_offset)

        def iter_chunks(chunk_samples: int) -> Iterator[np.ndarray]:
            for start in range(0, counts.size, chunk_samples):
                yield sign * gain * counts[start:start + chunk_samples].astype(np.float64)

        return Recording(path=path, sample_rate_hz=float(fs), n_samples=int(counts.size), iter_chunks=iter_chunks,
                         metadata={"format": "CULAB1", "gain_A_per_count": gain})


def write_culab(path: str | Path, counts: np.ndarray, sample_rate_hz: float, gain_A_per_count: float) -> None:
    """Write a CULAB1 file (used by the tests and handy for making examples)."""
    header = json.dumps({"sample_rate_hz": sample_rate_hz, "gain_A_per_count": gain_A_per_count})
    with open(path, "wb") as handle:
        handle.write(MAGIC + header.encode() + b"\n")
        handle.write(np.asarray(counts, dtype="<i2").tobytes())


@hookimpl
def impactline_stages() -> list[type]:
    return [CulabReader]
