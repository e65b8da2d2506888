"""Command workflows: read inputs, call the library, write outputs. The CLI calls these."""

from __future__ import annotations

import dataclasses
from collections.abc import Iterator, Sequence
from pathlib import Path

import numpy as np
import pandas as pd
from rich.console import Console
from rich.progress import BarColumn, Progress, TextColumn, TimeElapsedColumn
from rich.table import Table

from retpred.calibration import Calibration
from retpred.errors import InputError
from retpred.gradient import program_from_method
from retpred.io import (
    AnalyteChunk,
    atomic_output,
    check_output_target,
    iter_analytes,
    read_calibrants,
    read_smiles_list,
)
from retpred.lab import lab_domain_note
from retpred.method import PHASE_CLASSES, Method, load_method, method_summary
from retpred.model import RetentionModel, featurise
from retpred.modelfile import load_model
from retpred.predict import (
    OUTPUT_COLUMNS,
    Prepared,
    add_pairs,
    calibrate,
    predict_solutes,
    prepare,
    system_context,
)
from retpred.report import (
    CAUTION,
    comparison_figure,
    fmt_value,
    make_console,
    name_list,
    plot_chromatogram,
    print_report,
    save_figure,
    write_csv,
)


def check_outputs(outputs: Sequence[Path | None], inputs: Sequence[Path | None], force: bool):
    """Refuse bad output paths before any work is done (they are checked again on write)."""
    seen = set()
    for o in outputs:
        if o is None:
            continue
        check_output_target(o, force, [i for i in inputs if i is not None])
        key = str(Path(o).resolve())
        if key in seen:
            raise InputError("the same file is given for two outputs", path=str(o))
        seen.add(key)


def predict_chunk(prep: Prepared, chunk: AnalyteChunk) -> pd.DataFrame:
    """Rows of one chunk (pair columns are added once over the whole list)."""
    from retpred.batch import predict_piece

    return predict_piece(prep, chunk)[0]


def _predict_chunks(prep: Prepared, chunks: Iterator[AnalyteChunk], jobs: int):
    from retpred.batch import chunk_results

    return chunk_results(prep, chunks, jobs=jobs, scheduler=None)


def load_calibration_file(path: Path) -> Calibration:
    try:
        text = Path(path).read_text(encoding="utf-8")
    except FileNotFoundError:
        raise InputError("calibration file not found", path=str(path)) from None
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"cannot read calibration file: {exc}", path=str(path)) from None
    return Calibration.from_json(text, path=str(path))


def prepared_run(
    method_path: Path, model_path: Path | None, calibrants: Path | None = None,
    calibration: Path | None = None,
) -> tuple[Method, RetentionModel, Prepared]:
    method = load_method(method_path)
    model = load_model(model_path)
    if calibrants is not None and calibration is not None:
        raise InputError("give --calibrants or --calibration, not both")
    prep = prepare(method, model)
    note = lab_domain_note(model, prep.context)
    if note:
        method = dataclasses.replace(method, warnings=(*method.warnings, note))
        prep = dataclasses.replace(prep, method=method)
    if calibrants is not None:
        cal_df = read_calibrants(calibrants)
        cal = calibrate(prep, cal_df["smiles"], cal_df["rt_min"].to_numpy(float),
                        cal_df["name"].tolist())
        prep = dataclasses.replace(prep, calibration=cal)
    elif calibration is not None:
        cal = load_calibration_file(calibration)
        mismatch = [w for w in (cal.model_mismatch(model.identity()),
                                cal.condition_mismatch(method)) if w]
        if mismatch:
            cal = dataclasses.replace(cal, warnings=(*cal.warnings, *mismatch))
        # the calibrants' window on this method's program, for the coverage warnings
        prep = dataclasses.replace(prep, calibration=cal.on_program(prep.program))
    return method, model, prep


