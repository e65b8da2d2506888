"""Streaming batch prediction for large analyte lists, serial, on local cores or on a cluster.

Two passes, memory bounded by the chunk size plus a few small arrays per row:

1. The input is read in chunks (:func:`retpred.io.iter_analytes`); each chunk is predicted
   in pieces of ``PIECE_ROWS`` by :func:`predict_piece` (serially; on local cores, shared
   between the main process and ``jobs - 1`` loky worker processes; or on a Dask cluster)
   and its rows are appended to a temporary spill file beside the output.
   Only ``rt_min``, ``peak_width_min``, ``rt_low_min``, ``rt_high_min`` (float64) and the
   names are kept in memory (about 100 bytes per row). With a feature cache
   (:mod:`retpred.cache`) the main process looks each piece's structures up before it is
   sent out and stores what the piece computed when it comes back.
2. Elution order, resolution to the next peak and co-elution risk are computed over the
   whole list at once (vectorised; the same equations as :func:`retpred.peaks.
   neighbour_pairs`), then the spill file is streamed into the final CSV through
   :func:`retpred.io.atomic_output`: the output name appears only when everything is
   written. The CSV is byte-identical to ``predict_table`` + ``report.write_csv`` (same
   ``chunk_size``), in every execution mode.

A cluster run from Python::

    from dask.distributed import Client
    from retpred.batch import stream_predict
    from retpred.workflow import prepared_run

    method, model, prep = prepared_run("method.toml", None)
    with Client("tcp://scheduler-host:8786") as client:
        summary = stream_predict(prep, "library.csv", "results.csv", scheduler=client)

Workers need retpred and its dependencies installed (``pip install retpred[cluster]``).
"""

from __future__ import annotations

import collections
import contextlib
import os
import pickle
import tempfile
import time
import uuid
from collections.abc import Iterable, Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from retpred.cache import SDF_KEY_PREFIX, FeatureCache, Known, featurise_known, open_cache
from retpred.errors import InputError
from retpred.io import (
    AnalyteChunk,
    atomic_output,
    check_output_target,
    iter_analytes,
    write_csv_rows,
)
from retpred.peaks import (
    any_coelution_probability,
    recalibrate_risk,
    resolution,
    time_error_sd_min,
    unresolved_probability,
)
from retpred.predict import OUTPUT_COLUMNS, Prepared, predict_solutes

#: Columns filled by pass 2 (over the whole list).
PAIR_COLUMNS = ("elution_order", "resolution_next", "coelution_risk", "coelutes_with")
#: Threshold of ``coelutes_with`` (Rs below it, or risk >= 0.5), as in ``neighbour_pairs``.
RS_THRESHOLD = 1.5
#: Rows per task. Small tasks keep local processes evenly loaded to the end of the run (a
#: 500-row task takes about 0.5 s; the per-task overhead is a few ms). Chunks are cut the
#: same way in every mode (serial, local processes, Dask): the model's batch arithmetic
#: (a BLAS matrix-vector product in the ridge term) can differ in the last bit with the
#: batch layout, and identical structures must tie exactly in every mode.
PIECE_ROWS = 500
_EXAMPLES = 20
#: Environment of local worker processes: one thread each for OpenMP (gradient boosting)
#: and BLAS, so N processes use N cores.
_WORKER_ENV = {"OMP_NUM_THREADS": "1", "OPENBLAS_NUM_THREADS": "1", "MKL_NUM_THREADS": "1"}
_WORKER_IDLE_S = 300


