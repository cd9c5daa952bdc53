"""Reading SDTM datasets: SAS transport (``.xpt``), CDISC Dataset-JSON v1.1
(``.json``, ``.ndjson``) and CSV, the same table whatever the format.

- ``.xpt`` is read with pyreadstat (SAS transport version 5 stores numbers as IBM
  floating point; zero is eight zero bytes and reads back as 0.0 -- pandas' own SAS
  reader gives 5.4e-79 for it).  A transport file is made of 80-byte records, so a
  file whose length is not a multiple of 80 is truncated and refused.
- Dataset-JSON v1.1 (CDISC, 2024: top-level ``datasetJSONVersion``, ``name``,
  ``records``, ``columns`` with ``name`` and ``dataType``, ``rows`` as arrays; the
  NDJSON form puts the metadata on the first line and one row per line) and the
  earlier v1.0 layout (``clinicalData``/``referenceData`` -> ``itemGroupData``);
  a ``records`` count that disagrees with the rows is refused.
- Only the variables pkcalc uses are read, so an unreadable byte in a variable it
  does not use cannot refuse the dataset.  Text is decoded from the file's stated
  encoding (UTF-8 when none) and, where that fails, as Latin-1 -- said in the import
  report.
- Variable names are upper-cased; empty cells are empty text; numbers stored as
  numbers stay numbers.
"""

from __future__ import annotations

import json
import re
from dataclasses import dataclass, field
from io import StringIO
from pathlib import Path

import numpy as np
import pandas as pd

from ...errors import PkcalcInputError

__all__ = ["SUFFIXES", "Dataset", "find_datasets", "read_dataset", "text_matches"]

#: Accepted dataset files, in the order preferred when a domain comes in several.
SUFFIXES = (".xpt", ".json", ".ndjson", ".csv")


@dataclass
class Dataset:
    """One SDTM dataset as read.

    Attributes
    ----------
    domain : str
        ``pc``, ``ex``, ...
    name : str
        The file name (or ``PC frame`` for a DataFrame), used in messages.
    frame : pandas.DataFrame
        Upper-case variable names; text as ``str`` ('' when empty), numbers as float.
    notes : list of str
        How it was read (encoding fallbacks).
    """

    domain: str
    name: str
    frame: pd.DataFrame
    path: str = ""
    notes: list[str] = field(default_factory=list)
    _seq: object = field(default=None, repr=False)
    _cache: dict = field(default_factory=dict, repr=False)

    def __len__(self) -> int:
        return len(self.frame)

    def has(self, var: str) -> bool:
        return var in self.frame.columns

    def text(self, var: str) -> pd.Series:
        """The variable as text ('' when missing or empty; computed once)."""
        key = ("text", var)
        if key not in self._cache:
            if var not in self.frame.columns:
                out = pd.Series("", dtype="string[pyarrow]", index=self.frame.index)
            else:
                col = self.frame[var]
                if pd.api.types.is_numeric_dtype(col) and not pd.api.types.is_bool_dtype(col):
                    out = _number_text(col.to_numpy(float), self.frame.index)
                else:
                    out = col
            self._cache[key] = out
        return self._cache[key]

    def number(self, var: str) -> tuple[pd.Series, pd.Series]:
        """The variable as numbers (NaN where empty) and where it holds text that is not
        a number (``1,5``, ``abc``, ``n/a``)."""
        key = ("number", var)
        if key in self._cache:
            return self._cache[key]
        if var not in self.frame.columns:
            nan = pd.Series(np.nan, index=self.frame.index)
            out = nan, pd.Series(False, index=self.frame.index)
        else:
            col = self.frame[var]
            if pd.api.types.is_numeric_dtype(col) and not pd.api.types.is_bool_dtype(col):
                values = col.astype(float)
                out = values, pd.Series(np.isinf(values.to_numpy()), index=col.index)
            else:
                raw = self.text(var)
                values = _numbers(raw)
                bad = (values.isna() & (raw != "")) | np.isinf(values.fillna(0.0))
                out = values.where(~bad), bad
        self._cache[key] = out
        return out

    def labels_fast(self, rows) -> list[str]:
        """:meth:`labels` as a list of Python text."""
        seq = self._sequence()
        var = f"{self.domain.upper()}SEQ"
        if seq is None:
            return [f"{self.name} row {i + 1}" for i in np.asarray(rows).tolist()]
        return [f"{self.name} row {i + 1} ({var} {seq[i]})" if seq[i] else
                f"{self.name} row {i + 1}" for i in np.asarray(rows).tolist()]

    def label(self, i: int) -> str:
        """Row ``i`` (0-based) in words: ``pc.xpt row 17 (PCSEQ 5)``."""
        seq = self._sequence()
        text = f"{self.name} row {i + 1}"
        if seq is not None and seq[i]:
            text += f" ({self.domain.upper()}SEQ {seq[i]})"
        return text

    def labels(self, rows) -> pd.Series:
        """:meth:`label` of many rows at once (a text Series)."""
        rows = np.asarray(rows, dtype=np.int64)
        text = pd.Series(rows + 1, dtype="int64").astype("string[pyarrow]")
        text = f"{self.name} row " + text
        seq = self._sequence()
        if seq is not None:
            s = pd.Series(seq[rows], dtype="string[pyarrow]")
            var = f" ({self.domain.upper()}SEQ "
            text = text.where(s == "", text + var + s + ")")
        return text

    def _sequence(self):
        if self._seq is None:
            var = f"{self.domain.upper()}SEQ"
            self._seq = self.text(var).to_numpy(dtype=object) if self.has(var) else False
        return None if self._seq is False else self._seq