def predict_table(
    prep: Prepared, analytes: Path, *, chunk_size: int = 5000, jobs: int = 1,
    progress: bool = False,
) -> pd.DataFrame:
    """All rows of ``analytes`` predicted on ``prep``, with order and pair columns."""
    chunks = iter_analytes(analytes, chunk_size=chunk_size)
    parts = []
    if progress:
        with Progress(TextColumn("predicting"), BarColumn(), TextColumn("{task.completed} rows"),
                      TimeElapsedColumn(), console=Console(stderr=True), transient=True) as bar:
            task = bar.add_task("predict", total=None)
            for part in _predict_chunks(prep, chunks, jobs):
                parts.append(part)
                bar.advance(task, len(part))
    else:
        parts = list(_predict_chunks(prep, chunks, jobs))
    table = pd.concat(parts, ignore_index=True)
    table = add_pairs(table, prep.model, calibrated=prep.calibration is not None)
    lead = ["line", *OUTPUT_COLUMNS]
    return table[lead + [c for c in table.columns if c not in lead]]


def run_predict(
    analytes: Path, method_path: Path, *, calibrants=None, calibration=None, model=None,
    out=None, plot=None, jobs: int = 1, chunk_size: int = 5000, force: bool = False,
    quiet: bool = False, scheduler=None, cache_dir=None,
) -> pd.DataFrame:
    """The ``predict`` command. ``cache_dir``: feature cache directory (None: the
    ``RETPRED_CACHE_DIR`` environment variable if set, else no cache)."""
    from retpred.batch import local_processes, stream_predict, warm_workers

    inputs = [analytes, method_path, calibrants, calibration, model]
    check_outputs([out, plot], inputs, force)
    if scheduler is None and local_processes(jobs) > 1:
        warm_workers(jobs)  # workers import the library while the model loads
    method, mdl, prep = prepared_run(method_path, model, calibrants, calibration)
    summary = stream_predict(prep, analytes, out, chunk_size=chunk_size, jobs=jobs,
                             scheduler=scheduler, force=force, inputs=inputs,
                             progress=not quiet, cache_dir=cache_dir)
    table = summary.table if summary.table is not None else summary.preview
    notes = list(method.warnings)
    if prep.calibration is not None:
        cal = prep.calibration
        notes.extend(cal.notes())
        from retpred.calibration import coverage_warning

        w = coverage_warning(cal, np.asarray(summary.rt_min, float))
        if w:
            notes.append(w)
    else:
        notes.append("not calibrated: times are zero-shot estimates for this system "
                     "(give --calibrants with a few measured standards to correct them)")
    if summary.cache_note:
        notes.append(summary.cache_note)
    if summary.n_failed:
        notes.append(f"{summary.n_failed} of {summary.n_rows} row(s) without a predicted time; "
                     "see their status")
    if summary.table is None:
        notes.append(f"{summary.n_rows} rows: the table shows the first {len(table)} in elution "
                     "order; all rows are in the CSV")
    if plot is not None and summary.table is None:
        notes.append("no chromatogram drawn for a list this long")
    elif plot is not None:
        plot_chromatogram(table, plot, title=f"retpred: {Path(analytes).name}",
                          subtitle=method_summary(method), force=force, inputs=inputs,
                          program=prep.program)
    if not quiet:
        console = make_console()
        print_report(table, method_summary(method), notes, console)
        if out is not None:
            console.print(f"wrote {out}")
        if plot is not None:
            console.print(f"wrote {plot}")
    return table


# --- column comparison ----------------------------------------------------------------------

