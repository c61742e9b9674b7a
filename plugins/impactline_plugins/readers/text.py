"""Delimited text: one current column, optionally with a time column, streamed line by line.

What labs write, and what this reader understands without being told:

* delimiter: comma, tab, semicolon or runs of whitespace (found from the first rows);
* a header row or none; quoted names; comment lines and trailing comments starting with ``#``;
* units in column names: ``current_pA``, ``I (nA)``, ``I [uA]``, ``I/pA``, ``time_ms``, ``t (s)``;
* a decimal comma (``0,25;1,5``) when the delimiter is not a comma;
* a comment line declaring the rate: ``# sample_rate_hz = 250000`` or ``# sample rate: 250 kHz``.

The sample rate comes from, in order: the pipeline file, the sidecar ``NAME.json``, a rate declared in a
comment line, the time column. When it comes from the time column, every row's time step is checked
against it (within half a sample) while streaming; otherwise the time column is not read.
"""

from __future__ import annotations

import codecs
import re
from collections.abc import Iterator
from dataclasses import dataclass
from itertools import islice
from pathlib import Path
from typing import Any, ClassVar, TextIO

import numpy as np
from impactline import InputError, Param, ParameterError, Reader, Recording, parse_quantity
from impactline.units import QuantityError

from ._common import (
    HEAD_BYTES,
    Scaling,
    Settings,
    check_chunk_samples,
    check_file,
    looks_like_text,
    signature,
)

__all__ = ["TextReader", "split_unit"]

_DELIMITERS = {"comma": ",", "tab": "\t", "semicolon": ";", "whitespace": None}
_DETECT_ORDER = ("tab", "semicolon", "comma", "whitespace")
_CURRENT_UNITS = ("A", "mA", "uA", "\u00b5A", "nA", "pA", "fA")
_TIME_UNITS = ("s", "ms", "us", "\u00b5s", "ns")
_TIME_NAMES = {"t", "time", "times", "timestamp", "elapsed", "elapsed_time", "time_elapsed"}
_CURRENT_NAMES = {"i", "current", "im", "imon", "i_mon", "current_a", "signal"}
# "I (nA)", "time [ms]" | "current_pA", "I/nA", "time_s" | "current pA"
_UNIT_PATTERNS = (
    re.compile(r"^(?P<name>.*?)\s*[(\[]\s*(?P<unit>[^)\]]*?)\s*[)\]]$"),
    re.compile(r"^(?P<name>.+?)\s*[_/]\s*(?P<unit>[A-Za-z\u00b5\u03bc]{1,3})$"),
    re.compile(r"^(?P<name>.+?)\s+(?P<unit>[A-Za-z\u00b5\u03bc]{1,3})$"),
)
_RATE_COMMENT = re.compile(
    r"^\s*(?:sample[ _-]?rate(?:[ _-]?hz)?|sampling[ _-]?rate(?:[ _-]?hz)?|fs)\s*[:=]\s*(?P<value>.+?)\s*$",
    re.IGNORECASE,
)
#: Rows read when the file is opened, to find the delimiter and header.
_PROBE_LINES = 50
#: Rows used to derive the sample rate from the time column.
_RATE_ROWS = 4096
#: Lines parsed at once (bounds the memory held as Python strings, whatever the chunk size).
_BLOCK_LINES = 16384


def split_unit(header: str, unit: str) -> tuple[str, float | None]:
    """Split a column name into its bare name and the scale of a unit written in it.

    Parameters
    ----------
    header : str
        Column name as written (``"I (nA)"``, ``"current_pA"``, ``"time_ms"``).
    unit : str
        SI unit looked for (``"A"`` or ``"s"``).

    Returns
    -------
    name : str
        Lower-case name without the unit (``"i"``, ``"current"``, ``"time"``).
    scale : float or None
        SI value of one written unit (1e-9 for nA), or None when the name carries no such unit.

    Examples
    --------
    >>> split_unit("I (nA)", "A")
    ('i', 1e-09)
    >>> split_unit("time_ms", "s")
    ('time', 0.001)
    """
    text = header.strip().strip('"').strip("'").strip()
    for pattern in _UNIT_PATTERNS:
        match = pattern.match(text)
        if match is None:
            continue
        try:
            return match.group("name").strip().lower(), parse_quantity("1 " + match.group("unit"), unit)
        except QuantityError:
            continue
    return text.lower(), None