def text_matches(text: pd.Series, pattern: str) -> np.ndarray:
    """Which values of a text Series match the regular expression ``pattern`` at their
    start, ignoring case (pyarrow's compute: several times faster than pandas' per-value
    matching on SDTM-sized columns)."""
    import pyarrow as pa
    import pyarrow.compute as pc

    anchored = pattern if pattern.startswith("^") else "^(?:" + pattern + ")"
    found = pc.match_substring_regex(pa.array(text, type=pa.string()), anchored,
                                     ignore_case=True)
    return np.asarray(found.fill_null(False).to_numpy(zero_copy_only=False), bool)


def _numbers(raw: pd.Series) -> pd.Series:
    """Text as numbers (NaN where empty or not a number): pyarrow's cast when every
    value is a number, pandas' parser (per value) otherwise."""
    import pyarrow as pa
    import pyarrow.compute as pc

    try:
        arr = pa.array(raw, type=pa.string())
        empty = pc.if_else(pc.equal(arr, ""), pa.scalar(None, pa.string()), arr)
        values = pc.cast(empty, pa.float64()).to_numpy(zero_copy_only=False)
        return pd.Series(values, index=raw.index)
    except (pa.ArrowInvalid, pa.ArrowTypeError):
        return pd.to_numeric(raw.where(raw != ""), errors="coerce").astype(float)


def _arrow_text(values) -> pd.Series:
    """Python text values as a pandas string Series; a column with few distinct values
    (most SDTM variables) goes through a dictionary, which is faster."""
    import pyarrow as pa

    sample = pd.unique(np.asarray(values[:2000], dtype=object))
    if len(sample) * 4 > min(len(values), 2000):
        return pd.Series(values, dtype="string[pyarrow]")
    array = np.asarray(values, dtype=object)
    codes, uniq = pd.factorize(array)
    if len(uniq) * 4 > max(len(array), 1) or (codes < 0).any():
        return pd.Series(values, dtype="string[pyarrow]")
    text = [u if isinstance(u, str) else str(u) for u in uniq]
    decoded = pa.DictionaryArray.from_arrays(pa.array(codes.astype(np.int32)),
                                             pa.array(text, type=pa.string())).cast(pa.string())
    return pd.Series(pd.arrays.ArrowStringArray(decoded))


def _number_text(values: np.ndarray, index) -> pd.Series:
    """Numbers as text ('' for NaN): whole numbers without a decimal point (sequence
    numbers), others with 15 significant digits."""
    finite = np.isfinite(values)
    if np.all(values[finite] == np.round(values[finite])) and \
            np.all(np.abs(values[finite]) < 1e15):
        whole = pd.Series(np.where(finite, values, 0).astype(np.int64), index=index)
        return whole.astype("string[pyarrow]").where(finite, "")
    return pd.Series([f"{x:.15g}" if x == x else "" for x in values],
                     dtype="string[pyarrow]", index=index)