def phase_summary(table: pd.DataFrame, rs_target: float = 1.5) -> dict:
    ok = table[np.isfinite(table["rt_min"].astype(float))].sort_values("rt_min")
    rs = ok["resolution_next"].astype(float).to_numpy()
    names = ok["name"].astype(str).tolist()
    finite = np.isfinite(rs)
    crit = [f"{names[i]} / {names[i + 1]}" for i in range(len(rs))
            if finite[i] and rs[i] < rs_target]
    min_rs = float(np.nanmin(rs)) if finite.any() else float("nan")
    imin = int(np.nanargmin(np.where(finite, rs, np.inf))) if finite.any() else -1
    risk = ok["coelution_risk"].astype(float).to_numpy()
    return {
        "order": names,
        "critical_pairs": crit,
        "min_resolution": min_rs,
        "worst_pair": f"{names[imin]} / {names[imin + 1]}" if imin >= 0 else "",
        "n_unresolved": len(crit),
        "last_rt_min": float(ok["rt_min"].max()) if len(ok) else float("nan"),
        "max_risk": float(np.nanmax(risk)) if np.isfinite(risk).any() else float("nan"),
    }


def parse_phases(phases: str | None) -> list[str]:
    if not phases:
        return list(PHASE_CLASSES)
    out = []
    lookup = {p.lower(): p for p in PHASE_CLASSES}
    for raw in phases.split(","):
        p = raw.strip()
        if p.lower() not in lookup:
            raise InputError(f"unknown phase '{p}'; built-in classes: {', '.join(PHASE_CLASSES)}",
                             field="--phases")
        out.append(lookup[p.lower()])
    return out


def phase_entries(method: Method, phases: list[str]) -> list[tuple[str, Method]]:
    """``method`` with its column set to each phase class (class-median HSM parameters)."""
    return [(phase, dataclasses.replace(
        method, column=dataclasses.replace(method.column, phase=phase, hsm=None)))
        for phase in phases]


def compare_methods(entries: Sequence[tuple[str, Method]], model: RetentionModel,
                    smiles: list[str], names: list[str], key: str = "method"
                    ) -> tuple[pd.DataFrame, dict[str, pd.DataFrame]]:
    """Predict the same list on each ``(label, method)``; one summary row per label (in
    column ``key``, with the method's phase class), ranked: fewest pairs below Rs 1.5,
    then the largest smallest resolution, then the shorter run."""
    sol = featurise(smiles)
    rows, tables = [], {}
    for label, m in entries:
        t = predict_solutes(prepare(m, model), sol, names)
        t["smiles"] = smiles
        t = add_pairs(t, model)
        tables[label] = t
        row = {key: label} if key == "phase" else {key: label, "phase": m.column.phase}
        rows.append({**row, **phase_summary(t)})
    summary = pd.DataFrame(rows).sort_values(
        ["n_unresolved", "min_resolution", "last_rt_min"], ascending=[True, False, True]
    ).reset_index(drop=True)
    summary.insert(0, "rank", np.arange(1, len(summary) + 1))
    return summary, tables


def columns_detail(tables: dict[str, pd.DataFrame], key: str = "phase") -> pd.DataFrame:
    """Every analyte on every phase or method (long form, input order within each): the
    predict columns with the label (column ``key``) first."""
    parts = []
    for label, t in tables.items():
        cols = [c for c in OUTPUT_COLUMNS if c in t.columns]
        parts.append(t[cols].assign(**{key: label})[[key, *cols]])
    return pd.concat(parts, ignore_index=True)


def method_labels(paths: Sequence[Path]) -> list[str]:
    """Short labels for method files: the file names, or the paths where names repeat."""
    names = [Path(p).name for p in paths]
    return names if len(set(names)) == len(names) else [str(p) for p in paths]