@dataclass
class _Layout:
    """How the data rows of one file are laid out, found when it is opened."""

    encoding: str
    delimiter: str | None
    decimal_comma: bool
    data_start_line: int
    names: list[str]
    current_column: int
    time_column: int | None  # only when the rate comes from it (then every step is checked)
    time_scale: float
    step_s: float | None
    scaling: Scaling

    @property
    def usecols(self) -> tuple[int, ...]:
        return (self.current_column,) if self.time_column is None else (self.current_column, self.time_column)

    def describe(self, column: int) -> str:
        return f"column {column} ({self.names[column]!r})" if self.names else f"column {column}"


class TextReader(Reader):
    """Delimited text (CSV, TSV, whitespace), with a current column and optionally a time column.

    The current is taken from the column named by ``current_column``; by default the one whose name
    carries a current unit or reads "I"/"current", or the only column that is not time. Values are in
    amperes unless a unit is written in the column name, set with ``current_unit``, or given as a
    ``gain`` (A per written unit, pipeline or sidecar ``gain_A_per_count``).
    """

    name: ClassVar[str] = "text"
    summary: ClassVar[str] = "delimited text (CSV/TSV/whitespace): current, optionally with a time column"
    version: ClassVar[str] = "1"
    extensions: ClassVar[tuple[str, ...]] = (".csv", ".tsv", ".txt", ".dat")
    params: ClassVar[dict[str, Param]] = {
        **Reader.params,
        "gain": Param(
            None,
            unit="A",
            doc='amperes per written unit (e.g. "1 pA" for values in pA); default: '
            "current_unit, sidecar gain_A_per_count, unit in the column name, 1",
        ),
        "delimiter": Param(
            "auto",
            kind=str,
            choices=("auto", *_DELIMITERS),
            doc="column separator; auto: found from the first rows",
        ),
        "decimal": Param(
            "auto",
            kind=str,
            choices=("auto", ".", ","),
            doc="decimal mark; auto: ',' when numbers contain one and the delimiter is not a comma",
        ),
        "current_column": Param(
            None,
            kind=str,
            doc="column holding the current: its header name or 0-based index; default: "
            "the column named with a current unit or I/current, or the only non-time one",
        ),
        "time_column": Param(
            None,
            kind=str,
            doc='column holding time (name or 0-based index), or "none"; default: a column '
            "named t/time or with a time unit, else column 0 of a headerless 2-column file",
        ),
        "current_unit": Param(
            None,
            kind=str,
            choices=_CURRENT_UNITS,
            doc="unit of the current values; default: the unit in the column name, else the "
            "sidecar's gain_A_per_count, else A (give this or gain, not both)",
        ),
        "time_unit": Param(
            None,
            kind=str,
            choices=_TIME_UNITS,
            doc="unit of the time values; default: the unit in the column name, else s",
        ),
    }

    def __init__(self, **values: Any):
        # A column index written as a TOML integer is as natural as a quoted one.
        for key in ("current_column", "time_column"):
            if isinstance(values.get(key), int) and not isinstance(values.get(key), bool):
                values[key] = str(values[key])
        super().__init__(**values)
        if self.gain is not None and self.current_unit is not None:
            raise ParameterError(
                f"reader {self.name!r}",
                "current_unit",
                "give either gain (A per written unit) or current_unit, not both",
            )

    @classmethod
    def sniff(cls, path: Path, head: bytes) -> bool:
        """Text whose first rows (after comments and at most one header row) are numbers."""
        if signature(head) is not None or not looks_like_text(head):
            return False
        text = head.decode("utf-8", errors="replace")
        lines = text.splitlines()
        if len(head) >= HEAD_BYTES and len(lines) > 1:
            lines = lines[:-1]  # probably cut mid-row
        rows = [line for line in (_strip_comment(x) for x in lines) if line][:_PROBE_LINES]
        numeric = [_looks_numeric(row) for row in rows]
        return any(numeric) and all(numeric[1:])

    def open(self, path: Path) -> Recording:
        """Find delimiter, header, columns, units and rate from the first rows; return the recording.

        Raises
        ------
        impactline.errors.InputError
            Empty file or no data rows; a column that does not exist; a non-numeric cell (with its line);
            a time column that is not increasing in uniform steps (with the line); no sample rate.
        """
        path = Path(path)
        check_file(path)
        settings = Settings.load(path)
        with open(path, "rb") as handle:
            head = handle.read(HEAD_BYTES)
        if not looks_like_text(head):
            raise InputError(
                path,
                "is not text: its first bytes include binary (control) bytes",
                'choose the reader for its real format in the [reader] section (use = "raw" for '
                "binary samples)",
            )
        encoding = _detect_encoding(head)
        with _open_text(path, encoding) as handle:
            comments: list[str] = []
            source = _RowSource(path, handle, 1, comments)
            first = source.take(_PROBE_LINES)
            if not first:
                raise InputError(
                    path,
                    "holds no data rows (only blank or # comment lines)",
                    "check that the export wrote its data",
                )
            delimiter, decimal_comma, names = self._structure(path, list(first))
            if names and len(first) == 1:
                raise InputError(
                    path, "has a header row but no data rows", "check that the export wrote its data"
                )
            data_start = first[1][0] if names else first[0][0]
            n_fields = len(names) if names else len(_split(first[-1][1], delimiter))
            current_col, time_col = self._columns(path, names, n_fields)
            header_current = split_unit(names[current_col], "A")[1] if names else None
            time_scale = 1.0
            if time_col is not None:
                header_time = split_unit(names[time_col], "s")[1] if names else None
                time_scale = settings.pick(
                    "time_s_per_unit", _unit_value(self.time_unit, "s"), header_time, 1.0
                )
            declared = _declared_rate(path, comments)
            need_time = (
                self.sample_rate is None and "sample_rate_hz" not in settings.sidecar and declared is None
            )
            layout = _Layout(
                encoding,
                delimiter,
                decimal_comma,
                data_start,
                names,
                current_col,
                time_col if need_time else None,
                time_scale,
                None,
                Scaling(),
            )
            file_rate = declared
            if need_time:
                if time_col is None:
                    file_rate = None  # Settings.sample_rate raises with the fix
                else:
                    probe = first.tail(1 if names else 0)
                    probe = probe + source.take(_RATE_ROWS - len(probe))
                    file_rate = _rate_from_time(path, layout, probe)
        rate = settings.sample_rate(self.sample_rate, file_rate)
        if need_time and time_col is not None:
            settings.sources["sample_rate_hz"] = "file (time column)"
        layout.step_s = 1.0 / rate
        layout.scaling = settings.scaling(
            self.gain if self.gain is not None else _unit_value(self.current_unit, "A"),
            self.offset,
            integer=False,
            sample_type="text",
            file_gain=header_current,
        )

        def iter_chunks(chunk_samples: int) -> Iterator[np.ndarray]:
            return _stream(path, layout, check_chunk_samples(chunk_samples))

        return settings.recording(
            rate,
            None,
            iter_chunks,
            format="text",
            encoding=encoding,
            delimiter=_delimiter_name(delimiter),
            decimal_mark="," if decimal_comma else ".",
            header=names or None,
            current_column=current_col,
            current_column_name=names[current_col] if names else None,
            time_column=time_col,
            time_checked=layout.time_column is not None,
            first_data_line=data_start,
            comments=comments[:20],
        )

    # ------------------------------------------------------------------ structure
    def _structure(self, path: Path, first: list[tuple[int, str]]) -> tuple[str | None, bool, list[str]]:
        """Delimiter, decimal comma and header names (empty when there is no header row)."""
        body = first[1:] if len(first) > 1 else first
        if self.delimiter != "auto":
            delimiter = _DELIMITERS[self.delimiter]
        else:
            delimiter = _detect_delimiter(path, [text for _, text in body], self.decimal)
        decimal_comma = self.decimal == "," or (
            self.decimal == "auto" and delimiter != "," and any("," in text for _, text in body)
        )
        header_line, header_text = first[0]
        fields = _split(header_text, delimiter)
        if all(_number(field, decimal_comma) is not None for field in fields):
            return delimiter, decimal_comma, []
        names = [field.strip().strip('"').strip("'").strip() for field in fields]
        while names and not names[-1]:
            names.pop()  # a trailing delimiter
        n_fields = len(_split(body[0][1], delimiter))
        if len(names) != n_fields and delimiter is None:
            # "time (s)  current (pA)": names with spaces, columns set apart by tabs or 2+ spaces
            names = [n.strip() for n in re.split(r"\t|\s{2,}", header_text.strip()) if n.strip()]
        if len(names) != n_fields:
            raise InputError(
                path,
                f"header on line {header_line} has {len(names)} names but the first data row "
                f"(line {body[0][0]}) has {n_fields} fields "
                f"(delimiter {_delimiter_name(delimiter)})",
                "make the header match the data, or set delimiter in the [reader] section",
            )
        return delimiter, decimal_comma, names

    def _columns(self, path: Path, names: list[str], n_fields: int) -> tuple[int, int | None]:
        """Indices of the current column and of the time column (None if there is none)."""
        time_col = None
        if self.time_column is not None and self.time_column.lower() != "none":
            time_col = _column_index(path, self.time_column, names, n_fields, "time_column")
        current_col = None
        if self.current_column is not None:
            current_col = _column_index(path, self.current_column, names, n_fields, "current_column")
        if self.time_column is None:
            if names:
                time_col = next((i for i, n in enumerate(names) if i != current_col and _is_time(n)), None)
            elif n_fields >= 2 and current_col != 0:
                time_col = 0
        if current_col is None:
            if names:
                current_col = next((i for i, n in enumerate(names) if i != time_col and _is_current(n)), None)
            if current_col is None:
                others = [i for i in range(n_fields) if i != time_col]
                if len(others) != 1:
                    listed = (
                        ", ".join(f"{i}: {n!r}" for i, n in enumerate(names))
                        if names
                        else f"{n_fields} unnamed columns"
                    )
                    raise InputError(
                        path,
                        f"cannot tell which column holds the current ({listed})",
                        'set current_column = "NAME" or an index in the [reader] section',
                        key="current_column",
                    )
                current_col = others[0]
        if current_col == time_col:
            raise InputError(
                path,
                f"current and time are both column {current_col}",
                "set current_column and time_column to different columns",
                key="time_column",
            )
        return current_col, time_col