@dataclass
class StreamSummary:
    """What a streamed run did.

    ``failed_lines``: input line of every row without a predicted time (status other than
    ``ok`` and no ``rt_min``), in input order; ``status_counts``: number of rows per non-``ok``
    status (rows with a time and a warning status such as ``eluted after program end``
    included); ``failed_examples``: (line, name, status) of the first few failed rows.
    ``rt_min`` holds every row's predicted time (NaN where none), ``table`` the whole result
    when it has at most ``keep_table`` rows (else None), ``preview`` the earliest-eluting
    ``preview_rows`` rows in elution order. ``pairs_computed`` is False when ``pair_limit``
    was exceeded (resolution, risk and partners left empty; elution order still given).
    ``processes``: processes that predicted (the main one included); ``compute_cpu_s``: CPU
    seconds spent predicting, summed over the processes (the rest of ``seconds`` is reading,
    start-up, waiting and writing). ``cache_hits`` / ``cache_misses``: structures found /
    not found in the feature cache (``cache_path``; ``cache_note`` says if it was rebuilt or
    switched off).
    """

    out_path: Path | None
    n_rows: int
    n_ok: int
    n_failed: int
    failed_lines: np.ndarray
    failed_examples: list[tuple[int, str, str]]
    status_counts: dict[str, int]
    pairs_computed: bool
    rt_min: np.ndarray
    preview: pd.DataFrame
    table: pd.DataFrame | None
    seconds: float
    rows_per_s: float
    columns: list[str] = field(default_factory=list)
    processes: int = 1
    compute_cpu_s: float = float("nan")
    cache_path: Path | None = None
    cache_hits: int = 0
    cache_misses: int = 0
    cache_note: str = ""


# ---------------------------------------------------------------------------------------------
# One piece of work (runs in the main process, a local worker process or a Dask worker)
# ---------------------------------------------------------------------------------------------


def chunk_texts(chunk: AnalyteChunk) -> list[str]:
    """The feature-cache key of each row, '' for rows with a read error: the SMILES text,
    or for SDF molecules ``sdf:`` + the SMILES written for the molecule."""
    if chunk.mols is not None:
        return [SDF_KEY_PREFIX + s if e is None and m is not None else ""
                for s, e, m in zip(chunk.smiles, chunk.error, chunk.mols, strict=True)]
    return [s if e is None else "" for s, e in zip(chunk.smiles, chunk.error, strict=True)]


def predict_piece(prep: Prepared, chunk: AnalyteChunk, known: Known | None = None,
                  record: bool = False) -> tuple[pd.DataFrame, list]:
    """Rows of one chunk (pair columns are added once over the whole list) and, with
    ``record``, the feature-cache records of the structures computed here. ``known``:
    cached features of some rows (:meth:`retpred.cache.FeatureCache.lookup`)."""
    sol, records = featurise_known(chunk_texts(chunk), known, record, mols=chunk.mols)
    table = predict_solutes(prep, sol, chunk.name, read_errors=chunk.error)
    table["smiles"] = chunk.smiles
    for col, values in chunk.extra.items():
        name = col if col not in table.columns else f"input_{col}"
        table[name] = values
    table.insert(0, "line", chunk.line)
    return table, records


@dataclass
class _Piece:
    table: pd.DataFrame
    records: list
    cpu_s: float


@dataclass(frozen=True)
class _SharedPrep:
    """Reference to the prepared method in a file written once per run; a worker loads it
    on its first task of the run and keeps it (token) for the others."""

    token: str
    path: str


_WORKER_PREP: dict[str, Prepared] = {}


def _prep_of(state) -> Prepared:
    if not isinstance(state, _SharedPrep):
        return state
    prep = _WORKER_PREP.get(state.token)
    if prep is None:
        with open(state.path, "rb") as fh:
            prep = pickle.load(fh)  # noqa: S301 - written by this run's main process
        _WORKER_PREP.clear()
        _WORKER_PREP[state.token] = prep
    return prep


def _task(state, chunk: AnalyteChunk, known: Known | None, record: bool) -> _Piece:
    t0 = time.thread_time()
    table, records = predict_piece(_prep_of(state), chunk, known, record)
    return _Piece(table, records, time.thread_time() - t0)


def _worker_init() -> None:
    from threadpoolctl import threadpool_limits

    threadpool_limits(1)


def _noop() -> int:
    return os.getpid()


# ---------------------------------------------------------------------------------------------
# Pass 1: pieces, serial / local processes / Dask
# ---------------------------------------------------------------------------------------------


def _slice(chunk: AnalyteChunk, a: int, b: int) -> AnalyteChunk:
    return AnalyteChunk(
        line=chunk.line[a:b], name=chunk.name[a:b], smiles=chunk.smiles[a:b],
        mols=None if chunk.mols is None else chunk.mols[a:b],
        extra={k: v[a:b] for k, v in chunk.extra.items()}, error=chunk.error[a:b],
    )


