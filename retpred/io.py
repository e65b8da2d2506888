"""Reading analyte, calibrant and training files; writing outputs atomically.

Input formats by extension (a trailing ``.gz`` is read through gzip):

- ``.csv``, ``.tsv``, ``.txt``: delimited text with a header row. The delimiter is chosen
  among ``,``, ``;`` and tab from the header line (the one giving the most columns). The
  SMILES column is found case-insensitively (``smiles``, ``canonical_smiles``,
  ``isomeric_smiles``, ``smi``), the optional name column likewise (``name``,
  ``compound_name``, ``compound``, ``analyte``). Every other column is carried through.
- ``.smi``, ``.smiles``: one SMILES per line, then an optional name (the rest of the line);
  an optional first line ``smiles`` (a header) and ``#`` comment lines are skipped.
- ``.sdf``, ``.sd``: each record is parsed by RDKit; the name is ``_Name`` or a ``name``
  property, the SD properties of the first readable record are carried through.

Encoding is decided per file by a pre-scan of the whole file (bounded memory): UTF-8, with
or without a byte-order mark, when every byte sequence is valid UTF-8; UTF-16 when the file
starts with a UTF-16 byte-order mark (a common spreadsheet "Unicode text" export); otherwise
Windows-1252 (which matches Latin-1 on every printable character), or Latin-1 itself when the
file holds one of the five bytes Windows-1252 leaves undefined. Files are then streamed.
"""

from __future__ import annotations

import codecs
import contextlib
import csv
import gzip
import io
import itertools
import math
import os
import tempfile
import zlib
from collections.abc import Iterable, Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import IO, Any

import numpy as np
import pandas as pd

from retpred.errors import InputError

MAX_LINE_CHARS = 100_000
MAX_SDF_RECORD_BYTES = 5_000_000
_SCAN_BLOCK_BYTES = 1 << 18
_DELIMITERS = (",", ";", "\t")
SMILES_HEADERS = ("smiles", "canonical_smiles", "isomeric_smiles", "smi")
NAME_HEADERS = ("name", "compound_name", "compound", "analyte")
RT_HEADERS = ("rt_min", "rt", "retention_time_min", "retention_time", "tr_min")
_RT_OTHER_UNITS = ("rt_s", "rt_sec", "rt_seconds", "retention_time_s", "rt_ms")
TABLE_SUFFIXES = (".csv", ".tsv", ".txt")
SMI_SUFFIXES = (".smi", ".smiles")
SDF_SUFFIXES = (".sdf", ".sd")
_CP1252_UNDEFINED = frozenset(b"\x81\x8d\x8f\x90\x9d")


@dataclass
class AnalyteChunk:
    """Up to ``chunk_size`` analytes read from one file, as parallel lists.

    ``line`` is the 1-based line in the file (for SDF the record's first line), ``mols`` holds
    RDKit molecules for SDF input (None entries for unreadable records) and is None otherwise,
    ``extra`` maps each other column to its values (file order), ``error`` is a row-level read
    problem (e.g. ``'missing SMILES'``) or None.
    """

    line: list[int] = field(default_factory=list)
    name: list[str] = field(default_factory=list)
    smiles: list[str] = field(default_factory=list)
    mols: list | None = None
    extra: dict[str, list[str]] = field(default_factory=dict)
    error: list[str | None] = field(default_factory=list)

    def __len__(self) -> int:
        return len(self.line)


@dataclass
class _Row:
    line: int
    name: str
    smiles: str
    extra: list[str]
    error: str | None = None
    mol: Any = None


# ---------------------------------------------------------------------------------------------
# File opening and encoding
# ---------------------------------------------------------------------------------------------