# ---------------------------------------------------------------------------------------------- helpers
def _unit_value(unit: str | None, base: str) -> float | None:
    return None if unit is None else parse_quantity("1 " + unit, base)


def _is_time(name: str) -> bool:
    bare, scale = split_unit(name, "s")
    return scale is not None or bare in _TIME_NAMES


def _is_current(name: str) -> bool:
    bare, scale = split_unit(name, "A")
    return scale is not None or bare in _CURRENT_NAMES


def _column_index(path: Path, given: str, names: list[str], n_fields: int, key: str) -> int:
    """Resolve a column given by name or 0-based index."""
    text = given.strip()
    if text.isdigit():
        index = int(text)
        if index < n_fields:
            return index
        raise InputError(
            path,
            f"{key} = {index} but the rows have {n_fields} columns (0 to {n_fields - 1})",
            f"correct {key} in the [reader] section",
            key=key,
        )
    for candidates in (names, [n.lower() for n in names]):
        probe = text if candidates is names else text.lower()
        if probe in candidates:
            return candidates.index(probe)
    listed = ", ".join(repr(n) for n in names) if names else "none (the file has no header row)"
    raise InputError(
        path,
        f"{key} = {given!r} is not a column name; the names are {listed}",
        f"correct {key} in the [reader] section (a name, or a 0-based index)",
        key=key,
    )