def _pieces(chunks: Iterable[AnalyteChunk], rows: int | None,
            cache: FeatureCache | None) -> Iterator[tuple[AnalyteChunk, Known | None]]:
    """Chunks cut to at most ``rows`` rows, each with its cached features."""
    for chunk in chunks:
        n = len(chunk)
        step = n if not rows or rows >= n else rows
        for a in range(0, n, max(step, 1)):
            piece = chunk if step == n else _slice(chunk, a, a + step)
            known = None
            if cache is not None:
                known = cache.lookup(chunk_texts(piece))
            yield piece, known


def _serial(prep: Prepared, pieces, record: bool) -> Iterator[_Piece]:
    from threadpoolctl import threadpool_limits

    with threadpool_limits(1):
        for chunk, known in pieces:
            yield _task(prep, chunk, known, record)


_EXECUTORS: list = []


def _executor(workers: int):
    from joblib.externals.loky import get_reusable_executor

    ex = get_reusable_executor(max_workers=workers, timeout=_WORKER_IDLE_S,
                               initializer=_worker_init, env=dict(_WORKER_ENV))
    if ex not in _EXECUTORS:
        _EXECUTORS[:] = [ex]
    return ex


def stop_workers() -> None:
    """Stop the local worker processes (they otherwise stay for a few minutes of idleness so
    that the next run in this Python session starts at once)."""
    while _EXECUTORS:
        _EXECUTORS.pop().shutdown(wait=True, kill_workers=True)


def local_processes(jobs: int) -> int:
    """Processes of a local run with ``jobs`` (-1: all cores); the main process is one."""
    if jobs == 0 or jobs < -1:
        raise InputError("--jobs must be a positive number of processes (or -1 for all cores)",
                         field="--jobs")
    return (os.cpu_count() or 1) if jobs == -1 else jobs


def warm_workers(jobs: int) -> None:
    """Start the local worker processes of a ``jobs`` run now (they import the library in
    the background while the caller loads the method and model)."""
    n = local_processes(jobs)
    if n > 1:
        _executor(n - 1).submit(_noop)


class _Slot:
    __slots__ = ("chunk", "known", "fut", "result")

    def __init__(self, chunk, known):
        self.chunk, self.known, self.fut, self.result = chunk, known, None, None


def _local(prep: Prepared, pieces, jobs: int, record: bool,
           max_pending: int = 0) -> Iterator[_Piece]:
    """Pieces on ``jobs - 1`` worker processes and the main process, results in input order.

    The prepared method goes to each worker once (a file read on its first task). Each
    worker has up to two pieces queued; the main process works on the next piece whenever
    the oldest result is not ready (so it also covers the workers' start-up), and once the
    input is read it takes on the pieces still queued for the workers, so that all
    processes finish together (a piece a worker has already taken is then done twice and
    the first result used). At most ``max_pending`` pieces (default 4 x jobs) are in
    flight."""
    from concurrent.futures import FIRST_COMPLETED, wait

    from threadpoolctl import threadpool_limits

    workers = jobs - 1
    executor = _executor(workers)
    fd, name = tempfile.mkstemp(prefix="retpred-prep-", suffix=".pkl")
    with os.fdopen(fd, "wb") as fh:
        pickle.dump(prep, fh, protocol=pickle.HIGHEST_PROTOCOL)
    state = _SharedPrep(uuid.uuid4().hex, name)
    window = 2 * workers
    max_pending = max(max_pending, 4 * jobs, window + 2)
    pending: collections.deque[_Slot] = collections.deque()
    source = iter(pieces)
    exhausted = False

    def take() -> _Slot | None:
        nonlocal exhausted
        if exhausted:
            return None
        nxt = next(source, None)
        if nxt is None:
            exhausted = True
            return None
        return _Slot(*nxt)

    def here(slot: _Slot) -> None:
        slot.result = _task(prep, slot.chunk, slot.known, record)
        slot.chunk = slot.known = None

    def waiting() -> list[_Slot]:
        return [s for s in pending if s.result is None and not s.fut.done()]

    try:
        with threadpool_limits(1):
            while True:
                in_flight = len(waiting())
                while in_flight < window and len(pending) < max_pending:
                    slot = take()
                    if slot is None:
                        break
                    slot.fut = executor.submit(_task, state, slot.chunk, slot.known, record)
                    pending.append(slot)
                    in_flight += 1
                if not pending:
                    return
                head = pending[0]
                if head.result is not None or head.fut.done():
                    pending.popleft()
                    yield head.result if head.result is not None else head.fut.result()
                    continue
                if len(pending) < max_pending and (slot := take()) is not None:
                    here(slot)
                    pending.append(slot)
                    continue
                if exhausted:
                    # the oldest `workers` unfinished pieces are running; the rest are queued
                    spare = waiting()[workers:]
                    if spare:
                        spare[-1].fut.cancel()
                        here(spare[-1])
                        continue
                wait([head.fut], return_when=FIRST_COMPLETED)
    finally:
        for s in pending:
            if s.fut is not None:
                s.fut.cancel()
        with contextlib.suppress(OSError):
            os.unlink(name)


