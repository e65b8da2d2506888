"""On-disk cache of per-structure features, for repeated runs on the same library.

What is stored, per input SMILES text (the exact field as read): the standardisation result
(canonical parent SMILES, status, changes, usable), the descriptor row, the count
fingerprint, the ionisable sites (pKa, kind, group) and the two compound-memory keys
(:attr:`retpred.model.Solutes.memory_keys`: canonical SMILES of stereo forms, hashed) -
everything :func:`retpred.model.featurise` computes and the keys, i.e. all the RDKit work
(about 0.9 ms per structure, measured; a hit costs a few microseconds). Method, model and
calibration are not part of the entry, so one cache serves every method and model.

Store: one SQLite file (stdlib ``sqlite3``, WAL journal) per cache version in the cache
directory, ``features-<16 hex>.sqlite``. The version string (:func:`cache_version`) holds the
cache format, retpred's and RDKit's versions, the descriptor names, the fingerprint size,
the SHA-256 of the ionisable-group table and of the structure/chemistry code, so a changed
SMARTS table, descriptor or standardisation step selects a new, empty file; files of other
versions are left alone and never read. Every entry carries a CRC-32 of its fields;
an entry that does not decode (wrong length, bad checksum) is a miss and is recomputed and
overwritten. A file that SQLite reports as corrupt (or whose stored version differs) is
deleted and rebuilt; any other database error (locked, read-only, disk full) switches the
cache off for the run with a note. The cache never changes a result: a hit gives the same
arrays, bit for bit, as computing them (tests/test_cache.py).

SDF input is cached under ``sdf:`` + the SMILES RDKit writes for the molecule as read
(canonical, isomeric): the features are functions of the molecular graph (standardisation,
2D descriptors, fingerprint, SMARTS sites), which that SMILES fixes. Its entries are kept
apart from those of SMILES text input, whose features come from parsing the text.

Housekeeping: the cache never deletes a file of another version by itself (the directory
may be shared by several installations). :func:`list_cache_files` lists the files and
:func:`prune_cache` (``retpred cache DIR --prune [--max-mb N]``) deletes the files this
version cannot use and, with a size limit, the least recently written ones.

Entries are not pickles (a cache directory may be shared; nothing in it is executed).
"""

from __future__ import annotations

import contextlib
import hashlib
import inspect
import os
import sqlite3
import zlib
from collections.abc import Sequence
from dataclasses import dataclass
from functools import lru_cache
from importlib import resources
from pathlib import Path

import numpy as np

from retpred import __version__
from retpred.chemistry import DESCRIPTOR_NAMES, SiteTable
from retpred.model import (
    N_BITS,
    Solutes,
    compound_key,
    featurise,
    stereo_forms,
    stereo_forms_of,
)
from retpred.structures import StandardisedBatch

#: Layout of an entry; bump when the stored fields change.
CACHE_FORMAT = 2
#: Environment variable naming the cache directory when none is given.
CACHE_ENV = "RETPRED_CACHE_DIR"

_N_DESC = len(DESCRIPTOR_NAMES)
_DESC_BYTES = 8 * _N_DESC
_SEP = "\t"  # group names come from a TSV table: never contain a tab
_BATCH = 900  # keys per SELECT (below SQLite's default variable limit on old builds)
_CORRUPT = frozenset({"SQLITE_CORRUPT", "SQLITE_NOTADB"})


def _group_table_bytes() -> bytes:
    return resources.files("retpred").joinpath("data/ionisable_groups.tsv").read_bytes()


def _code_bytes() -> bytes:
    from retpred import chemistry, structures

    parts = []
    for mod in (structures, chemistry):
        try:
            parts.append(Path(mod.__file__).read_bytes())
        except (OSError, TypeError):
            parts.append(f"{mod.__name__} source unavailable".encode())
    for fn in (featurise, stereo_forms, stereo_forms_of, compound_key):
        try:
            parts.append(inspect.getsource(fn).encode())
        except (OSError, TypeError):
            parts.append(f"{fn.__name__} source unavailable".encode())
    return b"\0".join(parts)