def _detect_encoding(head: bytes) -> str:
    try:
        codecs.getincrementaldecoder("utf-8")().decode(head, final=False)
    except UnicodeDecodeError:
        return "latin-1"  # older instruments write "µA" as the single byte 0xB5
    return "utf-8-sig"  # also drops the byte-order mark some spreadsheet programs write


def _open_text(path: Path, encoding: str) -> TextIO:
    return open(path, encoding=encoding, newline=None)


def _strip_comment(line: str) -> str:
    cut = line.find("#")
    return (line if cut < 0 else line[:cut]).strip()


@dataclass
class _Rows:
    """Data rows: their line numbers and their text (comments and surrounding blanks removed)."""

    numbers: list[int]
    texts: list[str]

    def __len__(self) -> int:
        return len(self.texts)

    def __getitem__(self, index: int) -> tuple[int, str]:
        return self.numbers[index], self.texts[index]

    def __iter__(self) -> Iterator[tuple[int, str]]:
        return zip(self.numbers, self.texts, strict=True)

    def __add__(self, other: _Rows) -> _Rows:
        return _Rows(self.numbers + other.numbers, self.texts + other.texts)

    def tail(self, start: int) -> _Rows:
        return _Rows(self.numbers[start:], self.texts[start:])


class _RowSource:
    """Non-blank, comment-free rows of a text file from ``start_line`` on, read a block of lines at a time.

    Reading blocks of lines and stripping them with list comprehensions keeps the per-line Python work
    small; a block with a ``#`` takes the slow path that also collects comment lines.
    """

    def __init__(self, path: Path, handle: TextIO, start_line: int, comments: list[str] | None = None):
        self.path = path
        self.handle = handle
        self.start_line = start_line
        self.comments = comments
        self.lines_read = 0
        self.done = False
        self.pending = _Rows([], [])

    def take(self, n_rows: int) -> _Rows:
        """The next ``n_rows`` rows (fewer at the end of the file)."""
        while len(self.pending) < n_rows and not self.done:
            self._fill(min(_BLOCK_LINES, max(1024, n_rows - len(self.pending))))
        taken = _Rows(self.pending.numbers[:n_rows], self.pending.texts[:n_rows])
        del self.pending.numbers[:n_rows], self.pending.texts[:n_rows]
        return taken

    def _fill(self, n_lines: int) -> None:
        try:
            lines = list(islice(self.handle, n_lines))
        except UnicodeDecodeError as exc:
            raise InputError(
                self.path,
                f"is not valid {self.handle.encoding} text after line {self.lines_read} ({exc.reason})",
                "re-export the file as UTF-8 text",
            ) from None
        if not lines:
            self.done = True
            return
        first = self.lines_read + 1
        self.lines_read += len(lines)
        skip = max(0, self.start_line - first)
        if skip >= len(lines):
            return
        lines, first = lines[skip:], first + skip
        numbers: list[int] | range = range(first, first + len(lines))
        block = "".join(lines)
        if _only_data(block, lines[-1]):
            # The common case: every line is a data row. Kept as read (NumPy's parser ignores the
            # surrounding whitespace and newline), which saves a Python-level pass over the lines.
            self.pending.numbers.extend(numbers)
            self.pending.texts.extend(lines)
            return
        if "#" in block:
            texts = []
            for line in lines:
                cut = line.find("#")
                if cut >= 0:
                    if self.comments is not None and not line[:cut].strip():
                        self.comments.append(line[cut + 1 :].strip())
                    line = line[:cut]
                texts.append(line.strip())
        else:
            texts = [line.strip() for line in lines]
        if not all(texts):
            kept = [(n, t) for n, t in zip(numbers, texts, strict=True) if t]
            numbers, texts = [n for n, _ in kept], [t for _, t in kept]
        self.pending.numbers.extend(numbers)
        self.pending.texts.extend(texts)


