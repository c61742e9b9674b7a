"""The ``NAME.json`` sidecar convention shared by every reader.

A lab that dumps raw samples often writes the acquisition settings beside the data::

    run_0042.bin
    run_0042.json   {"sample_rate_hz": 250000, "gain_A_per_count": 3.05e-13, "dtype": "<i2"}

Keys (all optional): ``sample_rate_hz``, ``gain_A_per_count``, ``offset_A``, ``dtype`` (NumPy dtype
string such as ``"<i2"``, ``">f4"``, ``"int16"``), ``byte_order`` (``"little"``/``"big"``),
``header_bytes``, ``channel``, ``n_channels``. Unknown keys are kept as metadata. Parameters given in the
pipeline file win over the sidecar; the sidecar wins over the data file's own header.
"""

from __future__ import annotations

import json
import math
from pathlib import Path
from typing import Any

from .errors import InputError

__all__ = ["SIDECAR_KEYS", "sidecar_path", "load_sidecar", "choose"]

_NUMERIC_KEYS = {"sample_rate_hz": (0.0, False), "gain_A_per_count": (None, False), "offset_A": (None, True),
                 "header_bytes": (0.0, True), "channel": (0.0, True), "n_channels": (1.0, True)}
SIDECAR_KEYS = (*_NUMERIC_KEYS, "dtype", "byte_order")


def sidecar_path(data_path: Path) -> Path:
    """Return ``NAME.json`` beside ``NAME.ext``."""
    return Path(data_path).with_suffix(".json")


def load_sidecar(data_path: Path) -> tuple[dict[str, Any], Path | None]:
    """Load and check the sidecar of ``data_path``.

    Returns
    -------
    settings : dict
        The sidecar's content (empty if there is none).
    path : Path or None
        The sidecar file, if it exists.

    Raises
    ------
    InputError
        When the sidecar is not valid JSON, not an object, or a known key has a bad value.
    """
    path = sidecar_path(Path(data_path))
    if path == Path(data_path) or not path.is_file():
        return {}, None
    try:
        settings = json.loads(path.read_text(encoding="utf-8"))
    except json.JSONDecodeError as exc:
        raise InputError(path, f"sidecar is not valid JSON (line {exc.lineno}, column {exc.colno}: {exc.msg})",
                         "correct the JSON or remove the sidecar and give the settings in the pipeline file") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(path, f"sidecar cannot be read ({exc})", "check the file's permissions and encoding") from None
    if not isinstance(settings, dict):
        raise InputError(path, f"sidecar must be a JSON object, got {type(settings).__name__}",
                         'write e.g. {"sample_rate_hz": 250000}')
    for key, (low, low_inclusive) in _NUMERIC_KEYS.items():
        if key not in settings:
            continue
        value = settings[key]
        ok = isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value)
        if ok and low is not None:
            ok = value >= low if low_inclusive else value > low
        if ok and key in ("header_bytes", "channel", "n_channels"):
            ok = float(value).is_integer()
        if not ok:
            bound = "" if low is None else f" {'>=' if low_inclusive else '>'} {low:g}"
            raise InputError(path, f"expected a finite number{bound}, got {value!r}",
                             f"correct {key!r} in the sidecar", key=key)
    for key in ("dtype", "byte_order"):
        if key in settings and not isinstance(settings[key], str):
            raise InputError(path, f"expected a string, got {settings[key]!r}", f"correct {key!r}", key=key)
    if settings.get("byte_order", "little") not in ("little", "big"):
        raise InputError(path, f"expected 'little' or 'big', got {settings['byte_order']!r}",
                         "correct 'byte_order'", key="byte_order")
    return settings, path


def choose(pipeline_value: Any, sidecar: dict[str, Any], key: str, file_value: Any = None,
           default: Any = None) -> Any:
    """Pick a setting by precedence: pipeline file, then sidecar, then the data file, then the default."""
    if pipeline_value is not None:
        return pipeline_value
    if key in sidecar:
        return sidecar[key]
    if file_value is not None:
        return file_value
    return default