@lru_cache(maxsize=1)
def cache_version() -> str:
    """The version string entries are valid for (see the module docstring)."""
    import rdkit

    return "; ".join([
        f"cache format {CACHE_FORMAT}",
        f"retpred {__version__}",
        f"rdkit {rdkit.__version__}",
        "descriptors " + ",".join(DESCRIPTOR_NAMES),
        f"fingerprint bits {N_BITS}",
        "ionisable groups sha256 " + hashlib.sha256(_group_table_bytes()).hexdigest(),
        "code sha256 " + hashlib.sha256(_code_bytes()).hexdigest(),
    ])


def resolve_cache_dir(cache_dir=None) -> Path | None:
    """The cache directory to use: ``cache_dir`` if given (``False`` or ``""``: none), else
    the ``RETPRED_CACHE_DIR`` environment variable if set and not empty, else None."""
    if cache_dir is False:
        return None
    if cache_dir is None:
        cache_dir = os.environ.get(CACHE_ENV) or None
    if cache_dir is None or str(cache_dir) == "":
        return None
    return Path(cache_dir).expanduser()


# ---------------------------------------------------------------------------------------------
# Entries
# ---------------------------------------------------------------------------------------------

#: (key, smiles, status, changes, usable, groups, descriptors, fingerprint, pka, kind,
#: memory_key, skeleton_key, crc)
Record = tuple


def _crc(smiles: str, status: str, changes: str, usable: int, groups: str, desc: bytes,
         fp: bytes, pka: bytes, kind: bytes, memory_key: str, skeleton_key: str) -> int:
    text = _SEP.join((smiles, status, changes, str(usable), groups, memory_key,
                      skeleton_key)).encode("utf-8")
    return zlib.crc32(kind, zlib.crc32(pka, zlib.crc32(fp, zlib.crc32(desc, zlib.crc32(text)))))


def encode_records(keys: Sequence[str], solutes: Solutes) -> list[Record]:
    """One record per row of ``solutes`` (row i under ``keys[i]``; empty keys skipped)."""
    b = solutes.batch
    desc = np.ascontiguousarray(solutes.descriptors, dtype=np.float64)
    fps = np.ascontiguousarray(solutes.fingerprints, dtype=np.uint8)
    sites = solutes.sites
    out = []
    for i, key in enumerate(keys):
        if not key:
            continue
        c = len(sites.group[i])
        groups = _SEP.join(sites.group[i])
        d, f = desc[i].tobytes(), fps[i].tobytes()
        p = np.ascontiguousarray(sites.pka[i, :c], dtype=np.float64).tobytes()
        k = np.ascontiguousarray(sites.kind[i, :c], dtype=np.int8).tobytes()
        u = int(bool(b.usable[i]))
        mk, sk = solutes.memory_keys[i], solutes.skeleton_keys[i]
        out.append((key, b.smiles[i], b.status[i], b.changes[i], u, groups, d, f, p, k, mk,
                    sk, _crc(b.smiles[i], b.status[i], b.changes[i], u, groups, d, f, p, k,
                             mk, sk)))
    return out


def _valid(row) -> bool:
    _, smi, status, changes, usable, groups, d, f, p, k, mk, sk, crc = row
    if not (isinstance(smi, str) and isinstance(status, str) and isinstance(changes, str)
            and isinstance(groups, str) and usable in (0, 1) and isinstance(mk, str)
            and isinstance(sk, str)):
        return False
    if not all(isinstance(x, bytes) for x in (d, f, p, k)):
        return False
    c = len(k)
    if len(d) != _DESC_BYTES or len(f) != N_BITS or len(p) != 8 * c:
        return False
    if (len(groups.split(_SEP)) if groups else 0) != c:
        return False
    return crc == _crc(smi, status, changes, usable, groups, d, f, p, k, mk, sk)


def decode_records(rows: Sequence) -> Solutes:
    """A :class:`Solutes` (molecules None) of validated rows, in the given order."""
    n = len(rows)
    counts = [len(r[9]) for r in rows]
    m = max([1, *counts])
    pka = np.full((n, m), np.nan)
    kind = np.zeros((n, m), dtype=np.int8)
    groups: list[list[str]] = []
    for i, r in enumerate(rows):
        c = counts[i]
        if c:
            pka[i, :c] = np.frombuffer(r[8], dtype=np.float64)
            kind[i, :c] = np.frombuffer(r[9], dtype=np.int8)
        groups.append(r[5].split(_SEP) if r[5] else [])
    desc = np.frombuffer(b"".join(r[6] for r in rows), dtype=np.float64).reshape(n, _N_DESC)
    fps = np.frombuffer(b"".join(r[7] for r in rows), dtype=np.uint8).reshape(n, N_BITS)
    batch = StandardisedBatch(
        mols=[None] * n, smiles=[r[1] for r in rows],
        usable=np.array([bool(r[4]) for r in rows], dtype=bool),
        status=[r[2] for r in rows], changes=[r[3] for r in rows],
    )
    return Solutes(batch=batch, descriptors=desc.copy(), fingerprints=fps.copy(),
                   sites=SiteTable(pka=pka, kind=kind, group=groups),
                   known_keys=([r[10] for r in rows], [r[11] for r in rows]))