def _kind_of(path: Path) -> tuple[str, bool]:
    """('table' | 'smi' | 'sdf', gzipped) from the file name."""
    suffixes = [s.lower() for s in path.suffixes]
    gz = bool(suffixes) and suffixes[-1] == ".gz"
    suffix = (suffixes[-2] if len(suffixes) >= 2 else "") if gz else path.suffix.lower()
    if suffix in TABLE_SUFFIXES:
        return "table", gz
    if suffix in SMI_SUFFIXES:
        return "smi", gz
    if suffix in SDF_SUFFIXES:
        return "sdf", gz
    known = ", ".join(TABLE_SUFFIXES + SMI_SUFFIXES + SDF_SUFFIXES)
    raise InputError(f"unknown file type '{suffix or path.name}'; use one of {known}",
                     path=str(path))


@contextlib.contextmanager
def _binary(path: Path, gz: bool) -> Iterator[IO[bytes]]:
    """Open ``path`` for reading bytes; open and read errors become InputError."""
    try:
        if path.is_dir():
            raise InputError("is a directory, not a file", path=str(path))
        fh = path.open("rb")
    except FileNotFoundError:
        raise InputError("file not found", path=str(path)) from None
    except OSError as exc:
        raise InputError(f"cannot read file: {exc.strerror or exc}", path=str(path)) from None
    stream: IO[bytes] = gzip.GzipFile(fileobj=fh, mode="rb") if gz else fh
    try:
        yield stream
    except (gzip.BadGzipFile, EOFError, zlib.error) as exc:
        raise InputError(f"corrupt gzip file: {exc}", path=str(path)) from None
    except OSError as exc:
        raise InputError(f"cannot read file: {exc.strerror or exc}", path=str(path)) from None
    finally:
        stream.close()
        fh.close()


@dataclass(frozen=True)
class _Encoding:
    name: str
    skip_bytes: int  # byte-order mark to drop before decoding


def _scan(path: Path, gz: bool) -> _Encoding:
    """Pre-scan the whole file: choose the encoding; refuse empty and binary files."""
    with _binary(path, gz) as fh:
        head = fh.read(_SCAN_BLOCK_BYTES)
        if head.startswith((b"\xff\xfe", b"\xfe\xff")):
            return _scan_utf16(path, fh, head)
        skip = 3 if head.startswith(codecs.BOM_UTF8) else 0
        decoder = codecs.getincrementaldecoder("utf-8")()
        utf8_ok, cp1252_ok, content, offset_lines = True, True, False, 0
        block = head[skip:]
        while block:
            nul = block.find(b"\x00")
            if nul >= 0:
                line = offset_lines + block.count(b"\n", 0, nul) + 1
                raise InputError("contains NUL bytes: a binary file, not text", path=str(path),
                                 line=line)
            if utf8_ok:
                try:
                    decoder.decode(block)
                except UnicodeDecodeError:
                    utf8_ok = False
            if cp1252_ok and not utf8_ok and not _CP1252_UNDEFINED.isdisjoint(block):
                cp1252_ok = False
            content = content or bool(block.strip())
            offset_lines += block.count(b"\n")
            block = fh.read(_SCAN_BLOCK_BYTES)
        if utf8_ok:
            try:
                decoder.decode(b"", final=True)
            except UnicodeDecodeError:
                utf8_ok = False
    if not content:
        raise InputError("empty file", path=str(path))
    if utf8_ok:
        return _Encoding("utf-8", skip)
    return _Encoding("cp1252" if cp1252_ok else "latin-1", skip)


def _scan_utf16(path: Path, fh: IO[bytes], head: bytes) -> _Encoding:
    decoder = codecs.getincrementaldecoder("utf-16")()
    content = False
    block = head
    try:
        while block:
            text = decoder.decode(block)
            if "\x00" in text:
                raise InputError("contains NUL characters: a binary file, not text",
                                 path=str(path))
            content = content or bool(text.strip())
            block = fh.read(_SCAN_BLOCK_BYTES)
        decoder.decode(b"", final=True)
    except UnicodeDecodeError:
        raise InputError("starts with a UTF-16 byte-order mark but is not valid UTF-16",
                         path=str(path)) from None
    if not content:
        raise InputError("empty file", path=str(path))
    return _Encoding("utf-16", 0)