def _client(scheduler):
    try:
        from distributed import Client
    except ImportError:
        raise InputError("a Dask scheduler needs the 'distributed' package: "
                         "pip install 'retpred[cluster]'", field="--scheduler") from None
    if isinstance(scheduler, Client):
        return scheduler, False
    try:
        return Client(str(scheduler), timeout="20s"), True
    except (OSError, TimeoutError, ValueError) as exc:
        raise InputError(f"cannot connect to the Dask scheduler at {scheduler}: {exc}",
                         field="--scheduler") from None


def _dask(prep: Prepared, pieces, scheduler, record: bool = False,
          window: int | None = None) -> Iterator[_Piece]:
    """Pieces on a Dask cluster (``scheduler``: an address or a ``distributed.Client``).

    The prepared method is sent once to every worker; at most ``window`` pieces (default
    2 x the cluster's threads) are in flight; results are yielded in input order."""
    client, owned = _client(scheduler)
    pending: collections.deque = collections.deque()
    try:
        threads = sum(w.get("nthreads", 1)
                      for w in client.scheduler_info().get("workers", {}).values())
        window = window or max(2, 2 * threads)
        prep_future = client.scatter(prep, broadcast=True, hash=False)
        for chunk, known in pieces:
            pending.append(client.submit(_task, prep_future, chunk, known, record, pure=False))
            if len(pending) >= window:
                fut = pending.popleft()
                yield fut.result()
                fut.release()
        while pending:
            fut = pending.popleft()
            yield fut.result()
            fut.release()
    finally:
        if pending:
            with contextlib.suppress(Exception):
                client.cancel(list(pending))
        if owned:
            client.close()


