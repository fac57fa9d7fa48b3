"""CSV and historian exports as the messages the asset's sensors would have published.

A table has one time column and one column per channel. `csv_messages` reads it row
by row and yields `(arrival_time, topic, payload)` for each of the asset's channels
that has a value in the row, in the payload form the channel's decoder reads (so the
daemon's own decoders, windows and features run on it unchanged):

* `json`:        ``{<ts_field>: t, <value_field>: v}`` (dotted field names nest);
* `json-batch`:  a block of one sample, ``{<ts_field>: t, <values_field>: [v],
                 <rate_field>: <the channel's rate_hz>}``;
* `text`:        the number as text; its time is the arrival time, which here is the
                 row's time (never the wall clock).

The arrival time of every message is the row's own time, so `ingest.max_clock_skew_s`
is judged against the data's clock: a two-year-old export is not "skewed".

Columns: the channel's `column:` in the config, else the channel's name; `column_map`
(channel -> header) overrides both. Times: ISO 8601 date-times (``2024-03-01
10:15:00``, ``2024-03-01T10:15:00.250``, an offset such as ``+01:00`` or ``Z`` where
the export has one; a time without a zone is taken as UTC), unix seconds, or unix
milliseconds when asked for (`time_format="unix_ms"`; never guessed). Delimiter:
``,``, ``;`` or a tab, found from the header line unless given; with ``;`` a decimal
comma (``1,5``) is read as a decimal point, as spreadsheet exports in many locales
write it. An empty cell is a missing sample; a cell that is not a number is skipped
and counted (`CsvReader.skipped`). Rows must be in time order (a historian export
is); a row earlier than the one before is an error naming its line.

Pure standard library apart from the config types.
"""

from __future__ import annotations

import csv
import io
import json
import math
import os
import re
from collections import Counter
from collections.abc import Iterator, Mapping
from datetime import UTC, datetime
from pathlib import Path
from typing import Any, NamedTuple

from agent.config.load import AssetConfig, ChannelConfig, Decoder
from agent.errors import DatasetError

TIME_FORMATS = ("auto", "iso", "unix", "unix_ms")
_DELIMITERS = (",", ";", "\t")
_DECIMAL_COMMA = re.compile(r"^[+-]?\d*,\d+(?:[eE][+-]?\d+)?$")


class TabularError(DatasetError):
    """A table that cannot be read as the asset's channels; names the file and line."""

    def __init__(self, path: str, reason: str, line: int | None = None) -> None:
        self.path = path
        self.reason = reason
        self.line = line
        where = f"{path}:{line}" if line is not None else path
        super().__init__(f"csv {where}: {reason}")


def sniff_delimiter(header: str) -> str:
    """The delimiter the header line uses most of (`,` when it has none)."""
    counts = {d: header.count(d) for d in _DELIMITERS}
    best = max(_DELIMITERS, key=lambda d: counts[d])
    return best if counts[best] else ","


def parse_time(text: str, time_format: str = "auto") -> float:
    """Unix seconds from an ISO 8601 date-time (no zone: UTC), unix seconds, or (only
    when `time_format` is `unix_ms`, never guessed) unix milliseconds.

    ValueError when `text` is neither (or not the one `time_format` asks for).
    """
    s = text.strip()
    if time_format == "unix_ms":
        try:
            ms = float(s)
        except ValueError:
            raise ValueError(f"{s!r} is not unix milliseconds") from None
        if not math.isfinite(ms):
            raise ValueError(f"{s!r} is not a finite time")
        return ms / 1000.0
    if time_format in ("auto", "unix"):
        try:
            v = float(s)
        except ValueError:
            if time_format == "unix":
                raise ValueError(f"{s!r} is not unix seconds") from None
        else:
            if not math.isfinite(v):
                raise ValueError(f"{s!r} is not a finite time")
            return v
    try:
        # Python >= 3.11 reads 'YYYY-MM-DD HH:MM:SS[.ffffff]', 'T' or ' ', and 'Z'/offsets.
        dt = datetime.fromisoformat(s)
    except ValueError:
        raise ValueError(f"{s!r} is not an ISO 8601 date-time or unix seconds") from None
    if dt.tzinfo is None:
        dt = dt.replace(tzinfo=UTC)
    return dt.timestamp()