def detect_encoding(path) -> str:
    """The text encoding :func:`iter_analytes` will use for ``path`` (see module docstring)."""
    p = Path(path)
    return _scan(p, p.suffix.lower() == ".gz").name


@contextlib.contextmanager
def _text(path: Path, gz: bool, enc: _Encoding) -> Iterator[IO[str]]:
    with _binary(path, gz) as fh:
        if enc.skip_bytes:
            fh.read(enc.skip_bytes)
        text = io.TextIOWrapper(fh, encoding=enc.name, newline="")
        try:
            yield text
        except UnicodeDecodeError as exc:  # file changed after the scan
            raise InputError(f"not valid {enc.name} text: {exc.reason}", path=str(path)) from None
        finally:
            text.detach()


def _physical_lines(fh: IO[str], too_long: set[int]) -> Iterator[str]:
    """Lines with their line ends; a line over MAX_LINE_CHARS is replaced by a blank line and
    its number recorded in ``too_long`` (read in pieces, so memory stays bounded)."""
    number = 0
    while True:
        line = fh.readline(MAX_LINE_CHARS + 1)
        if not line:
            return
        number += 1
        if len(line) > MAX_LINE_CHARS:
            while line and not line.endswith(("\n", "\r")):
                line = fh.readline(MAX_LINE_CHARS + 1)
            too_long.add(number)
            yield "\n"
        else:
            yield line


def _too_long_message() -> str:
    return f"line longer than {MAX_LINE_CHARS} characters"


# ---------------------------------------------------------------------------------------------
# Delimited tables
# ---------------------------------------------------------------------------------------------


def _choose_delimiter(header: str, suffix: str) -> str:
    best, best_count = ("\t" if suffix == ".tsv" else ","), 1
    for delimiter in _DELIMITERS:
        count = len(next(csv.reader([header], delimiter=delimiter), []))
        if count > best_count:
            best, best_count = delimiter, count
    return best


def _find_column(headers: list[str], wanted: tuple[str, ...], path: Path, line: int,
                 what: str) -> int | None:
    lowered = [h.lower() for h in headers]
    for alias in wanted:
        hits = [i for i, h in enumerate(lowered) if h == alias]
        if len(hits) > 1:
            shown = " and ".join(f"'{headers[i]}'" for i in hits)
            raise InputError(f"two {what} columns ({shown}); keep one", path=str(path),
                             line=line, field=headers[hits[0]])
        if hits:
            return hits[0]
    return None


def _columns_found(headers: list[str]) -> str:
    shown = ", ".join(f"'{h}'" for h in headers[:20])
    return shown + (f" and {len(headers) - 20} more" if len(headers) > 20 else "")


class _TableHeader:
    def __init__(self, cells: list[str], path: Path, line: int) -> None:
        headers = []
        for i, cell in enumerate(cells):
            h = cell.strip().lstrip("\ufeff").strip()
            headers.append(h or f"column_{i + 1}")
        seen: dict[str, int] = {}
        for i, h in enumerate(headers):
            if h in seen:
                raise InputError(f"duplicate column header '{h}' (columns {seen[h] + 1} and "
                                 f"{i + 1})", path=str(path), line=line, field=h)
            seen[h] = i
        self.headers = headers
        self.smiles = _find_column(headers, SMILES_HEADERS, path, line, "SMILES")
        if self.smiles is None:
            raise InputError(f"no SMILES column; columns found: {_columns_found(headers)} "
                             "(the first line must be a header with a 'smiles' column)",
                             path=str(path), line=line, field="smiles")
        self.name = _find_column(headers, NAME_HEADERS, path, line, "name")
        self.extra = [i for i in range(len(headers)) if i not in (self.smiles, self.name)]


class _Keys:
    """Names of the extra columns, filled in by a row reader once known."""

    def __init__(self) -> None:
        self.names: list[str] = []