def run_columns(analytes, method_path, *, phases=None, model=None, out=None, detail_out=None,
                plot=None, force=False, quiet=False, caution=True):
    """The ``columns`` command; ``caution=False`` when the caller has shown it already.

    ``method_path``: one method file (its column replaced by each phase class of
    ``phases``), or a list of several, compared as written (each with its own column,
    HSM parameters, eluent and gradient)."""
    paths = list(method_path) if isinstance(method_path, list | tuple) else [method_path]
    several = len(paths) > 1
    seen = {Path(p).resolve() for p in paths}
    if len(seen) < len(paths):
        raise InputError("the same method file is given twice", field="--method")
    if several and phases:
        raise InputError("--phases compares phase classes on one method; with several "
                         "--method files the files are compared as written", field="--phases")
    inputs = [analytes, *paths, model]
    check_outputs([out, detail_out, plot], inputs, force)
    methods = [load_method(p) for p in paths]
    method = methods[0]
    mdl = load_model(model)
    smiles, names = read_smiles_list(analytes)
    key = "method" if several else "phase"
    entries = (list(zip(method_labels(paths), methods, strict=True)) if several
               else phase_entries(method, parse_phases(phases)))
    summary, tables = compare_methods(entries, mdl, smiles, names, key=key)
    if out is not None:
        flat = summary.copy()
        flat["order"] = flat["order"].map(lambda x: " > ".join(x))
        flat["critical_pairs"] = flat["critical_pairs"].map(lambda x: "; ".join(x))
        write_csv(flat, out, force=force, inputs=inputs)
    if detail_out is not None:
        write_csv(columns_detail(tables, key), detail_out, force=force, inputs=inputs)
    if plot is not None:
        labels = summary[key].tolist()  # best first
        title = (f"retpred: {Path(analytes).name}, "
                 + ("methods" if several else f"phases on {method_summary(method)}")
                 + " (best first)")
        programs = {label: program_from_method(m) for label, m in entries}
        save_figure(comparison_figure(tables, labels, title, programs), plot, force=force,
                    inputs=inputs)
    if not quiet:
        console = make_console()
        title = ("Methods compared on the same list (each file's own column and conditions)"
                 if several else
                 "Column phases on the same method (class-median HSM parameters)")
        t = Table(title=title)
        heads = ["rank", *(["method"] if several else []), "phase", "smallest Rs",
                 "worst pair", "pairs Rs<1.5", "last peak min"]
        for c in heads:
            t.add_column(c)
        for r in summary.to_dict("records"):
            t.add_row(str(r["rank"]), *([r["method"]] if several else []), r["phase"],
                      fmt_value(r["min_resolution"]), r["worst_pair"], str(r["n_unresolved"]),
                      fmt_value(r["last_rt_min"]))
        console.print(t)
        best = summary.iloc[0]
        if np.isfinite(best.min_resolution):
            verdict = (f"{best[key]} separates this list best"
                       + (" and resolves all pairs" if best.n_unresolved == 0 else
                          f" but leaves {best.n_unresolved} pair(s) below Rs 1.5")
                       + f" (smallest Rs {best.min_resolution:.2f}).")
        else:
            verdict = "fewer than two analytes have a predicted time: no pair to separate."
        console.print(f"[bold]verdict:[/] {verdict}")
        method_warnings = ([f"{label}: {w}" for label, m in entries for w in m.warnings]
                           if several else list(method.warnings))
        off_lab = [label for label, m in entries
                   if lab_domain_note(mdl, system_context(m)) is not None]
        if off_lab:
            method_warnings.append(
                "the lab model was trained on other conditions than those of "
                + name_list(off_lab) + ": its correction is carried over untested there")
        for w in [*method_warnings, *columns_warnings(tables)]:
            console.print(f"[yellow]warning:[/] {w}")
        console.print("[yellow]note:[/] zero-shot estimates"
                      + ("" if several else " with class-median column parameters")
                      + "; the comparison ranks "
                      + ("methods" if several else "phases")
                      + ", it does not replace a run on each column")
        if caution:
            console.print(f"[dim]{CAUTION}[/]")
        for p in (out, detail_out, plot):
            if p is not None:
                console.print(f"wrote {p}")
    return summary


