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
from dataclasses import dataclass, field
from io import StringIO
from pathlib import Path

import numpy as np
import pandas as pd

from ...errors import PkcalcInputError

__all__ = ["SUFFIXES", "Dataset", "find_datasets", "read_dataset"]

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
                values = pd.to_numeric(raw.where(raw != ""), errors="coerce").astype(float)
                bad = (values.isna() & (raw != "")) | np.isinf(values.fillna(0.0))
                out = values.where(~bad), bad
        self._cache[key] = out
        return out

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
    columns = {}
    for name, values in data.items():
        if isinstance(values, np.ndarray) and values.dtype.kind in "fiu":
            columns[name] = values.astype(float)
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


def _read_json(path: Path, wanted: set[str]) -> tuple[pd.DataFrame, list[str]]:
    text, notes = _decode(path)
    try:
        if path.suffix.lower() == ".ndjson":
            lines = [ln for ln in text.splitlines() if ln.strip()]
            meta = json.loads(lines[0]) if lines else {}
            rows = [json.loads(ln) for ln in lines[1:]]
        else:
            meta = json.loads(text)
            rows = None
    except (json.JSONDecodeError, ValueError) as exc:
        raise PkcalcInputError(f"is not valid JSON ({exc.msg if hasattr(exc, 'msg') else exc})",
                               file=str(path), expected="CDISC Dataset-JSON") from None
    if not isinstance(meta, dict):
        raise PkcalcInputError("is not a Dataset-JSON object", file=str(path),
                               expected="CDISC Dataset-JSON v1.1")
    columns, rows, records = _json_layout(meta, rows, path)
    names = [str(c.get("name", "")) for c in columns]
    if any(not isinstance(r, list) or len(r) != len(names) for r in rows):
        raise PkcalcInputError(f"a row does not have one value per column ({len(names)})",
                               file=str(path), expected="rows as arrays matching 'columns'")
    if records is not None and records != len(rows):
        raise PkcalcInputError(f"'records' says {records} rows but {len(rows)} are present "
                               "(a truncated file?)", file=str(path))
    keep = [i for i, n in enumerate(names) if n.strip().upper() in wanted]
    data = {names[i]: [r[i] for r in rows] for i in keep}
    frame = pd.DataFrame(data)
    for i in keep:
        kind = str(columns[i].get("dataType", "string")).lower()
        if kind in ("integer", "float", "double", "decimal"):
            frame[names[i]] = pd.to_numeric(frame[names[i]].map(
                lambda x: np.nan if x is None or x == "" else x), errors="coerce")
    return frame, notes


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