def _table_rows(fh: IO[str], path: Path, keys: _Keys) -> Iterator[_Row]:
    too_long: set[int] = set()
    lines = _physical_lines(fh, too_long)
    header_line, header_text = 0, ""
    for text in lines:
        header_line += 1
        if text.strip():
            header_text = text
            break
    if not header_text:
        raise InputError("empty file", path=str(path))
    if header_line in too_long:
        raise InputError(f"header {_too_long_message()}", path=str(path), line=header_line)
    delimiter = _choose_delimiter(header_text.rstrip("\r\n"), path.suffix.lower())
    reader = csv.reader(itertools.chain([header_text], lines), delimiter=delimiter)
    offset = header_line - 1
    try:
        header = _TableHeader(next(reader), path, header_line)
        keys.names = [header.headers[i] for i in header.extra]
        width = len(header.headers)
        previous = reader.line_num
        count = 0
        for cells in reader:
            first = offset + previous + 1
            last = offset + reader.line_num
            previous = reader.line_num
            long_lines = [n for n in range(first, last + 1) if n in too_long]
            if not any(c.strip() for c in cells) and not long_lines:
                continue
            count += 1
            extra = [cells[i] if i < len(cells) else "" for i in header.extra]
            smiles = cells[header.smiles].strip() if header.smiles < len(cells) else ""
            name = ""
            if header.name is not None and header.name < len(cells):
                name = cells[header.name].strip()
            error = None
            if long_lines:
                error = _too_long_message()
                smiles = ""
            elif len(cells) > width and any(c.strip() for c in cells[width:]):
                error = f"{len(cells)} fields but the header has {width}"
            elif not smiles:
                error = "missing SMILES"
            yield _Row(first, name or f"row {count}", smiles, extra, error)
    except csv.Error as exc:
        raise InputError(f"unreadable delimited text: {exc}", path=str(path),
                         line=offset + reader.line_num) from None


# ---------------------------------------------------------------------------------------------
# SMILES files
# ---------------------------------------------------------------------------------------------


def _smi_rows(fh: IO[str], path: Path) -> Iterator[_Row]:
    too_long: set[int] = set()
    count = 0
    seen_content = False
    for number, text in enumerate(_physical_lines(fh, too_long), start=1):
        if number in too_long:
            count += 1
            yield _Row(number, f"row {count}", "", [], _too_long_message())
            continue
        stripped = text.strip().lstrip("\ufeff")
        if not stripped or stripped.startswith("#"):
            continue
        parts = stripped.split(None, 1)
        if not seen_content:
            seen_content = True
            if parts[0].lower() in SMILES_HEADERS:
                continue
        count += 1
        name = parts[1].strip() if len(parts) > 1 else ""
        yield _Row(number, name or f"row {count}", parts[0], [], None)


# ---------------------------------------------------------------------------------------------
# SD files
# ---------------------------------------------------------------------------------------------


def _sdf_records(fh: IO[bytes]) -> Iterator[tuple[int, bytes | None, bytes]]:
    """(first line, record bytes or None when too large, title line) for each record.

    A record runs from the line after a ``$$$$`` line (or the file start) to the next
    ``$$$$``; its first line is the molfile title, which may be blank."""
    number, start, parts, size = 0, 1, [], 0
    while True:
        line = fh.readline(MAX_LINE_CHARS + 1)
        if not line:
            break
        number += 1
        if line.strip() == b"$$$$":
            yield start, (b"".join(parts) if size <= MAX_SDF_RECORD_BYTES else None), \
                (parts[0].strip() if parts else b"")
            start, parts, size = number + 1, [], 0
            continue
        size += len(line)
        if size <= MAX_SDF_RECORD_BYTES or not parts:
            parts.append(line)
    if any(p.strip() for p in parts):
        yield start, (b"".join(parts) if size <= MAX_SDF_RECORD_BYTES else None), \
            parts[0].strip()