def _only_data(block: str, last_line: str) -> bool:
    """True when no line of ``block`` has a comment or is blank (substring tests, no per-line loop)."""
    if "#" in block or block.startswith("\n") or not last_line.strip():
        return False
    # A blank line ends "\n\n", or " \n"/"\t\n" if it holds only spaces or tabs (those also catch
    # data rows with trailing blanks, which then merely take the slow path).
    return not any(mark in block for mark in ("\n\n", " \n", "\t\n", "\f", "\v", "\r"))


def _split(text: str, delimiter: str | None) -> list[str]:
    return text.split(delimiter) if delimiter is not None else text.split()


def _number(field: str, decimal_comma: bool) -> float | None:
    text = field.strip().strip('"').strip()
    if decimal_comma:
        text = text.replace(",", ".")
    try:
        return float(text)
    except ValueError:
        return None


def _looks_numeric(row: str) -> bool:
    fields = [f for f in re.split(r"[;,\t ]+", row) if f]
    return bool(fields) and all(_number(f, False) is not None for f in fields)


def _delimiter_name(delimiter: str | None) -> str:
    return next(name for name, value in _DELIMITERS.items() if value == delimiter)


def _detect_delimiter(path: Path, rows: list[str], decimal: str) -> str | None:
    """The delimiter that best splits the probe rows into a constant number (>= 2) of numeric fields.

    Each candidate scores the share of rows with its most common field count plus the share of rows
    whose fields are all numbers, so a single bad cell does not change the verdict (the parser then
    names its line). None (whitespace) also stands for a single-column file.
    """
    scored = []
    for order, name in enumerate(_DETECT_ORDER):
        delimiter = _DELIMITERS[name]
        if delimiter == "," and decimal == ",":
            continue
        counts = [len(_split(row, delimiter)) for row in rows]
        common = max(set(counts), key=counts.count)
        if common < 2:
            continue
        comma = decimal == "," or (decimal == "auto" and delimiter != ",")
        numeric = sum(all(_number(f, comma) is not None for f in _split(row, delimiter)) for row in rows)
        scored.append(((counts.count(common) + numeric) / len(rows), -order, name))
    return _DELIMITERS[max(scored)[2]] if scored else None