def _nest(dotted: str, value: Any, doc: dict[str, Any]) -> None:
    parts = dotted.split(".")
    cur = doc
    for p in parts[:-1]:
        nxt = cur.setdefault(p, {})
        if not isinstance(nxt, dict):  # two fields nesting into one: the config's problem
            raise ValueError(f"field {dotted!r} nests into a value")
        cur = nxt
    cur[parts[-1]] = value


def payload_for(ch: ChannelConfig, t: float, v: float) -> bytes:
    """The payload a sensor of channel `ch` would publish for sample (t, v)."""
    if ch.decoder is Decoder.TEXT:
        return repr(v).encode("ascii")
    doc: dict[str, Any] = {}
    _nest(ch.ts_field, t, doc)
    if ch.decoder is Decoder.JSON_BATCH:
        _nest(ch.values_field, [v], doc)
        _nest(ch.rate_field, ch.rate_hz, doc)
    else:
        _nest(ch.value_field, v, doc)
    return json.dumps(doc, separators=(",", ":")).encode("ascii")


class CsvReader:
    """One table read as one asset's messages; counts what it skipped.

    `messages()` yields `(arrival_time, topic, payload)` in row order, channel order
    within a row. `fraction()` is how far through the file the reader is (0..1, by
    bytes), for a progress line. `rows`, `samples` and `skipped` (reason -> count:
    `empty`, `not_a_number`, `non_finite`) are counted as it goes.
    """

    def __init__(self, asset: AssetConfig, path: str | os.PathLike[str], *,
                 time_column: str | None = None, column_map: Mapping[str, str] | None = None,
                 delimiter: str | None = None, time_format: str = "auto",
                 encoding: str = "utf-8-sig") -> None:
        if time_format not in TIME_FORMATS:
            raise TabularError(str(path), f"time format must be one of {', '.join(TIME_FORMATS)}"
                               f", got {time_format!r}")
        self.asset = asset
        self.path = Path(path)
        self.time_column = time_column
        self.column_map = dict(column_map or {})
        unknown = sorted(set(self.column_map) - {c.name for c in asset.channels})
        if unknown:
            raise TabularError(str(path), f"column mapping names {', '.join(unknown)}, not "
                               f"channels of asset {asset.name} "
                               f"({', '.join(c.name for c in asset.channels)})")
        self.delimiter = delimiter
        self.time_format = time_format
        self.encoding = encoding
        self.rows = 0
        self.samples = 0
        self.skipped: Counter[str] = Counter()
        self.first_time: float | None = None
        self.last_time: float | None = None
        self._size = 0
        self._raw: io.BufferedReader | None = None

    def column_of(self, ch: ChannelConfig) -> str:
        """The header naming channel `ch`'s column."""
        return self.column_map.get(ch.name) or ch.column or ch.name

    def fraction(self) -> float:
        if self._raw is None or not self._size:
            return 0.0
        try:
            return min(1.0, self._raw.tell() / self._size)
        except (OSError, ValueError):  # closed
            return 1.0

    def messages(self) -> Iterator[tuple[float, str, bytes]]:
        p = str(self.path)
        try:
            raw = open(p, "rb")  # noqa: SIM115 - closed below
        except OSError as e:
            raise TabularError(p, f"cannot open: {e.strerror}") from None
        self._size = os.fstat(raw.fileno()).st_size
        self._raw = raw
        with raw, io.TextIOWrapper(raw, encoding=self.encoding, newline="") as text:
            cols = self._columns(text, p)
            decimal_comma = cols.delimiter == ";"
            fmt = self.time_format
            last = -math.inf
            lineno = 1
            reader = csv.reader(text, delimiter=cols.delimiter)
            while True:
                try:
                    row = next(reader)
                except StopIteration:
                    return
                except (UnicodeDecodeError, csv.Error) as exc:
                    raise TabularError(p, f"cannot be read ({exc})", lineno + 1) from None
                lineno = reader.line_num + 1  # + the header line read apart
                if not row or all(not c.strip() for c in row):
                    continue
                t = _row_time(row, cols, fmt, last, p, lineno)
                if fmt == "auto":  # the first row decides for the whole file
                    fmt = "unix" if _is_number(row[cols.time_index]) else "iso"
                last = t
                if self.first_time is None:
                    self.first_time = t
                self.last_time = t
                self.rows += 1
                yield from self._row_messages(row, cols.channels, t, decimal_comma)

    def _columns(self, text: io.TextIOWrapper, p: str) -> _Columns:
        """Read the header line: the delimiter, the time column, each channel's column."""
        try:
            header_line = text.readline()
        except UnicodeDecodeError:
            raise TabularError(p, f"not {self.encoding} text", 1) from None
        if not header_line.strip():
            raise TabularError(p, "no header line (the first line names the columns)", 1)
        delim = self.delimiter or sniff_delimiter(header_line)
        header = [h.strip() for h in next(csv.reader([header_line], delimiter=delim))]
        index = {h: i for i, h in enumerate(header)}
        tcol = self.time_column or header[0]
        if tcol not in index:
            raise TabularError(p, f"no time column {tcol!r} (columns: {_few(header)})", 1)
        chans: list[tuple[int, ChannelConfig]] = []
        missing = []
        for ch in self.asset.channels:
            col = self.column_of(ch)
            if col not in index:
                missing.append(f"{ch.name} (column {col!r})")
            else:
                chans.append((index[col], ch))
        if missing:
            raise TabularError(p, f"no column for channel(s) {', '.join(missing)} of asset "
                               f"{self.asset.name} (columns: {_few(header)}; map them with "
                               "the channel's `column:` or --column CHANNEL=HEADER)", 1)
        return _Columns(delim, tcol, index[tcol], chans)

    def _row_messages(self, row: list[str], chans: list[tuple[int, ChannelConfig]], t: float,
                      decimal_comma: bool) -> Iterator[tuple[float, str, bytes]]:
        """One row's messages, channel by channel; what is skipped is counted."""
        for ci, ch in chans:
            cell = row[ci].strip() if ci < len(row) else ""
            if not cell:
                self.skipped["empty"] += 1
                continue
            if decimal_comma and _DECIMAL_COMMA.match(cell):
                cell = cell.replace(",", ".")
            try:
                v = float(cell)
            except ValueError:
                self.skipped["not_a_number"] += 1
                continue
            if not math.isfinite(v):
                self.skipped["non_finite"] += 1
                continue
            self.samples += 1
            yield t, ch.topic, payload_for(ch, t, v)