def _sdf_rows(fh: IO[bytes], path: Path, enc: _Encoding, keys: _Keys) -> Iterator[_Row]:
    from rdkit import Chem
    from rdkit.rdBase import BlockLogs

    if enc.name == "utf-16":
        raise InputError("SD files must be UTF-8 or Latin-1 text, not UTF-16", path=str(path))
    if enc.skip_bytes:
        fh.read(enc.skip_bytes)
    known = False
    count = 0
    for start, data, title in _sdf_records(fh):
        count += 1
        default = title.decode(enc.name, errors="replace").strip() or f"row {count}"
        if data is None:
            yield _Row(start, default, "", [],
                       f"SDF record larger than {MAX_SDF_RECORD_BYTES} bytes")
            continue
        if enc.name != "utf-8":
            data = data.decode(enc.name, errors="replace").encode("utf-8")
        with BlockLogs():
            try:
                mol = next(iter(Chem.ForwardSDMolSupplier(io.BytesIO(data))), None)
            except Exception:  # noqa: BLE001 - RDKit raises assorted errors on garbage
                mol = None
        if mol is None:
            yield _Row(start, default, "", [], "unreadable SDF record (RDKit could not parse it)")
            continue
        props = {k: mol.GetProp(k) for k in mol.GetPropNames()}
        if not known:
            keys.names, known = list(props), True
        name = mol.GetProp("_Name").strip() if mol.HasProp("_Name") else ""
        if not name:
            name = next((v.strip() for k, v in props.items() if k.lower() == "name"), "")
        name = name or f"row {count}"
        extra = [props.get(k, "") for k in keys.names]
        try:
            smiles = Chem.MolToSmiles(mol)
        except Exception:  # noqa: BLE001
            yield _Row(start, name, "", extra, "cannot write a SMILES for this record")
            continue
        yield _Row(start, name, smiles, extra, None if smiles else "empty molecule", mol)


# ---------------------------------------------------------------------------------------------
# Public readers
# ---------------------------------------------------------------------------------------------


def _chunks(rows: Iterable[_Row], keys: _Keys, chunk_size: int, with_mols: bool,
            path: Path) -> Iterator[AnalyteChunk]:
    chunk: AnalyteChunk | None = None
    any_rows = False
    for row in rows:
        if chunk is None:
            chunk = AnalyteChunk(mols=[] if with_mols else None,
                                 extra={k: [] for k in keys.names})
        elif not chunk.extra and keys.names:  # SDF: property names known from this record on
            chunk.extra = {k: [""] * len(chunk) for k in keys.names}
        any_rows = True
        chunk.line.append(row.line)
        chunk.name.append(row.name)
        chunk.smiles.append(row.smiles)
        chunk.error.append(row.error)
        if chunk.mols is not None:
            chunk.mols.append(row.mol)
        for i, values in enumerate(chunk.extra.values()):
            values.append(row.extra[i] if i < len(row.extra) else "")
        if len(chunk) >= chunk_size:
            yield chunk
            chunk = None
    if chunk is not None:
        yield chunk
    if not any_rows:
        raise InputError("no analytes (header only or only blank lines)", path=str(path))


def iter_analytes(path, chunk_size: int = 5000) -> Iterator[AnalyteChunk]:
    """Stream analytes from a CSV/TSV/TXT, SMILES or SD file in chunks of ``chunk_size``.

    Memory stays bounded by the chunk size. File-level problems (missing, empty, binary,
    unknown type, no SMILES column, duplicate headers, header only) raise
    :class:`InputError`; the type, existence and encoding checks run at the call, the rest
    when iteration starts. Row-level problems go into ``AnalyteChunk.error``. Names default
    to ``'row N'`` with N counting analytes from 1.
    """
    if chunk_size < 1:
        raise ValueError("chunk_size must be >= 1")
    p = Path(path)
    kind, gz = _kind_of(p)
    enc = _scan(p, gz)
    return _iter(p, kind, gz, enc, chunk_size)


def _iter(p: Path, kind: str, gz: bool, enc: _Encoding, chunk_size: int
          ) -> Iterator[AnalyteChunk]:
    keys = _Keys()
    if kind == "sdf":
        with _binary(p, gz) as fh:
            yield from _chunks(_sdf_rows(fh, p, enc, keys), keys, chunk_size, True, p)
        return
    with _text(p, gz, enc) as fh:
        rows = _table_rows(fh, p, keys) if kind == "table" else _smi_rows(fh, p)
        yield from _chunks(rows, keys, chunk_size, False, p)