def _declared_rate(path: Path, comments: list[str]) -> float | None:
    for comment in comments:
        match = _RATE_COMMENT.match(comment)
        if match:
            try:
                rate = parse_quantity(match.group("value"), "Hz")
            except QuantityError as exc:
                raise InputError(
                    path,
                    f"comment line declares a sample rate that cannot be read: {exc}",
                    'write it as "# sample_rate_hz = 250000" or "# sample rate: 250 kHz"',
                    key="sample_rate",
                ) from None
            if rate > 0:
                return rate
    return None


def _parse_rows(path: Path, layout: _Layout, rows: _Rows, first_sample: int) -> np.ndarray:
    """Parse rows into an array with one column per used field (current, then time if checked)."""
    texts = rows.texts
    if layout.decimal_comma:
        texts = [text.replace(",", ".") for text in texts]
    try:
        return np.loadtxt(
            texts,
            delimiter=layout.delimiter,
            usecols=layout.usecols,
            ndmin=2,
            dtype=np.float64,
            comments=None,
            quotechar='"',
            encoding=None,
        )
    except ValueError as exc:
        _raise_bad_row(path, layout, rows, first_sample, exc)
        raise  # pragma: no cover - _raise_bad_row always raises


def _raise_bad_row(path: Path, layout: _Layout, rows: _Rows, first_sample: int, exc: Exception) -> None:
    """Find the first row NumPy could not read and report it with its line number."""
    for offset, (lineno, text) in enumerate(rows):
        fields = _split(text, layout.delimiter)
        for column in layout.usecols:
            if column >= len(fields):
                raise InputError(
                    path,
                    f"line {lineno} has {len(fields)} field(s), so no {layout.describe(column)}",
                    "complete or remove the line (comment lines start with #)",
                    sample_index=first_sample + offset,
                ) from None
            if _number(fields[column], layout.decimal_comma) is None:
                raise InputError(
                    path,
                    f"line {lineno}, {layout.describe(column)}: {fields[column].strip()!r} is not a number",
                    "correct or remove the line (comment lines start with #)",
                    sample_index=first_sample + offset,
                ) from None
    raise InputError(
        path,
        f"rows from line {rows[0][0]} cannot be read ({exc})",
        "check the delimiter and decimal mark",
        sample_index=first_sample,
    ) from None