def columns_warnings(tables: dict[str, pd.DataFrame]) -> list[str]:
    """Analytes left out of the comparison: without a predicted time on some phase or
    method (the first one's status names why, e.g. an unparseable SMILES or not eluted)."""
    missing: dict[str, str] = {}
    for t in tables.values():
        for name, rt, status in zip(t["name"], t["rt_min"].astype(float), t["status"],
                                    strict=True):
            if not np.isfinite(rt):
                missing.setdefault(str(name), str(status))
    if not missing:
        return []
    return [f"{len(missing)} analyte(s) without a predicted time on at least one column, "
            "left out of its order and pairs: "
            + name_list(f"{n} ({s})" for n, s in missing.items())]


# --- calibration and training ------------------------------------------------------------------

def run_calibrate(calibrants, method_path, *, out, model=None, force=False, quiet=False):
    inputs = [calibrants, method_path, model]
    check_outputs([out], inputs, force)
    method = load_method(method_path)
    mdl = load_model(model)
    prep = prepare(method, mdl)
    cal_df = read_calibrants(calibrants)
    cal = calibrate(prep, cal_df["smiles"], cal_df["rt_min"].to_numpy(float),
                    cal_df["name"].tolist())
    with atomic_output(out, force=force, inputs=inputs) as fh:
        fh.write(cal.to_json())
    if not quiet:
        c = make_console()
        c.print(f"calibration ({cal.describe()}) from {cal.n_calibrants} compound(s) on "
                f"{method_summary(method)}")
        for kind, e in cal.loo_errors_min.items():
            what = " (the model's own predictions)" if kind == "unchanged" else ""
            c.print(f"  leave-one-out median |error| with '{kind}'{what}: {e:.3f} min")
        if np.isfinite(cal.loo_median_abs_error_min):
            c.print(f"  leave-one-out median |error| of the correction used: "
                    f"{cal.loo_median_abs_error_min:.3f} min")
        if cal.factor_note():
            c.print(f"  {cal.factor_note()}")
        if cal.standard_keys:
            c.print(f"  {len(cal.standard_keys)} standard structure(s) kept: the same structure "
                    "in an analyte list is predicted at its measured time on this method")
        for w in cal.warnings:
            c.print(f"[yellow]warning:[/] {w}")
        c.print(f"wrote {out}")
    return cal


def run_train(data, methods, *, out, model=None, force=False, quiet=False):
    from retpred.lab import train_lab_model

    return train_lab_model(data, methods, out=out, base_model=model, force=force, quiet=quiet)


# --- cache housekeeping ------------------------------------------------------------------------

def run_cache(directory, *, prune: bool = False, max_mb: float | None = None,
              console: Console | None = None):
    """List the feature-cache files of ``directory``; with ``prune``, delete the files this
    version cannot use and, with ``max_mb``, the oldest until the rest fit."""
    import datetime

    from retpred.cache import list_cache_files, prune_cache

    directory = Path(directory)
    if not directory.is_dir():
        raise InputError("not a directory", path=directory)
    if max_mb is not None and not prune:
        raise InputError("--max-mb only acts with --prune", field="--max-mb")
    c = console or make_console()
    files = list_cache_files(directory)
    t = Table(title=f"Feature cache {directory}")
    for col in ("file", "MB", "structures", "version", "last written (UTC)"):
        t.add_column(col, justify="right" if col in ("MB", "structures") else "left")
    for f in files:
        when = datetime.datetime.fromtimestamp(f.modified, datetime.UTC)
        t.add_row(f.path.name, f"{f.size_mb:.1f}", str(f.entries) if f.entries >= 0 else "-",
                  "this version" if f.current else ("unreadable" if not f.version else "other"),
                  when.strftime("%Y-%m-%d %H:%M"))
    c.print(t)
    if prune:
        gone = prune_cache(directory, max_mb)
        freed = sum(f.size_mb for f in gone)
        c.print(f"deleted {len(gone)} file(s), {freed:.1f} MB")
        return gone
    return []