def _parse_rt(text: str, path: Path, line: int) -> float:
    value = text.strip()
    if not value:
        raise InputError("missing retention time", path=str(path), line=line, field="rt_min")
    if "," in value and "." not in value and value.count(",") == 1:
        value = value.replace(",", ".")  # decimal comma (European CSV)
    try:
        rt = float(value)
    except ValueError:
        raise InputError(f"retention time '{text.strip()[:40]}' is not a number",
                         path=str(path), line=line, field="rt_min") from None
    if not math.isfinite(rt) or rt <= 0:
        raise InputError(f"retention time must be a finite number > 0 min, got {value}",
                         path=str(path), line=line, field="rt_min")
    return rt


def _read_with_rt(path, keep_extra: bool) -> pd.DataFrame:
    p = Path(path)
    lines: list[int] = []
    names: list[str] = []
    smiles: list[str] = []
    rts: list[float] = []
    extra: dict[str, list[str]] = {}
    rt_key: str | None = None
    for chunk in iter_analytes(p):
        if rt_key is None:
            rt_key = _rt_column(list(chunk.extra), p)
            extra = {k: [] for k in chunk.extra if k != rt_key}
        rt_values = chunk.extra.get(rt_key, [""] * len(chunk))
        for i, line in enumerate(chunk.line):
            if chunk.error[i]:
                raise InputError(chunk.error[i], path=str(p), line=line, field="smiles")
            rts.append(_parse_rt(rt_values[i], p, line))
        lines.extend(chunk.line)
        names.extend(chunk.name)
        smiles.extend(chunk.smiles)
        for key, values in extra.items():
            values.extend(chunk.extra.get(key, [""] * len(chunk)))
    frame = pd.DataFrame({"line": pd.Series(lines, dtype="int64"),
                          "name": pd.Series(names, dtype=object),
                          "smiles": pd.Series(smiles, dtype=object),
                          "rt_min": pd.Series(rts, dtype="float64")})
    if keep_extra:
        for key, values in extra.items():
            if key not in frame.columns:
                frame[key] = pd.Series(values, dtype=object)
    return frame


def _rt_column(keys: list[str], path: Path) -> str:
    lowered = {k.lower(): k for k in keys}
    for alias in RT_HEADERS:
        if alias in lowered:
            return lowered[alias]
    other = [k for k in keys if k.lower() in _RT_OTHER_UNITS]
    if other:
        raise InputError(f"retention times must be in minutes in a column 'rt_min'; found "
                         f"'{other[0]}'", path=str(path), field="rt_min")
    raise InputError(f"no retention-time column 'rt_min'; other columns found: "
                     f"{_columns_found(keys) or 'none'}", path=str(path), field="rt_min")


def read_smiles_list(path) -> tuple[list[str], list[str]]:
    """All (smiles, names) of an analyte file; rows with a read error get an empty SMILES
    (they are then reported in their row). For short lists: scans, column comparisons."""
    smiles: list[str] = []
    names: list[str] = []
    for chunk in iter_analytes(path):
        smiles.extend(s if e is None else "" for s, e in zip(chunk.smiles, chunk.error,
                                                            strict=True))
        names.extend(chunk.name)
    return smiles, names


def read_calibrants(path) -> pd.DataFrame:
    """Calibrant file -> DataFrame with columns ``line, name, smiles, rt_min``.

    Any format :func:`iter_analytes` reads, with a retention-time column in minutes
    (``rt_min``; also ``rt``, ``retention_time``). Every row must have a SMILES and a finite
    retention time > 0, else :class:`InputError` with the line and field.
    """
    return _read_with_rt(path, keep_extra=False)