class _Columns(NamedTuple):
    """Where a table's values are: its delimiter, time column and channel columns."""

    delimiter: str
    time_column: str
    time_index: int
    channels: list[tuple[int, ChannelConfig]]


def _row_time(row: list[str], cols: _Columns, fmt: str, last: float, p: str,
              lineno: int) -> float:
    """The row's time; TabularError when it is missing, unreadable or out of order."""
    ti, tcol = cols.time_index, cols.time_column
    if ti >= len(row) or not row[ti].strip():
        raise TabularError(p, f"no time in column {tcol!r}", lineno)
    try:
        t = parse_time(row[ti], fmt)
    except ValueError as exc:
        raise TabularError(p, f"time column {tcol!r}: {exc}", lineno) from None
    if t < last:
        raise TabularError(p, f"time {row[ti].strip()!r} is earlier than the row "
                           "before (sort the export by time)", lineno)
    return t


def _is_number(s: str) -> bool:
    try:
        float(s)
    except ValueError:
        return False
    return True


def _few(names: list[str], limit: int = 8) -> str:
    shown = ", ".join(repr(n) for n in names[:limit])
    return shown + (f" and {len(names) - limit} more" if len(names) > limit else "")


def csv_messages(asset: AssetConfig, path: str | os.PathLike[str], *,
                 time_column: str | None = None, column_map: Mapping[str, str] | None = None,
                 delimiter: str | None = None, time_format: str = "auto"
                 ) -> Iterator[tuple[float, str, bytes]]:
    """`(arrival_time, topic, payload)` for every value of the asset's channels in a CSV
    table, row by row (see the module docstring); `CsvReader` when the counts are wanted."""
    return CsvReader(asset, path, time_column=time_column, column_map=column_map,
                     delimiter=delimiter, time_format=time_format).messages()


def parse_column_map(items: list[str] | None) -> dict[str, str]:
    """`CHANNEL=HEADER` pairs (the `--column` option) as a dict; ValueError when malformed."""
    out: dict[str, str] = {}
    for item in items or []:
        ch, sep, col = item.partition("=")
        if not sep or not ch.strip() or not col.strip():
            raise ValueError(f"--column {item!r}: expected CHANNEL=HEADER")
        out[ch.strip()] = col.strip()
    return out