def combine_solutes(n: int, parts: Sequence[tuple[np.ndarray, Solutes]]) -> Solutes:
    """Rows of several :class:`Solutes` put at their indices of an n-row batch.

    Site arrays are padded to the largest site count (at least 1), as
    :func:`retpred.chemistry.find_ionisable_sites` pads a whole batch."""
    m = max([1, *[p.sites.pka.shape[1] for _, p in parts]])
    mols: list = [None] * n
    smiles = [""] * n
    status = [""] * n
    changes = [""] * n
    usable = np.zeros(n, dtype=bool)
    desc = np.full((n, _N_DESC), np.nan)
    fps = np.zeros((n, N_BITS), dtype=np.uint8)
    pka = np.full((n, m), np.nan)
    kind = np.zeros((n, m), dtype=np.int8)
    groups: list[list[str]] = [[] for _ in range(n)]
    mkeys = [""] * n
    skeys = [""] * n
    for idx, p in parts:
        idx = np.asarray(idx, dtype=np.int64)
        b = p.batch
        for j, i in enumerate(idx.tolist()):
            mols[i], smiles[i], status[i], changes[i] = (b.mols[j], b.smiles[j], b.status[j],
                                                         b.changes[j])
            groups[i] = p.sites.group[j]
            mkeys[i], skeys[i] = p.memory_keys[j], p.skeleton_keys[j]
        usable[idx] = b.usable
        desc[idx] = p.descriptors
        fps[idx] = p.fingerprints
        w = p.sites.pka.shape[1]
        pka[idx, :w] = p.sites.pka
        kind[idx, :w] = p.sites.kind
    batch = StandardisedBatch(mols=mols, smiles=smiles, usable=usable, status=status,
                              changes=changes)
    return Solutes(batch=batch, descriptors=desc, fingerprints=fps,
                   sites=SiteTable(pka=pka, kind=kind, group=groups),
                   known_keys=(mkeys, skeys))


@dataclass
class Known:
    """Cached features of some rows of a chunk: ``idx`` (row positions) and their
    :class:`Solutes`. Small and picklable; sent with the chunk to a worker."""

    idx: np.ndarray
    solutes: Solutes


#: Prefix of the keys of SDF molecules: the SMILES RDKit writes for the molecule as read
#: (kept apart from SMILES-text keys, whose features come from parsing the text).
SDF_KEY_PREFIX = "sdf:"


def featurise_known(texts: Sequence[str], known: Known | None = None,
                    record: bool = False, mols: Sequence | None = None
                    ) -> tuple[Solutes, list[Record]]:
    """:func:`retpred.model.featurise` of the SMILES ``texts`` (or of the molecules
    ``mols``, then ``texts`` are only their keys), the ``known`` rows taken from the cache.
    Returns the batch and, with ``record``, the cache records of the rows computed here
    (keyed by their text; empty texts are not recorded)."""
    n = len(texts)

    def compute(rows):
        if mols is not None:
            return featurise(mols=[mols[i] for i in rows])
        return featurise(smiles=[texts[i] for i in rows])

    if known is None or known.idx.size == 0:
        sol = compute(range(n))
        return sol, (encode_records(texts, sol) if record else [])
    miss = np.setdiff1d(np.arange(n), known.idx, assume_unique=True)
    parts = [(known.idx, known.solutes)]
    records: list[Record] = []
    if miss.size:
        rows = miss.tolist()
        fresh = compute(rows)
        parts.append((miss, fresh))
        if record:
            records = encode_records([texts[i] for i in rows], fresh)
    return combine_solutes(n, parts), records


# ---------------------------------------------------------------------------------------------
# The store
# ---------------------------------------------------------------------------------------------