def _results(prep: Prepared, chunks: Iterable[AnalyteChunk], *, jobs: int = 1, scheduler=None,
             cache: FeatureCache | None = None, piece_rows: int | None = None,
             chunk_size: int = 0) -> tuple[Iterator[_Piece], int]:
    """(pieces' results in input order, processes used)."""
    record = cache is not None and cache.active
    rows = piece_rows if piece_rows else PIECE_ROWS
    if scheduler is not None:
        return _dask(prep, _pieces(chunks, rows, cache), scheduler, record), 0
    n = local_processes(jobs)
    if n == 1:
        return _serial(prep, _pieces(chunks, rows, cache), record), 1
    # rows in flight: about 2 x jobs chunks, as with one chunk per task
    max_pending = 2 * n * max(1, chunk_size // rows) if chunk_size else 0
    return _local(prep, _pieces(chunks, rows, cache), n, record, max_pending), n


def chunk_results(prep: Prepared, chunks: Iterable[AnalyteChunk], *, jobs: int = 1,
                  scheduler=None) -> Iterator[pd.DataFrame]:
    """``predict_piece`` tables of the chunks, in input order, serially (``jobs=1``), on
    ``jobs`` local processes (-1 = all cores; the main process is one of them) or on a Dask
    cluster (``scheduler``); chunks are cut into pieces of ``PIECE_ROWS`` in every mode."""
    results, _ = _results(prep, chunks, jobs=jobs, scheduler=scheduler)
    return (r.table for r in results)


# ---------------------------------------------------------------------------------------------
# Pass 2: order and pairs over the whole list
# ---------------------------------------------------------------------------------------------


@dataclass
class _Pairs:
    elution_order: np.ndarray  # 1-based, 0 where none
    resolution_next: np.ndarray
    coelution_risk: np.ndarray
    left: np.ndarray  # row index of the earlier co-eluting neighbour, -1 if none
    right: np.ndarray  # row index of the later co-eluting neighbour, -1 if none


def whole_list_pairs(rt_min, peak_width_min, rt_low_min, rt_high_min, rho: float,
                     with_pairs: bool = True, sd_scale: float = 1.0,
                     risk_params: tuple[float, float, float] = (1.0, 0.0, 1.0)) -> _Pairs:
    """Order and neighbour pairs of the whole list, vectorised.

    The same relations as :func:`retpred.predict.add_pairs` / :func:`retpred.peaks.
    neighbour_pairs`: peak sigma = width / 4; time-error sd = interval half-width / 1.645
    (90 % interval); spacing sd = sqrt(s1^2 + s2^2 - 2 rho s1 s2); Rs = dt / (2 (s1 + s2));
    a neighbour co-elutes when its pair risk (sd x ``sd_scale``) >= 0.5 or Rs < 1.5; the
    risk column is :func:`retpred.peaks.any_coelution_probability` with the sd x ``scale``
    recalibrated by ``a, b`` (``risk_params`` = (scale, a, b))."""
    rt = np.asarray(rt_min, dtype=float)
    n = rt.shape[0]
    sigma = np.asarray(peak_width_min, dtype=float) / 4.0
    sd = time_error_sd_min(rt, rt_low_min, rt_high_min)
    valid = np.flatnonzero(np.isfinite(rt))
    order = valid[np.argsort(rt[valid], kind="stable")]
    elution = np.zeros(n, dtype=np.int64)
    elution[order] = np.arange(1, order.size + 1)
    res_next = np.full(n, np.nan)
    risk = np.full(n, np.nan)
    left = np.full(n, -1, dtype=np.int64)
    right = np.full(n, -1, dtype=np.int64)
    if with_pairs and order.size >= 2:
        i1, i2 = order[:-1], order[1:]
        rs = resolution(rt[i1], rt[i2], sigma[i1], sigma[i2])
        s1, s2 = sd_scale * sd[i1], sd_scale * sd[i2]
        pair_sd = np.sqrt(np.maximum(s1 ** 2 + s2 ** 2 - 2 * rho * s1 * s2, 0))
        p = unresolved_probability(rt[i2] - rt[i1], sigma[i1], sigma[i2], pair_sd, RS_THRESHOLD)
        res_next[i1] = rs
        scale, a, b = risk_params
        risk = recalibrate_risk(
            any_coelution_probability(rt, sigma, scale * sd, rho, RS_THRESHOLD), a, b)
        with np.errstate(invalid="ignore"):
            co = (np.isfinite(p) & (p >= 0.5)) | (np.isfinite(rs) & (rs < RS_THRESHOLD))
        right[i1[co]] = i2[co]
        left[i2[co]] = i1[co]
    return _Pairs(elution, res_next, risk, left, right)


def _fill_pairs(part: pd.DataFrame, start: int, pairs: _Pairs, names: Sequence[str]) -> None:
    stop = start + len(part)
    eo = pairs.elution_order[start:stop]
    part["elution_order"] = pd.array(np.where(eo > 0, eo, 0), dtype="Int64")
    part.loc[eo <= 0, "elution_order"] = pd.NA
    part["resolution_next"] = pairs.resolution_next[start:stop]
    part["coelution_risk"] = pairs.coelution_risk[start:stop]
    lo, hi = pairs.left[start:stop], pairs.right[start:stop]
    part["coelutes_with"] = [
        "" if a < 0 and b < 0 else
        names[a] if b < 0 else names[b] if a < 0 else f"{names[a]};{names[b]}"
        for a, b in zip(lo.tolist(), hi.tolist(), strict=True)
    ]


# ---------------------------------------------------------------------------------------------
# The streamed run
# ---------------------------------------------------------------------------------------------


def _progress(enabled: bool):
    if not enabled:
        return contextlib.nullcontext(None)
    from rich.console import Console
    from rich.progress import BarColumn, Progress, TextColumn, TimeElapsedColumn

    return Progress(TextColumn("{task.description}"), BarColumn(),
                    TextColumn("{task.completed} rows, {task.fields[bad]} without a time"),
                    TimeElapsedColumn(), console=Console(stderr=True), transient=True)


def _ordered_columns(columns: list[str]) -> list[str]:
    lead = ["line", *OUTPUT_COLUMNS]
    return lead + [c for c in columns if c not in lead]


def _spill_path(out_path: Path | None) -> Path:
    where = out_path.parent if out_path is not None else None
    prefix = f".{out_path.name}." if out_path is not None else ".retpred."
    fd, name = tempfile.mkstemp(prefix=prefix, suffix=".spill", dir=where)
    os.close(fd)
    return Path(name)


def stream_predict(
    prep: Prepared, analytes_path, out_path=None, *, chunk_size: int = 5000, jobs: int = 1,
    scheduler=None, force: bool = False, inputs: Sequence = (), progress: bool = True,
    pair_limit: int | None = None, keep_table: int = 20_000, preview_rows: int = 60,
    cache_dir=None, piece_rows: int | None = None,
) -> StreamSummary:
    """Predict every analyte of ``analytes_path`` on ``prep`` and write the CSV ``out_path``.

    Rows stay in input order; a row that cannot be used is reported in its ``status`` (and in
    the summary) and the run goes on. ``jobs`` > 1 (or -1) runs chunks on local processes,
    ``scheduler`` (a Dask scheduler address or ``distributed.Client``) on a cluster; the
    output is the same bytes in every mode. With ``pair_limit`` set and more usable rows than
    that, the pair columns (resolution, risk, partners) are left empty and only the elution
    order is given. ``out_path`` None: nothing is written (see ``table`` / ``preview``).
    ``inputs``: files the output must not overwrite (the analytes file is always one).
    ``cache_dir``: directory of the feature cache (:mod:`retpred.cache`; None: the
    ``RETPRED_CACHE_DIR`` environment variable if set, else no cache; False: none).
    ``piece_rows``: rows per task (default ``PIECE_ROWS``, in every mode, so that every mode
    gives the same bytes); the spill and the CSV are still written per ``chunk_size``.
    """
    t_start = time.perf_counter()
    out = Path(out_path) if out_path is not None else None
    guard = [analytes_path, *[i for i in inputs if i is not None]]
    if out is not None:
        check_output_target(out, force, guard)
    chunks = iter_analytes(analytes_path, chunk_size=chunk_size)
    rho = float(prep.model.residual_sd_.get("neighbour_rho", 0.0))
    sd_scale = prep.model.pair_sd_scale(prep.calibration is not None)
    risk_params = prep.model.analyte_risk_params(prep.calibration is not None)

    rt, width, low, high = [], [], [], []
    names: list[str] = []
    columns: list[str] = []
    sizes: list[int] = []
    failed_lines: list[np.ndarray] = []
    examples: list[tuple[int, str, str]] = []
    counts: collections.Counter = collections.Counter()
    cpu_s = 0.0
    cache = open_cache(cache_dir)
    spill = _spill_path(out)
    try:
        with _progress(progress) as bar:
            task = bar.add_task("predicting", total=None, bad=0) if bar else None
            n_bad = 0
            results, processes = _results(prep, chunks, jobs=jobs, scheduler=scheduler,
                                          cache=cache, piece_rows=piece_rows,
                                          chunk_size=chunk_size)
            buffer: list[pd.DataFrame] = []
            buffered = 0
            with contextlib.closing(results), open(spill, "wb") as fh:

                def flush() -> None:
                    nonlocal buffer, buffered
                    part = buffer[0] if len(buffer) == 1 else pd.concat(buffer,
                                                                        ignore_index=True)
                    sizes.append(len(part))
                    pickle.dump(part, fh, protocol=pickle.HIGHEST_PROTOCOL)
                    buffer, buffered = [], 0

                for piece in results:
                    if cache is not None and piece.records:
                        cache.store(piece.records)
                    cpu_s += piece.cpu_s
                    part = piece.table
                    for c in part.columns:
                        if c not in columns:
                            columns.append(c)
                    r = part["rt_min"].to_numpy(dtype=float)
                    rt.append(r)
                    width.append(part["peak_width_min"].to_numpy(dtype=float))
                    low.append(part["rt_low_min"].to_numpy(dtype=float))
                    high.append(part["rt_high_min"].to_numpy(dtype=float))
                    names.extend(str(x) for x in part["name"])
                    status = part["status"].to_numpy(dtype=object)
                    not_ok = status != "ok"
                    counts.update(status[not_ok].tolist())
                    bad = np.flatnonzero(~np.isfinite(r))
                    if bad.size:
                        lines = part["line"].to_numpy(dtype=np.int64)
                        failed_lines.append(lines[bad])
                        for i in bad[: max(0, _EXAMPLES - len(examples))]:
                            examples.append((int(lines[i]), str(part["name"].iat[i]),
                                             str(status[i])))
                        n_bad += bad.size
                    buffer.append(part)
                    buffered += len(part)
                    if buffered >= chunk_size:
                        flush()
                    if bar:
                        bar.update(task, advance=len(part), bad=n_bad)
                if buffer:
                    flush()
            rt_all = np.concatenate(rt) if rt else np.empty(0)
            del rt
            n_rows = int(rt_all.size)
            n_usable = int(np.isfinite(rt_all).sum())
            with_pairs = pair_limit is None or n_usable <= pair_limit
            pairs = whole_list_pairs(rt_all, np.concatenate(width), np.concatenate(low),
                                     np.concatenate(high), rho, with_pairs=with_pairs,
                                     sd_scale=sd_scale, risk_params=risk_params)
            del width, low, high
            final_columns = _ordered_columns(columns)
            keep = n_rows <= keep_table
            kept: list[pd.DataFrame] = []
            previews: list[pd.DataFrame] = []
            if bar:
                bar.update(task, description="writing", total=n_rows, completed=0)
            writer = (atomic_output(out, force=force, inputs=guard) if out is not None
                      else contextlib.nullcontext(None))
            with writer as dest, open(spill, "rb") as fh:
                start = 0
                for size in sizes:
                    part = pickle.load(fh)
                    _fill_pairs(part, start, pairs, names)
                    part = part.reindex(columns=final_columns)
                    if dest is not None:
                        write_csv_rows(part, dest, header=start == 0)
                    eo = pairs.elution_order[start:start + size]
                    sel = (eo > 0) & (eo <= preview_rows)
                    if sel.any():
                        previews.append(part[sel])
                    if keep:
                        kept.append(part)
                    start += size
                    if bar:
                        bar.update(task, advance=size)
    finally:
        with contextlib.suppress(FileNotFoundError):
            spill.unlink()
        if cache is not None:
            cache.close()
    table = pd.concat(kept, ignore_index=True) if keep and kept else None
    if previews:
        preview = pd.concat(previews, ignore_index=True).sort_values("elution_order",
                                                                      kind="stable")
        preview = preview.reset_index(drop=True)
    else:
        preview = pd.DataFrame(columns=final_columns)
    seconds = time.perf_counter() - t_start
    lines_failed = np.concatenate(failed_lines) if failed_lines else np.empty(0, np.int64)
    return StreamSummary(
        out_path=out, n_rows=n_rows, n_ok=n_usable, n_failed=int(lines_failed.size),
        failed_lines=lines_failed, failed_examples=examples, status_counts=dict(counts),
        pairs_computed=with_pairs, rt_min=rt_all, preview=preview, table=table,
        seconds=seconds, rows_per_s=n_rows / seconds if seconds > 0 else float("nan"),
        columns=final_columns, processes=processes, compute_cpu_s=cpu_s,
        cache_path=cache.path if cache is not None else None,
        cache_hits=cache.hits if cache is not None else 0,
        cache_misses=cache.misses if cache is not None else 0,
        cache_note=cache.note if cache is not None else "",
    )
