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

    def __len__(self) -> int:
        return len(self.frame)

    def has(self, var: str) -> bool:
        return var in self.frame.columns

    def text(self, var: str) -> pd.Series:
        """The variable as text ('' when missing or empty)."""
        if var not in self.frame.columns:
            return pd.Series("", index=self.frame.index, dtype=object)
        col = self.frame[var]
        if pd.api.types.is_numeric_dtype(col) and not pd.api.types.is_bool_dtype(col):
            return col.map(lambda x: "" if pd.isna(x) else f"{x:.15g}").astype(object)
        return col.astype(object).where(col.notna(), "").astype(str).str.strip()

    def number(self, var: str) -> tuple[pd.Series, pd.Series]:
        """The variable as numbers (NaN where empty) and where it holds text that is not
        a number (``1,5``, ``abc``, ``n/a``)."""
        if var not in self.frame.columns:
            nan = pd.Series(np.nan, index=self.frame.index)
            return nan, pd.Series(False, index=self.frame.index)
        col = self.frame[var]
        if pd.api.types.is_numeric_dtype(col) and not pd.api.types.is_bool_dtype(col):
            values = col.astype(float)
            return values, pd.Series(np.isinf(values.to_numpy()), index=col.index)
        raw = self.text(var)
        values = pd.to_numeric(raw.where(raw != ""), errors="coerce").astype(float)
        bad = (values.isna() & (raw != "")) | np.isinf(values.fillna(0.0))
        return values.where(~bad), bad

    def label(self, i: int) -> str:
        """Row ``i`` (0-based) in words: ``pc.xpt row 17 (PCSEQ 5)``."""
        seq = self._sequence()
        text = f"{self.name} row {i + 1}"
        if seq is not None and seq[i]:
            text += f" ({self.domain.upper()}SEQ {seq[i]})"
        return text

    def labels(self, rows) -> list[str]:
        """:meth:`label` of many rows at once."""
        return [self.label(int(i)) for i in rows]

    def _sequence(self):
        if self._seq is None:
            var = f"{self.domain.upper()}SEQ"
            self._seq = self.text(var).to_numpy(object) if self.has(var) else False
        return None if self._seq is False else self._seq


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
    frame = frame.copy()
    frame.columns = [str(c).strip().upper() for c in frame.columns]
    if frame.columns.duplicated().any():
        dup = frame.columns[frame.columns.duplicated()][0]
        raise PkcalcInputError(f"variable {dup} appears twice", field=dup,
                               expected="each variable once")
    for c in frame.columns:
        col = frame[c]
        if pd.api.types.is_numeric_dtype(col) and not pd.api.types.is_bool_dtype(col):
            frame[c] = col.astype(float)
        else:
            frame[c] = col.astype(object).where(col.notna(), "").map(
                lambda x: x if isinstance(x, str) else ("" if x is None else str(x)))
    return frame


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
    try:
        frame, _ = pyreadstat.read_xport(str(path), usecols=use,
                                         encoding=meta.file_encoding or None)
    except UnicodeDecodeError:
        frame, _ = pyreadstat.read_xport(str(path), usecols=use, encoding="latin1")
        notes.append(f"{path.name}: text is not UTF-8; read as Latin-1")
    except Exception as exc:
        raise PkcalcInputError(f"is not a readable SAS transport file "
                               f"({exc.__class__.__name__})", file=str(path)) from None
    return frame, notes


def _decode(path: Path) -> tuple[str, list[str]]:
    data = path.read_bytes()
    try:
        return data.decode("utf-8-sig"), []
    except UnicodeDecodeError:
        return data.decode("latin-1"), [f"{path.name}: text is not UTF-8; read as Latin-1"]


def _read_csv(path: Path, wanted: set[str]) -> tuple[pd.DataFrame, list[str]]:
    text, notes = _decode(path)
    try:
        frame = pd.read_csv(StringIO(text), dtype=str, keep_default_na=False, index_col=False,
                            usecols=lambda c: str(c).strip().upper() in wanted)
    except (pd.errors.ParserError, pd.errors.EmptyDataError, ValueError) as exc:
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