def find_datasets(folder: Path, domains) -> tuple[dict[str, Path], list[str]]:
    """The file of each domain present in ``folder`` (when a domain comes in several
    formats the first of :data:`SUFFIXES` is read, with a note naming the others)."""
    found: dict[str, list[Path]] = {}
    for p in sorted(folder.iterdir()):
        if p.is_file() and p.stem.lower() in domains and p.suffix.lower() in SUFFIXES:
            found.setdefault(p.stem.lower(), []).append(p)
    chosen: dict[str, Path] = {}
    notes: list[str] = []
    for domain, paths in found.items():
        paths.sort(key=lambda p: SUFFIXES.index(p.suffix.lower()))
        chosen[domain] = paths[0]
        if len(paths) > 1:
            notes.append(f"{domain.upper()} comes in {len(paths)} copies "
                         f"({', '.join(p.name for p in paths)}): {paths[0].name} read, "
                         f"{', '.join(p.name for p in paths[1:])} ignored")
    return chosen, notes


def read_dataset(path: str | Path, domain: str, wanted: set[str]) -> Dataset:
    """Read the ``wanted`` variables of one dataset file (see the module docstring)."""
    path = Path(path)
    suffix = path.suffix.lower()
    if path.stat().st_size == 0:
        raise PkcalcInputError("the file is empty (0 bytes)", file=str(path))
    if suffix == ".xpt":
        frame, notes = _read_xpt(path, wanted)
    elif suffix in (".json", ".ndjson"):
        frame, notes = _read_json(path, wanted)
    else:
        frame, notes = _read_csv(path, wanted)
    return Dataset(domain, path.name, _normalise(frame), str(path), notes)


def frame_dataset(frame: pd.DataFrame, domain: str, wanted: set[str]) -> Dataset:
    """A dataset given as a pandas DataFrame (the same rules as a file)."""
    if not isinstance(frame, pd.DataFrame):
        raise PkcalcInputError(f"got {type(frame).__name__}", field=domain,
                               expected="a pandas DataFrame or a folder of datasets")
    keep = [c for c in frame.columns if str(c).strip().upper() in wanted]
    out = frame[keep].copy().reset_index(drop=True)
    out.columns = [str(c).strip().upper() for c in out.columns]
    return Dataset(domain, f"{domain.upper()} frame", _normalise(out), "")


def _normalise(frame: pd.DataFrame) -> pd.DataFrame:
    """Upper-case names; numbers as float; everything else as stripped text ('' when
    empty) in pandas' string dtype (its vectorised string operations keep a large PC
    dataset fast)."""
    names = [str(c).strip().upper() for c in frame.columns]
    if len(set(names)) < len(names):
        dup = next(n for n in names if names.count(n) > 1)
        raise PkcalcInputError(f"variable {dup} appears twice", field=dup,
                               expected="each variable once")
    out = {}
    for name, c in zip(names, frame.columns, strict=True):
        col = frame[c]
        if pd.api.types.is_numeric_dtype(col) and not pd.api.types.is_bool_dtype(col):
            out[name] = col.to_numpy(float)
            continue
        if not pd.api.types.is_string_dtype(col) or col.dtype == object:
            values = col.to_numpy(dtype=object)
            if pd.api.types.infer_dtype(values, skipna=True) not in ("string", "empty"):
                values = np.array([v if isinstance(v, str) or v is None or v != v else str(v)
                                   for v in values], dtype=object)
            col = pd.Series(values, dtype="string[pyarrow]")
        else:
            col = col.astype("string[pyarrow]")
        out[name] = col.fillna("").str.strip().to_numpy(dtype=object) \
            if len(col) == 0 else col.fillna("").str.strip().reset_index(drop=True)
    return pd.DataFrame(out, index=pd.RangeIndex(len(frame)))


_OBS_HEADER = b"HEADER RECORD*******OBS     HEADER RECORD!!!!!!!"


