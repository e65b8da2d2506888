"""Streaming batch prediction for large analyte lists, serial, on local cores or on a cluster.

Two passes, memory bounded by the chunk size plus a few small arrays per row:

1. The input is read in chunks (:func:`retpred.io.iter_analytes`); each chunk is predicted
   by :func:`retpred.workflow.predict_chunk` (serially, on local cores with joblib, or on a
   Dask cluster) and its rows are appended to a temporary spill file beside the output.
   Only ``rt_min``, ``peak_width_min``, ``rt_low_min``, ``rt_high_min`` (float64) and the
   names are kept in memory (about 100 bytes per row).
2. Elution order, resolution to the next peak and co-elution risk are computed over the
   whole list at once (vectorised; the same equations as :func:`retpred.peaks.
   neighbour_pairs`), then the spill file is streamed into the final CSV through
   :func:`retpred.io.atomic_output`: the output name appears only when everything is
   written. The CSV is byte-identical to ``predict_table`` + ``report.write_csv``.

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
from collections.abc import Iterable, Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from retpred.errors import InputError
from retpred.io import AnalyteChunk, atomic_output, check_output_target, iter_analytes
from retpred.peaks import resolution, unresolved_probability
from retpred.predict import OUTPUT_COLUMNS, Z90, Prepared
from retpred.workflow import predict_chunk

#: Columns filled by pass 2 (over the whole list).
PAIR_COLUMNS = ("elution_order", "resolution_next", "coelution_risk", "coelutes_with")
#: Threshold of ``coelutes_with`` (Rs below it, or risk >= 0.5), as in ``neighbour_pairs``.
RS_THRESHOLD = 1.5
_EXAMPLES = 20


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


# ---------------------------------------------------------------------------------------------
# Pass 1: chunk results, serial / joblib / Dask
# ---------------------------------------------------------------------------------------------


def _serial(prep: Prepared, chunks: Iterable[AnalyteChunk]) -> Iterator[pd.DataFrame]:
    for chunk in chunks:
        yield predict_chunk(prep, chunk)


def _joblib(prep: Prepared, chunks: Iterable[AnalyteChunk], jobs: int) -> Iterator[pd.DataFrame]:
    """Chunks on local cores (loky worker processes), results in input order; at most
    2 x jobs chunks are in flight, so memory stays bounded."""
    from joblib import Parallel, delayed

    yield from Parallel(n_jobs=jobs, backend="loky", return_as="generator",
                        pre_dispatch="2*n_jobs")(delayed(predict_chunk)(prep, c) for c in chunks)


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


def _dask(prep: Prepared, chunks: Iterable[AnalyteChunk], scheduler,
          window: int | None = None) -> Iterator[pd.DataFrame]:
    """Chunks on a Dask cluster (``scheduler``: an address or a ``distributed.Client``).

    The prepared method is sent once to every worker; at most ``window`` chunks (default
    2 x the cluster's threads) are in flight; results are yielded in input order."""
    client, owned = _client(scheduler)
    pending: collections.deque = collections.deque()
    try:
        threads = sum(w.get("nthreads", 1)
                      for w in client.scheduler_info().get("workers", {}).values())
        window = window or max(2, 2 * threads)
        prep_future = client.scatter(prep, broadcast=True, hash=False)
        for chunk in chunks:
            pending.append(client.submit(predict_chunk, prep_future, chunk, pure=False))
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


def chunk_results(prep: Prepared, chunks: Iterable[AnalyteChunk], *, jobs: int = 1,
                  scheduler=None) -> Iterator[pd.DataFrame]:
    """``predict_chunk`` of each chunk, in input order, serially (``jobs=1``), on ``jobs``
    local processes (joblib/loky; -1 = all cores) or on a Dask cluster (``scheduler``)."""
    if scheduler is not None:
        return _dask(prep, chunks, scheduler)
    if jobs == 0:
        raise InputError("--jobs must be a positive number of processes (or -1 for all cores)",
                         field="--jobs")
    if jobs == 1:
        return _serial(prep, chunks)
    return _joblib(prep, chunks, jobs)


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
                     with_pairs: bool = True, sd_scale: float = 1.0) -> _Pairs:
    """Order and neighbour pairs of the whole list, vectorised.

    The same relations as :func:`retpred.predict.add_pairs` / :func:`retpred.peaks.
    neighbour_pairs`: peak sigma = width / 4; time-error sd = interval half-width / 1.645
    (90 % interval); spacing sd = sqrt(s1^2 + s2^2 - 2 rho s1 s2); Rs = dt / (2 (s1 + s2));
    risk = largest unresolved probability with either neighbour; a neighbour co-elutes
    when its risk >= 0.5 or Rs < 1.5."""
    rt = np.asarray(rt_min, dtype=float)
    n = rt.shape[0]
    sigma = np.asarray(peak_width_min, dtype=float) / 4.0
    half = (np.asarray(rt_high_min, dtype=float) - np.asarray(rt_low_min, dtype=float)) / 2
    sd = np.where(np.isfinite(half), sd_scale * half / Z90, np.nan)
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
        pair_sd = np.sqrt(np.maximum(sd[i1] ** 2 + sd[i2] ** 2 - 2 * rho * sd[i1] * sd[i2], 0))
        p = unresolved_probability(rt[i2] - rt[i1], sigma[i1], sigma[i2], pair_sd, RS_THRESHOLD)
        res_next[i1] = rs
        # risk: each row's pairs are (previous, row) and (row, next); NaN ones are ignored
        risk[i1] = p
        risk[i2] = np.fmax(risk[i2], p)
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
) -> StreamSummary:
    """Predict every analyte of ``analytes_path`` on ``prep`` and write the CSV ``out_path``.

    Rows stay in input order; a row that cannot be used is reported in its ``status`` (and in
    the summary) and the run goes on. ``jobs`` > 1 (or -1) runs chunks on local processes,
    ``scheduler`` (a Dask scheduler address or ``distributed.Client``) on a cluster; the
    output is the same bytes in every mode. With ``pair_limit`` set and more usable rows than
    that, the pair columns (resolution, risk, partners) are left empty and only the elution
    order is given. ``out_path`` None: nothing is written (see ``table`` / ``preview``).
    ``inputs``: files the output must not overwrite (the analytes file is always one).
    """
    t_start = time.perf_counter()
    out = Path(out_path) if out_path is not None else None
    guard = [analytes_path, *[i for i in inputs if i is not None]]
    if out is not None:
        check_output_target(out, force, guard)
    chunks = iter_analytes(analytes_path, chunk_size=chunk_size)
    rho = float(prep.model.residual_sd_.get("neighbour_rho", 0.0))
    sd_scale = float(prep.model.residual_sd_.get("pair_sd_scale", 1.0))

    rt, width, low, high = [], [], [], []
    names: list[str] = []
    columns: list[str] = []
    sizes: list[int] = []
    failed_lines: list[np.ndarray] = []
    examples: list[tuple[int, str, str]] = []
    counts: collections.Counter = collections.Counter()
    spill = _spill_path(out)
    try:
        with _progress(progress) as bar:
            task = bar.add_task("predicting", total=None, bad=0) if bar else None
            n_bad = 0
            with open(spill, "wb") as fh:
                for part in chunk_results(prep, chunks, jobs=jobs, scheduler=scheduler):
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
                    sizes.append(len(part))
                    pickle.dump(part, fh, protocol=pickle.HIGHEST_PROTOCOL)
                    if bar:
                        bar.update(task, advance=len(part), bad=n_bad)
            rt_all = np.concatenate(rt) if rt else np.empty(0)
            del rt
            n_rows = int(rt_all.size)
            n_usable = int(np.isfinite(rt_all).sum())
            with_pairs = pair_limit is None or n_usable <= pair_limit
            pairs = whole_list_pairs(rt_all, np.concatenate(width), np.concatenate(low),
                                     np.concatenate(high), rho, with_pairs=with_pairs,
                                     sd_scale=sd_scale)
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
                        part.to_csv(dest, index=False, header=start == 0, float_format="%.4f",
                                    lineterminator="\n")
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
        columns=final_columns,
    )