class FeatureCache:
    """The cache file of this version in ``directory`` (created if missing).

    Never raises for a bad cache: :attr:`active` turns False and :attr:`note` says why.
    :attr:`hits`, :attr:`misses` and :attr:`stored` count this session's rows."""

    def __init__(self, directory, version: str | None = None):
        self.version = version if version is not None else cache_version()
        self.directory = Path(directory)
        digest = hashlib.sha256(self.version.encode("utf-8")).hexdigest()[:16]
        self.path = self.directory / f"features-{digest}.sqlite"
        self.hits = self.misses = self.stored = 0
        self.note = ""
        self.rebuilt = False
        self._db: sqlite3.Connection | None = None
        try:
            self.directory.mkdir(parents=True, exist_ok=True)
            self._db = self._open()
        except (OSError, sqlite3.Error) as exc:
            self._off(f"cache not used ({self.path}): {exc}")

    @property
    def active(self) -> bool:
        return self._db is not None

    # --- opening ---------------------------------------------------------------------
    def _connect(self) -> sqlite3.Connection:
        db = sqlite3.connect(self.path, timeout=30.0, isolation_level=None)
        try:
            db.execute("PRAGMA journal_mode=WAL")
            db.execute("PRAGMA synchronous=NORMAL")
            db.execute("CREATE TABLE IF NOT EXISTS meta (name TEXT PRIMARY KEY, value TEXT)")
            db.execute(
                "CREATE TABLE IF NOT EXISTS features (key TEXT PRIMARY KEY, smiles TEXT, "
                "status TEXT, changes TEXT, usable INTEGER, groups TEXT, descriptors BLOB, "
                "fingerprint BLOB, pka BLOB, kind BLOB, memory_key TEXT, skeleton_key TEXT, "
                "crc INTEGER)")
            row = db.execute("SELECT value FROM meta WHERE name = 'version'").fetchone()
            if row is None:
                db.execute("INSERT OR IGNORE INTO meta VALUES ('version', ?)", (self.version,))
                row = db.execute("SELECT value FROM meta WHERE name = 'version'").fetchone()
            if row[0] != self.version:
                raise _Stale()
        except BaseException:
            db.close()
            raise
        return db

    def _open(self) -> sqlite3.Connection:
        try:
            return self._connect()
        except _Stale:
            why = "it was made by another version"
        except sqlite3.DatabaseError as exc:
            if getattr(exc, "sqlite_errorname", "") not in _CORRUPT:
                raise
            why = f"it was unreadable ({exc})"
        self._delete_files()
        self.rebuilt = True
        self.note = f"cache file {self.path.name} rebuilt: {why}"
        return self._connect()

    def _delete_files(self) -> None:
        for suffix in ("", "-wal", "-shm"):
            with contextlib.suppress(FileNotFoundError):
                Path(str(self.path) + suffix).unlink()

    def _off(self, note: str, corrupt: bool = False) -> None:
        if self._db is not None:
            with contextlib.suppress(sqlite3.Error):
                self._db.close()
        self._db = None
        if corrupt:  # the next run starts a new file
            with contextlib.suppress(OSError):
                self._delete_files()
        self.note = note

    def _failed(self, exc: sqlite3.Error, doing: str) -> None:
        corrupt = getattr(exc, "sqlite_errorname", "") in _CORRUPT
        self._off(f"cache switched off while {doing} ({self.path.name}): {exc}", corrupt)

    # --- use ---------------------------------------------------------------------------
    def lookup(self, texts: Sequence[str], skip: Sequence[bool] | None = None) -> Known | None:
        """Cached rows among ``texts`` (empty texts and rows with ``skip`` true are not
        looked up). None when nothing is found or the cache is off."""
        if self._db is None:
            return None
        use = [bool(t) and not (skip is not None and skip[i]) for i, t in enumerate(texts)]
        wanted = sorted({t for t, u in zip(texts, use, strict=True) if u})
        found: dict[str, tuple] = {}
        try:
            for s in range(0, len(wanted), _BATCH):
                part = wanted[s:s + _BATCH]
                q = ("SELECT key, smiles, status, changes, usable, groups, descriptors, "
                     "fingerprint, pka, kind, memory_key, skeleton_key, crc FROM features "
                     "WHERE key IN ("
                     + ",".join("?" * len(part)) + ")")
                for row in self._db.execute(q, part):
                    if _valid(row):
                        found[row[0]] = row
        except sqlite3.Error as exc:
            self._failed(exc, "reading")
            return None
        idx = [i for i, t in enumerate(texts) if use[i] and t in found]
        self.hits += len(idx)
        self.misses += sum(use) - len(idx)
        if not idx:
            return None
        return Known(idx=np.asarray(idx, dtype=np.int64),
                     solutes=decode_records([found[texts[i]] for i in idx]))

    def store(self, records: Sequence[Record]) -> None:
        """Insert (or replace) records; a failure switches the cache off, never raises."""
        if self._db is None or not records:
            return
        unique = list({r[0]: r for r in records}.values())
        try:
            with self._db:
                self._db.execute("BEGIN")
                self._db.executemany(
                    "INSERT OR REPLACE INTO features VALUES (?,?,?,?,?,?,?,?,?,?,?,?,?)", unique)
        except sqlite3.Error as exc:
            self._failed(exc, "writing")
            return
        self.stored += len(unique)

    def close(self) -> None:
        if self._db is not None:
            with contextlib.suppress(sqlite3.Error):
                self._db.close()
            self._db = None

    def summary(self) -> str:
        """One line: hits, misses and the file (plus any note)."""
        looked = self.hits + self.misses
        share = f" ({100 * self.hits / looked:.0f} %)" if looked else ""
        text = f"feature cache {self.path}: {self.hits} of {looked} structures found{share}"
        return text + (f"; {self.note}" if self.note else "")