def _check_whole_rows(path: Path, size: int, meta) -> None:
    """A transport file cut at an 80-byte boundary inside its data: after the one
    observation header the data are whole rows padded with blanks to 80 bytes, so
    anything else left after the last whole row is a cut row (a cut exactly at a
    row and record boundary cannot be seen: the format holds no row count)."""
    widths = getattr(meta, "variable_storage_width", None) or {}
    width = sum(widths.values())
    if not width:
        return
    with path.open("rb") as f:
        head = f.read(min(size, 1 << 20))
        at = head.find(_OBS_HEADER)
        if at < 0 or head.find(_OBS_HEADER, at + 1) >= 0:
            return                              # not found early, or several members
        start = at + 80
        rest = (size - start) % width
        if rest == 0:
            return
        f.seek(size - rest)
        tail = f.read(rest)
    if rest >= 80 or tail.strip(b" "):
        rows = (size - start) // width
        raise PkcalcInputError(f"is truncated: its last row is cut ({rows} whole rows, then "
                               f"{rest} bytes of a {width}-byte row)", file=str(path),
                               expected="the whole file as delivered")


def _read_xpt(path: Path, wanted: set[str]) -> tuple[pd.DataFrame, list[str]]:
    import pyreadstat

    size = path.stat().st_size
    if size % 80:
        raise PkcalcInputError(f"is truncated: a SAS transport file is made of 80-byte "
                               f"records, this one has {size} bytes", file=str(path),
                               expected="the whole file as delivered")
    try:
        _, meta = pyreadstat.read_xport(str(path), metadataonly=True)
    except Exception as exc:  # the reader raises several kinds for a damaged file
        raise PkcalcInputError(f"is not a readable SAS transport file "
                               f"({exc.__class__.__name__})", file=str(path)) from None
    _check_whole_rows(path, size, meta)
    use = [c for c in meta.column_names if c.strip().upper() in wanted]
    notes: list[str] = []
    options = {"usecols": use, "output_format": "dict", "disable_datetime_conversion": True}
    try:
        data, _ = pyreadstat.read_xport(str(path), encoding=meta.file_encoding or None,
                                        **options)
    except UnicodeDecodeError:
        data, _ = pyreadstat.read_xport(str(path), encoding="latin1", **options)
        notes.append(f"{path.name}: text is not UTF-8; read as Latin-1")
    except Exception as exc:
        raise PkcalcInputError(f"is not a readable SAS transport file "
                               f"({exc.__class__.__name__})", file=str(path)) from None
    kinds = getattr(meta, "readstat_variable_types", {}) or {}
    columns = {}
    for name, values in data.items():
        if kinds.get(name, "string") != "string" or (isinstance(values, np.ndarray)
                                                     and values.dtype.kind in "fiu"):
            columns[name] = np.asarray(values, dtype=float)    # None (missing) -> NaN
        else:
            columns[name] = _arrow_text(values)
    return pd.DataFrame(columns, index=pd.RangeIndex(len(next(iter(data.values()), [])))), notes


def _decode(path: Path) -> tuple[str, list[str]]:
    data = path.read_bytes()
    try:
        return data.decode("utf-8-sig"), []
    except UnicodeDecodeError:
        return data.decode("latin-1"), [f"{path.name}: text is not UTF-8; read as Latin-1"]


def _read_csv(path: Path, wanted: set[str]) -> tuple[pd.DataFrame, list[str]]:
    """A CSV dataset read by pyarrow's CSV reader (the variables used only, as text)."""
    import csv
    from io import BytesIO

    data = path.read_bytes()
    notes: list[str] = []
    if data.startswith(b"\xef\xbb\xbf"):
        data = data[3:]
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError:
        text = data.decode("latin-1")
        data = text.encode("utf-8")
        notes.append(f"{path.name}: text is not UTF-8; read as Latin-1")
    header = next(csv.reader(StringIO(text[:65536].split("\n", 1)[0])), [])
    keys = [h.strip().upper() for h in header]
    if len(set(keys)) < len(keys):
        dup = next(k for k in keys if keys.count(k) > 1)
        raise PkcalcInputError(f"variable {dup} appears twice in the header", file=str(path),
                               field=dup, expected="each variable once")
    use = [h for h, k in zip(header, keys, strict=True) if k in wanted]
    try:
        frame = pd.read_csv(BytesIO(data), dtype=str, keep_default_na=False, engine="pyarrow",
                            usecols=use)
    except Exception as exc:  # pyarrow and pandas raise several kinds for a broken table
        first = str(exc).splitlines()[0] if str(exc) else exc.__class__.__name__
        raise PkcalcInputError(f"not a readable CSV table ({first})", file=str(path)) from None
    return frame, notes