def _rate_from_time(path: Path, layout: _Layout, rows: _Rows) -> float:
    """Sample rate from the first rows of the time column, with the precision those rows support."""
    if len(rows) < 2:
        raise InputError(
            path,
            "has a single data row, too few to derive the sample rate from the time column",
            'give sample_rate in the [reader] section or "sample_rate_hz" in the sidecar',
            key="sample_rate",
        )
    times = _parse_rows(path, layout, rows, 0)[:, 1] * layout.time_scale
    span = times[-1] - times[0]
    if not span > 0:
        raise InputError(
            path,
            f"{layout.describe(layout.time_column)} does not increase over lines {rows[0][0]} "
            f"to {rows[-1][0]}",
            'if the file has no time column set time_column = "none" and give sample_rate',
            key="time_column",
        )
    # A gap or duplicate among these rows must be reported as such, not spread into the rate: check the
    # steps against their median first, then take the rate from the end points (the precise estimate).
    _check_steps(path, layout, times, rows, float(np.median(np.diff(times))), None, 0)
    index = np.arange(times.size)
    step = span / (times.size - 1)
    residual = float(np.max(np.abs(times - (times[0] + index * step))))
    rate = 1.0 / step
    # The written times are rounded; the rate is known only to about 2*residual/span. Take the number
    # with the fewest significant digits inside that band, so "0.000004" steps give exactly 250000 Hz.
    tolerance = rate * max(1e-9, 2.0 * residual / span)
    for digits in range(1, 17):
        rounded = float(f"{rate:.{digits}g}")
        if abs(rounded - rate) <= tolerance:
            rate = rounded
            break
    _check_steps(path, layout, times, rows, 1.0 / rate, None, 0)
    return rate


def _check_steps(
    path: Path,
    layout: _Layout,
    times: np.ndarray,
    rows: _Rows,
    step: float,
    previous: float | None,
    first_sample: int,
) -> None:
    """Raise at the first row whose time step differs from ``step`` by more than half a sample."""
    series = times if previous is None else np.concatenate(([previous], times))
    steps = np.diff(series)
    bad = np.flatnonzero(np.abs(steps - step) > 0.5 * step)
    if bad.size:
        row = int(bad[0]) + (0 if previous is None else -1) + 1
        raise InputError(
            path,
            f"time column is not uniformly sampled at line {rows[row][0]}: step {steps[bad[0]]:.6g} s "
            f"from the row before, expected {step:.6g} s ({1.0 / step:.9g} Hz from the first rows) within "
            "half a sample",
            "remove duplicated rows or fill the gap; or give sample_rate in the [reader] section (the time "
            "column is then not used)",
            sample_index=first_sample + row,
            key=layout.names[layout.time_column] if layout.names else "time_column",
        )


def _stream(path: Path, layout: _Layout, chunk_samples: int) -> Iterator[np.ndarray]:
    """Yield current chunks (A), parsing at most ``_BLOCK_LINES`` rows at once."""
    previous = None
    sample = 0
    with _open_text(path, layout.encoding) as handle:
        source = _RowSource(path, handle, layout.data_start_line)
        pieces: list[np.ndarray] = []
        held = 0
        while True:
            block = source.take(min(_BLOCK_LINES, chunk_samples - held))
            if block:
                values = _parse_rows(path, layout, block, sample)
                if layout.time_column is not None:
                    times = values[:, 1] * layout.time_scale
                    _check_steps(path, layout, times, block, layout.step_s, previous, sample)
                    previous = float(times[-1])
                pieces.append(layout.scaling.apply(values[:, 0]))
                held += len(block)
                sample += len(block)
            if pieces and (held == chunk_samples or not block):
                yield pieces[0] if len(pieces) == 1 else np.concatenate(pieces)
                pieces, held = [], 0
            if not block:
                return