class _Stale(Exception):
    """The file's stored version is not this version."""


@dataclass
class CacheFile:
    """One feature-cache file of a directory: its ``path``, ``size_mb`` (with its WAL and
    shared-memory files), ``entries`` (-1 if unreadable), ``version`` ("" if unreadable),
    ``current`` (made by this version of retpred and its libraries) and ``modified``
    (POSIX time of the last write)."""

    path: Path
    size_mb: float
    entries: int
    version: str
    current: bool
    modified: float


def _companions(path: Path) -> list[Path]:
    return [Path(str(path) + suffix) for suffix in ("", "-wal", "-shm")]


def list_cache_files(directory) -> list[CacheFile]:
    """The ``features-*.sqlite`` files of ``directory``, oldest write first. Files are
    opened read-only; one that cannot be read is listed with ``entries`` -1."""
    directory = Path(directory)
    current = cache_version()
    out = []
    for path in sorted(directory.glob("features-*.sqlite")):
        parts = [f for f in _companions(path) if f.exists()]
        size = sum(f.stat().st_size for f in parts) / 1e6
        modified = max(f.stat().st_mtime for f in parts)
        version, entries = "", -1
        try:
            db = sqlite3.connect(f"{path.resolve().as_uri()}?mode=ro", uri=True, timeout=5.0)
            try:
                row = db.execute("SELECT value FROM meta WHERE name = 'version'").fetchone()
                version = row[0] if row else ""
                entries = int(db.execute("SELECT COUNT(*) FROM features").fetchone()[0])
            finally:
                db.close()
        except sqlite3.Error:
            pass
        out.append(CacheFile(path=path, size_mb=size, entries=entries, version=version,
                             current=version == current, modified=modified))
    return sorted(out, key=lambda f: f.modified)


def prune_cache(directory, max_mb: float | None = None) -> list[CacheFile]:
    """Delete the cache files of ``directory`` that this version would never read (other
    versions, unreadable files), then, with ``max_mb``, the oldest remaining files until
    the total is at most ``max_mb``. Returns the deleted files. Only ``features-*.sqlite``
    files (and their ``-wal`` / ``-shm``) are touched."""
    files = list_cache_files(directory)
    gone = [f for f in files if not f.current]
    keep = [f for f in files if f.current]
    if max_mb is not None:
        total = sum(f.size_mb for f in keep)
        while keep and total > max_mb:
            oldest = keep.pop(0)
            total -= oldest.size_mb
            gone.append(oldest)
    for f in gone:
        for part in _companions(f.path):
            with contextlib.suppress(FileNotFoundError):
                part.unlink()
    return gone


def open_cache(cache_dir=None) -> FeatureCache | None:
    """:class:`FeatureCache` of :func:`resolve_cache_dir` ``(cache_dir)``, or None."""
    where = resolve_cache_dir(cache_dir)
    return FeatureCache(where) if where is not None else None