_BATCH = 20_000
_NUMERIC_TYPES = ("integer", "float", "double", "decimal")


class _Columns:
    """Rows of a Dataset-JSON file gathered into columns a batch at a time (the wanted
    variables only, as arrow text or float arrays), so that memory stays near the size
    of the data rather than of millions of Python objects."""

    def __init__(self, columns: list[dict], wanted: set[str], path: Path) -> None:
        self.path = path
        self.names = [str(c.get("name", "")) for c in columns]
        self.keep = [i for i, n in enumerate(self.names) if n.strip().upper() in wanted]
        self.numeric = {i for i in self.keep
                        if str(columns[i].get("dataType", "string")).lower() in _NUMERIC_TYPES}
        self.chunks: dict[int, list] = {i: [] for i in self.keep}
        self.batch: list = []
        self.count = 0

    def add(self, rows: list) -> None:
        """Take many rows (each a list of one value per column)."""
        n = len(self.names)
        if rows and ({type(r) for r in rows} != {list} or set(map(len, rows)) != {n}):
            bad = next(k for k, r in enumerate(rows) if not isinstance(r, list) or len(r) != n)
            raise PkcalcInputError(f"row {self.count + bad + 1} does not have one value per "
                                   f"column ({n})", file=str(self.path),
                                   expected="rows as arrays matching 'columns'")
        self.batch.extend(rows)
        self.count += len(rows)
        if len(self.batch) >= _BATCH:
            self.flush()

    def flush(self) -> None:
        import pyarrow as pa

        if not self.batch:
            return
        columns = list(zip(*self.batch, strict=True))
        for i in self.keep:
            values = columns[i]
            if i in self.numeric:
                try:
                    self.chunks[i].append(np.array(values, dtype=float))
                except (TypeError, ValueError):  # decimals written as text
                    self.chunks[i].append(pd.to_numeric(pd.Series(values, dtype=object),
                                                        errors="coerce").to_numpy(float))
                continue
            try:
                self.chunks[i].append(pa.array(values, type=pa.string()))
            except (pa.ArrowInvalid, pa.ArrowTypeError):  # numbers in a text column
                self.chunks[i].append(pa.array([v if v is None or isinstance(v, str) else
                                                str(v) for v in values], type=pa.string()))
        self.batch = []

    def frame(self) -> pd.DataFrame:
        import pyarrow as pa

        self.flush()
        data = {}
        for i in self.keep:
            if i in self.numeric:
                data[self.names[i]] = (np.concatenate(self.chunks[i]) if self.chunks[i]
                                       else np.zeros(0))
            else:
                arr = pa.chunked_array(self.chunks[i], type=pa.string()).combine_chunks()
                data[self.names[i]] = pd.Series(pd.arrays.ArrowStringArray(arr))
        return pd.DataFrame(data, index=pd.RangeIndex(self.count))


def _skip(text: str, i: int) -> int:
    while i < len(text) and text[i] in " \t\r\n":
        i += 1
    return i


def _read_json(path: Path, wanted: set[str]) -> tuple[pd.DataFrame, list[str]]:
    """Dataset-JSON: the top-level object read key by key, its rows streamed into
    columns (:class:`_Columns`); NDJSON line by line; the v1.0 layout parsed whole."""
    text, notes = _decode(path)
    decoder = json.JSONDecoder()
    try:
        if path.suffix.lower() == ".ndjson":
            lines = iter(text.splitlines())
            meta = json.loads(next((ln for ln in lines if ln.strip()), "{}"))
            if not isinstance(meta, dict) or "columns" not in meta:
                raise PkcalcInputError("the first line holds no 'columns'", file=str(path),
                                       expected="CDISC Dataset-JSON v1.1 (NDJSON)")
            cols = _Columns(meta["columns"], wanted, path)
            cols.add([json.loads(ln) for ln in lines if ln.strip()])
            return _checked(cols, meta.get("records"), path), notes
        meta, cols = _stream_object(text, decoder, wanted, path)
    except json.JSONDecodeError as exc:
        raise PkcalcInputError(f"is not valid JSON ({exc.msg} at character {exc.pos})",
                               file=str(path), expected="CDISC Dataset-JSON") from None
    if cols is None:  # the v1.0 layout, or rows before columns
        columns, rows, records = _json_layout(meta, None, path)
        cols = _Columns(columns, wanted, path)
        cols.add(list(rows))
        return _checked(cols, records, path), notes
    return _checked(cols, meta.get("records"), path), notes


