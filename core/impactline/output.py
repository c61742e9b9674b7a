"""The run folder: Parquet schemas with units, atomic writes, and what resume needs.

Layout of a run folder::

    events.parquet/            one part per input file (a folder Arrow and pandas read as one dataset)
        <stem>-<hash>.parquet
    files.parquet              one row per input file (status ok / failed / skipped)
    labels.parquet             classifier output joined on (file, event_id), when a classifier ran
    run.json                   pipeline text and hash, versions, command line, times

Every file is written to a hidden temporary name in the same folder and moved into place with
``os.replace``, so a reader never sees a partial file and an interrupted run leaves none behind.
"""

from __future__ import annotations

import hashlib
import json
import os
import re
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from .stages import Column

__all__ = [
    "CONTRACT_COLUMNS", "FILE_COLUMNS", "arrow_type", "schema_for", "table_from_rows", "write_table_atomic",
    "part_name", "read_part_metadata", "read_events", "join_sidecar", "file_fingerprint",
]

EVENTS_DIR = "events.parquet"
FILES_TABLE = "files.parquet"
LABELS_TABLE = "labels.parquet"
RUN_JSON = "run.json"

#: Columns every events table has, whatever the stages (the run-folder contract).
CONTRACT_COLUMNS: dict[str, Column] = {
    "file": Column("string", "", "input file path"),
    "event_id": Column("int64", "", "event number within the file, from 0 in time order"),
    "start_s": Column("float64", "s", "event start, corrected for the delay of causal filters"),
    "end_s": Column("float64", "s", "event end (exclusive), corrected for filter delay"),
    "onset_s": Column("float64", "s", "half-height instant of the leading edge (first peak), delay corrected, "
                                      "with the filters' smearing of short and decaying pulses undone "
                                      "(start_s is where the filtered signal leaves its baseline)"),
    "duration_s": Column("float64", "s", "end_s - start_s"),
    "start_index": Column("int64", "", "first sample of the event in the recording (delay corrected)"),
    "end_index": Column("int64", "", "one past the last sample of the event"),
    "baseline_A": Column("float64", "A", "baseline current under the event (from the detector)"),
    "peak_A": Column("float64", "A", "signed peak excursion from the baseline"),
    "charge_C": Column("float64", "C", "signed integral of the excursion from the baseline"),
    "noise_rms_A": Column("float64", "A", "local rms noise (from the detector)"),
    "snr": Column("float64", "", "|peak_A| / noise_rms_A"),
    "inter_event_interval_s": Column("float64", "s", "start-to-start time from the previous event in the file"),
    "detector": Column("string", "", "name of the detector that found the event"),
}
SIZING_COLUMNS: dict[str, Column] = {
    "diameter_m": Column("float64", "m", "equivalent spherical diameter from the charge (Faraday's law)"),
}

#: Columns of files.parquet.
FILE_COLUMNS: dict[str, Column] = {
    "file": Column("string", "", "input file path"),
    "fingerprint": Column("string", "", "content fingerprint of the input (and its sidecar)"),
    "reader": Column("string", "", "reader used"),
    "sample_rate_hz": Column("float64", "Hz", "sampling rate"),
    "n_samples": Column("int64", "", "samples read"),
    "duration_s": Column("float64", "s", "recording length"),
    "noise_rms_A": Column("float64", "A", "robust rms noise of the filtered signal (median of block MADs)"),
    "n_events": Column("int64", "", "events found"),
    "event_rate_per_s": Column("float64", "1/s", "n_events / duration_s"),
    "event_rate_low_per_s": Column("float64", "1/s", "lower bound of the 95 % Poisson interval of the rate"),
    "event_rate_high_per_s": Column("float64", "1/s", "upper bound of the 95 % Poisson interval of the rate"),
    "median_diameter_m": Column("float64", "m", "median equivalent diameter of anodic events (with sizing)"),
    "diffusion_coefficient_m2_per_s": Column("float64", "m^2/s", "Stokes-Einstein D ([collision_rate])"),
    "predicted_rate_per_s": Column("float64", "1/s", "diffusion-limited collision rate at a disc, 4 D C N_A r"),
    "rate_ratio": Column("float64", "", "measured / predicted rate"),
    "filter_cutoff_hz": Column("float64", "Hz", "-3 dB point of the whole filter chain"),
    "filter_rise_time_s": Column("float64", "s", "10-90 % step rise time of the filter chain"),
    "filter_delay_s": Column("float64", "s", "delay of causal filters, subtracted from event times"),
    "reader_metadata": Column("string", "", "JSON: what the reader found (dtype, gain, where each setting came from)"),
    "status": Column("string", "", "ok, failed, or skipped (done by an earlier run with the same pipeline)"),
    "error": Column("string", "", "what went wrong (failed files)"),
    "seconds": Column("float64", "s", "processing time"),
    "part": Column("string", "", "events part file in events.parquet/"),
    "pipeline_hash": Column("string", "", "hash of the pipeline that produced the row"),
}

_ARROW_TYPES = {
    "float64": pa.float64(), "float32": pa.float32(), "int64": pa.int64(), "int32": pa.int32(),
    "bool": pa.bool_(), "string": pa.string(),
}


def arrow_type(column: Column) -> pa.DataType:
    """Arrow type of a declared column (fixed-size lists for shape-like columns)."""
    if column.dtype == "list<float32>":
        return pa.list_(pa.float32(), column.length)
    return _ARROW_TYPES[column.dtype]