def read_training_data(path) -> pd.DataFrame:
    """Training file -> DataFrame ``line, name, smiles, rt_min`` plus the file's other columns
    (e.g. a ``dataset`` id for grouped splits), validated as in :func:`read_calibrants`."""
    return _read_with_rt(path, keep_extra=True)


# ---------------------------------------------------------------------------------------------
# Atomic output
# ---------------------------------------------------------------------------------------------


def _same_file(a: Path, b: Path) -> bool:
    try:
        if a.exists() and b.exists() and os.path.samefile(a, b):
            return True
    except OSError:
        pass
    try:
        return a.resolve() == b.resolve()
    except OSError:
        return os.path.abspath(a) == os.path.abspath(b)


def check_output_target(path, force: bool, inputs: Sequence) -> Path:
    p = Path(path)
    if not str(path):
        raise InputError("empty output path")
    for item in inputs:
        if item is not None and _same_file(p, Path(item)):
            raise InputError(f"output would overwrite the input file {item}; choose another "
                             "output name", path=str(p))
    if p.is_dir():
        raise InputError("is a directory; give a file name for the output", path=str(p))
    if not p.parent.is_dir():
        raise InputError(f"output directory {p.parent} does not exist", path=str(p))
    if (p.exists() or p.is_symlink()) and not force:
        raise InputError("exists; use --force to replace it", path=str(p))
    return p


def _file_mode() -> int:
    umask = os.umask(0)
    os.umask(umask)
    return 0o666 & ~umask


@contextlib.contextmanager
def atomic_output_path(path, force: bool = False, inputs: Sequence = ()) -> Iterator[Path]:
    """Yield a temporary path beside ``path`` for a binary writer; on success it replaces
    ``path`` (``os.replace``, atomic on one file system), on any exception (including
    KeyboardInterrupt) it is deleted. Refuses to overwrite an input or, without ``force``,
    an existing file. The temporary name keeps the suffix so writers choose the format."""
    target = check_output_target(path, force, inputs)
    try:
        fd, name = tempfile.mkstemp(prefix=f".{target.name}.", suffix=f".tmp{target.suffix}",
                                    dir=target.parent)
    except OSError as exc:
        raise InputError(f"cannot write in {target.parent}: {exc.strerror or exc}",
                         path=str(target)) from None
    os.close(fd)
    tmp = Path(name)
    try:
        yield tmp
        if not force and (target.exists() or target.is_symlink()):
            raise InputError("exists (created while writing); use --force to replace it",
                             path=str(target))
        os.chmod(tmp, _file_mode())
        os.replace(tmp, target)
    finally:
        with contextlib.suppress(FileNotFoundError):
            tmp.unlink()


@contextlib.contextmanager
def atomic_output(path, *, force: bool = False, inputs: Sequence = (),
                  encoding: str = "utf-8", newline: str = "") -> Iterator[IO[str]]:
    """Yield a text handle (UTF-8, ``newline=''`` for the csv module) whose content appears at
    ``path`` only when the block finishes without an exception; see
    :func:`atomic_output_path`."""
    with atomic_output_path(path, force, inputs) as tmp:
        with open(tmp, "w", encoding=encoding, newline=newline) as fh:
            yield fh
            fh.flush()
            os.fsync(fh.fileno())


#: decimals of every float in a CSV this tool writes
CSV_DECIMALS = 4


def write_csv_rows(table: pd.DataFrame, fh: IO[str], header: bool = True) -> None:
    """Write ``table`` to the open handle ``fh`` with floats to ``CSV_DECIMALS`` places; a
    value that rounds to zero is written ``0.0000``, never ``-0.0000``."""
    floats = table.select_dtypes(include="floating").columns
    if len(floats):
        values = table[floats].to_numpy()
        tiny_negative = np.signbit(values) & (values > -0.5 * 10.0**-CSV_DECIMALS)
        if tiny_negative.any():
            table = table.copy()
            table[floats] = np.where(tiny_negative, 0.0, values)
    table.to_csv(fh, index=False, header=header, float_format=f"%.{CSV_DECIMALS}f",
                 lineterminator="\n")