def _checked(cols: _Columns, records, path: Path) -> pd.DataFrame:
    if isinstance(records, int) and records != cols.count:
        raise PkcalcInputError(f"'records' says {records} rows but {cols.count} are present "
                               "(a truncated file?)", file=str(path))
    return cols.frame()


_BOUNDARY = re.compile(r"\]\s*,\s*\[")
_SPAN = 4_000_000  # characters of rows parsed at once


def _rows(text: str, i: int, decoder, cols: _Columns) -> int:
    """Parse the rows array from ``i`` (just after its ``[``) into ``cols``; returns the
    index after its ``]``.  Spans of many rows are parsed by ``json.loads`` at once, cut
    where one row ends and the next begins; a cut that falls inside a text value cannot
    parse and is taken row by row instead."""
    i = _skip(text, i)
    while i < len(text) and text[i] != "]":
        m = _BOUNDARY.search(text, i + _SPAN) if len(text) - i > 2 * _SPAN else None
        if m is not None:
            try:
                cols.add(json.loads("[" + text[i:m.start() + 1] + "]"))
                i = m.end() - 1
                continue
            except json.JSONDecodeError:
                pass
            stop = m.end() - 1
            while i < stop:
                row, i = decoder.raw_decode(text, i)
                cols.add([row])
                i = _skip(text, i)
                if text[i] == ",":
                    i = _skip(text, i + 1)
            continue
        end = text.rfind("]", i)
        try:                                  # the rest of the rows, up to the last ']'
            rest = json.loads("[" + text[i:end] + "]")
            tail = _skip(text, end + 1)
            if tail < len(text) and text[tail] in ",}":
                cols.add(rest)
                return end + 1
        except json.JSONDecodeError:
            pass
        row, i = decoder.raw_decode(text, i)
        cols.add([row])
        i = _skip(text, i)
        if i < len(text) and text[i] == ",":
            i = _skip(text, i + 1)
    return i + 1


def _stream_object(text: str, decoder, wanted: set[str], path: Path):
    """The top-level object's keys (``rows`` streamed when ``columns`` came first)."""
    i = _skip(text, 0)
    if i >= len(text) or text[i] != "{":
        raise PkcalcInputError("is not a Dataset-JSON object", file=str(path),
                               expected="CDISC Dataset-JSON v1.1")
    meta: dict = {}
    cols = None
    i += 1
    while True:
        i = _skip(text, i)
        if i < len(text) and text[i] == "}":
            return meta, cols
        key, i = decoder.raw_decode(text, i)
        i = _skip(text, i)
        if i >= len(text) or text[i] != ":":
            raise json.JSONDecodeError("expected ':'", text, i)
        i = _skip(text, i + 1)
        if key == "rows" and isinstance(meta.get("columns"), list) and text[i] == "[":
            cols = _Columns(meta["columns"], wanted, path)
            i = _rows(text, i + 1, decoder, cols)
        else:
            meta[key], i = decoder.raw_decode(text, i)
        i = _skip(text, i)
        if i < len(text) and text[i] == ",":
            i += 1


def _json_layout(meta: dict, rows, path: Path):
    """(columns, rows, records) of a v1.1 document, or of the v1.0 layout."""
    if "columns" in meta:
        records = meta.get("records")
        return meta["columns"], rows if rows is not None else meta.get("rows", []), (
            records if isinstance(records, int) else None)
    for key in ("clinicalData", "referenceData"):
        groups = (meta.get(key) or {}).get("itemGroupData") or {}
        for group in groups.values():
            items = [c for c in group.get("items", []) if c.get("name") != "ITEMGROUPDATASEQ"]
            data = [r[1:] for r in group.get("itemData", [])] if group.get("items", [{}])[0] \
                .get("name") == "ITEMGROUPDATASEQ" else group.get("itemData", [])
            records = group.get("records")
            return items, data, records if isinstance(records, int) else None
    raise PkcalcInputError("holds no 'columns' and 'rows'", file=str(path),
                           expected="CDISC Dataset-JSON v1.1")