def schema_for(columns: Mapping[str, Column], metadata: Mapping[str, str] | None = None) -> pa.Schema:
    """Arrow schema with each column's unit and doc in its field metadata (keys ``unit``, ``doc``)."""
    fields = [pa.field(name, arrow_type(col), metadata={"unit": col.unit, "doc": col.doc})
              for name, col in columns.items()]
    return pa.schema(fields, metadata={k: str(v) for k, v in (metadata or {}).items()})


def table_from_rows(rows: list[Mapping[str, Any]], schema: pa.Schema) -> pa.Table:
    """Build a table column by column from row dicts (missing values become null)."""
    arrays = []
    for field in schema:
        values = [row.get(field.name) for row in rows]
        arrays.append(pa.array(values, type=field.type, from_pandas=True))
    return pa.Table.from_arrays(arrays, schema=schema)


def write_table_atomic(table: pa.Table, path: Path) -> None:
    """Write ``table`` to ``path`` so that the file is either complete or absent."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    temporary = path.parent / f".{path.name}.{os.getpid()}.tmp"
    try:
        pq.write_table(table, temporary, compression="zstd")
        os.replace(temporary, path)
    finally:
        if temporary.exists():
            temporary.unlink()


def write_json_atomic(data: Any, path: Path) -> None:
    """Write JSON atomically (same scheme as :func:`write_table_atomic`)."""
    path = Path(path)
    temporary = path.parent / f".{path.name}.{os.getpid()}.tmp"
    temporary.write_text(json.dumps(data, indent=2, sort_keys=True, default=str) + "\n", encoding="utf-8")
    os.replace(temporary, path)


def part_name(path: Path) -> str:
    """Part file name for an input: readable stem plus a hash of the absolute path (unique per input)."""
    resolved = str(Path(path).resolve())
    stem = re.sub(r"[^A-Za-z0-9._-]+", "_", Path(path).stem)[:60] or "recording"
    return f"{stem}-{hashlib.sha256(resolved.encode()).hexdigest()[:12]}.parquet"


def read_part_metadata(path: Path) -> dict[str, Any] | None:
    """The file row stored in a part's metadata, or None if the part is missing or unreadable."""
    try:
        metadata = pq.read_schema(path).metadata or {}
    except (OSError, pa.ArrowInvalid):
        return None
    raw = metadata.get(b"impactline.file")
    return json.loads(raw) if raw else None


def read_events(run_dir: str | Path) -> pa.Table:
    """All events of a run folder as one table (labels joined when a classifier ran)."""
    run_dir = Path(run_dir)
    parts = sorted((run_dir / EVENTS_DIR).glob("[!._]*.parquet"))
    if not parts:
        raise FileNotFoundError(f"{run_dir}: no events parts in {EVENTS_DIR}/ (is this a run folder?)")
    tables = [pq.read_table(p) for p in parts]
    table = pa.concat_tables(tables, promote_options="default")
    labels_path = run_dir / LABELS_TABLE
    if labels_path.exists():
        table = join_sidecar(table, pq.read_table(labels_path))
    return table


def join_sidecar(events: pa.Table, sidecar: pa.Table) -> pa.Table:
    """Left-join a per-event sidecar on ``(file, event_id)``; its columns replace same-named ones.

    The row order of ``events`` is kept; events the sidecar does not cover get nulls. (Arrow's own join
    cannot carry fixed-size list columns, so only the keys are joined and the columns are taken by row.)
    """
    extra = [c for c in sidecar.column_names if c not in ("file", "event_id", "run")]
    events = events.drop_columns([c for c in extra if c in events.column_names])
    left = pa.table({"file": events.column("file"), "event_id": events.column("event_id"),
                     "__left": pa.array(np.arange(events.num_rows, dtype=np.int64))})
    right = pa.table({"file": sidecar.column("file"), "event_id": sidecar.column("event_id"),
                      "__right": pa.array(np.arange(sidecar.num_rows, dtype=np.int64))})
    keys = left.join(right, keys=["file", "event_id"], join_type="left outer").sort_by("__left")
    take = keys.column("__right")
    for name in extra:
        events = events.append_column(sidecar.schema.field(name), sidecar.column(name).take(take))
    return events


def file_fingerprint(path: Path, extra_files: list[Path] | tuple = ()) -> str:
    """Content fingerprint of an input file (and its sidecar files).

    The whole content is hashed for files up to 64 MiB; for larger files the size, the first and last
    4 MiB and 64 evenly spaced 64 KiB blocks are hashed, which catches truncation, appends and edits
    of any block while costing a few tens of MiB of reading per file.
    """
    digest = hashlib.blake2b(digest_size=16)
    for item in [Path(path), *map(Path, extra_files)]:
        size = item.stat().st_size
        digest.update(f"{item.name}:{size}:".encode())
        with open(item, "rb") as handle:
            if size <= 64 << 20:
                for block in iter(lambda: handle.read(1 << 20), b""):
                    digest.update(block)
            else:
                offsets = [0, size - (4 << 20)] + [int(i * (size - (64 << 10)) / 63) for i in range(64)]
                for offset in offsets:
                    handle.seek(offset)
                    digest.update(handle.read(4 << 20 if offset in (0, size - (4 << 20)) else 64 << 10))
    return digest.hexdigest()
