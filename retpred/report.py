"""What the user sees: the terminal table, the CSV and the simulated chromatogram."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pandas as pd
from rich.console import Console
from rich.table import Table

from retpred.io import atomic_output, atomic_output_path, write_csv_rows
from retpred.peaks import simulate_chromatogram
from retpred.predict import STATUS_MEASURED

CAUTION = (
    "Predicted times are estimates: confirm them by injecting standards. Stay within the "
    "column's and instrument's pressure, pH and temperature limits, and follow your local "
    "safety rules and validated procedures."
)


def name_list(names, limit: int = 8) -> str:
    """The first ``limit`` names, comma-separated, with " ..." when there are more."""
    names = [str(n) for n in names]
    return ", ".join(names[:limit]) + (" ..." if len(names) > limit else "")


def fmt_value(x, digits=2) -> str:
    if x is None or (isinstance(x, float) and not math.isfinite(x)) or x is pd.NA:
        return "-"
    try:
        return f"{float(x):.{digits}f}"
    except (TypeError, ValueError):
        return str(x)


def elution_table(table: pd.DataFrame, title: str, max_rows: int = 60) -> Table:
    """A rich table in elution order, failed rows last."""
    order = table["elution_order"].astype("Float64").fillna(np.inf).to_numpy(float)
    idx = np.argsort(order, kind="stable")
    t = Table(title=title, header_style="bold", show_lines=False, pad_edge=False)
    for col in ("#", "name", "rt min", "90% interval", "width", "Rs next", "risk", "log D",
                "species", "status"):
        left = col in ("name", "species", "status")
        t.add_column(col, justify="left" if left else "right", no_wrap=True,
                     overflow="ellipsis", max_width=28 if col == "name" else None)
    for shown, i in enumerate(idx):
        if shown >= max_rows:
            t.add_row("...", f"{len(idx) - max_rows} more rows in the CSV", *[""] * 8)
            break
        r = table.iloc[i]
        risk = r["coelution_risk"]
        flag = ""
        if isinstance(risk, float) and math.isfinite(risk) and risk >= 0.5:
            flag = "[bold red]"
        elif isinstance(risk, float) and math.isfinite(risk) and risk >= 0.2:
            flag = "[yellow]"
        eo = r["elution_order"]
        t.add_row(
            "-" if eo is pd.NA else str(int(eo)),
            str(r["name"]),
            fmt_value(r["rt_min"]),
            _interval_text(r),
            fmt_value(r["peak_width_min"], 3),
            fmt_value(r["resolution_next"], 1),
            f"{flag}{fmt_value(risk)}",
            fmt_value(r["logd"], 1),
            str(r["species"]),
            str(r["status"])[:60],
        )
    return t


def _interval_text(row) -> str:
    """``low-high``; "measured" for a measured standard on its own method, whose interval
    is its measured time."""
    if STATUS_MEASURED in str(row["status"]).split("; "):
        return "measured"
    return f"{fmt_value(row['rt_low_min'])}-{fmt_value(row['rt_high_min'])}"


def make_console() -> Console:
    """A console at least 132 columns wide when output goes to a file or pipe."""
    c = Console()
    return c if c.is_terminal else Console(width=max(c.width, 132))


def print_report(table: pd.DataFrame, title: str, notes: list[str], console: Console) -> None:
    console.print(elution_table(table, title))
    crit = table[table["coelution_risk"].astype(float) >= 0.5]
    if len(crit):
        pairs = sorted({tuple(sorted((str(a), str(b))))
                        for a, bs in zip(crit["name"], crit["coelutes_with"], strict=True)
                        for b in str(bs).split(";") if b})
        if pairs:
            console.print("[bold red]At risk of co-eluting:[/] " + ", ".join(
                f"{a} / {b}" for a, b in pairs))
        alone = [str(n) for n, bs in zip(crit["name"], crit["coelutes_with"], strict=True)
                 if not str(bs) or str(bs) == "nan"]
        if alone:
            console.print("[bold red]At risk of co-eluting with one of several analytes "
                          "within the time error:[/] " + ", ".join(alone))
    for n in notes:
        console.print(f"[yellow]note:[/] {n}")
    console.print(f"[dim]{CAUTION}[/]")


def write_csv(table: pd.DataFrame, path: Path, *, force: bool, inputs=()) -> None:
    with atomic_output(path, force=force, inputs=inputs) as fh:
        write_csv_rows(table, fh)


def pyplot():
    """matplotlib's pyplot on the non-interactive Agg backend (imported on first use)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def _peaks(table: pd.DataFrame):
    """Eluted rows, their sigma (width / 4) and whether each is critical: at risk (>= 0.5)
    or below Rs 1.5 with its next peak (then both peaks are marked)."""
    ok = table[np.isfinite(table["rt_min"].astype(float))]
    rt = ok["rt_min"].to_numpy(float)
    sigma = ok["peak_width_min"].to_numpy(float) / 4.0
    risk = ok["coelution_risk"].astype(float).to_numpy()
    rs_next = ok["resolution_next"].astype(float).to_numpy()
    order = np.argsort(rt)
    crit = np.isfinite(risk) & (risk >= 0.5)
    for a, b in zip(order[:-1], order[1:], strict=True):
        if np.isfinite(rs_next[a]) and rs_next[a] < 1.5:
            crit[a] = crit[b] = True
    return ok["name"].astype(str).tolist(), rt, sigma, crit


def _draw_chromatogram(ax, table: pd.DataFrame, end_min: float) -> None:
    """One simulated trace: unit-area Gaussian peaks scaled to equal height, labelled,
    critical peaks in red."""
    names, rt, sigma, crit = _peaks(table)
    grid = np.linspace(0.0, end_min, 4000)
    ax.plot(grid, simulate_chromatogram(rt, sigma, 1.0, grid), color="#1f4e79", lw=1.0)
    for name, t, s, c in zip(names, rt, sigma, crit, strict=True):
        if c:
            ax.axvspan(t - 2 * s, t + 2 * s, color="#ffcccc", alpha=0.6, lw=0)
        ax.annotate(name[:18], (t, 1.02), rotation=90, fontsize=7,
                    color="#c00000" if c else "#333333", ha="center", va="bottom",
                    annotation_clip=False)
    ax.set_xlim(0, end_min)
    ax.set_ylim(0, 1.45)


def _plot_end_min(tables) -> float:
    ends = [float(np.nanmax(rt + 6 * sigma)) for _, rt, sigma, _ in map(_peaks, tables)
            if rt.size]
    return 1.05 * max(ends) if ends else 1.05


def _draw_organic(ax, program, end_min: float,
                  label: str = "% organic at the column outlet (dashed)") -> None:
    """% organic leaving the column (:meth:`ElutionProgram.phi_outlet`) on a right-hand
    axis, dashed, so each peak can be read against the eluent that carries it."""
    grid = np.linspace(0.0, end_min, 800)
    right = ax.twinx()
    right.plot(grid, 100.0 * program.phi_outlet(grid), color="#7f7f7f", lw=0.9, ls="--")
    right.set_ylim(0, 145)
    right.set_yticks([0, 25, 50, 75, 100])
    right.set_ylabel(label, fontsize=8, color="#555555")


def plot_chromatogram(
    table: pd.DataFrame, path: Path, title: str, subtitle: str, *, force: bool, inputs=(),
    program=None,
) -> None:
    """Simulated chromatogram: unit-area Gaussian peaks scaled to equal height, labelled,
    critical pairs in red; with ``program`` (an ``ElutionProgram``) the organic share at
    the column outlet as a dashed trace."""
    plt = pyplot()
    fig, ax = plt.subplots(figsize=(11, 4.8), dpi=110)
    end = _plot_end_min([table])
    _draw_chromatogram(ax, table, end)
    if program is not None:
        _draw_organic(ax, program, end)
    ax.set_xlabel("time (min)")
    ax.set_ylabel("relative response (equal heights)")
    ax.set_title(title, fontsize=10, loc="left")
    ax.text(0.0, -0.2, subtitle + "\nSimulated from predicted times and widths; "
            "confirm by injection.", transform=ax.transAxes, fontsize=7, va="top")
    fig.tight_layout()
    save_figure(fig, path, force=force, inputs=inputs)


def comparison_figure(tables: dict[str, pd.DataFrame], labels: list[str], title: str,
                      programs: dict | None = None):
    """Simulated chromatograms of the same list, one panel per label (top to bottom in the
    order of ``labels``), on one time axis; returns the matplotlib figure. ``programs``:
    each label's ``ElutionProgram``, drawn as the organic share at the column outlet."""
    plt = pyplot()
    n = len(labels)
    fig, axes = plt.subplots(n, 1, figsize=(11, 1.2 + 2.3 * n), dpi=110, sharex=True,
                             squeeze=False)
    end = _plot_end_min([tables[k] for k in labels])
    for ax, label in zip(axes[:, 0], labels, strict=True):
        _draw_chromatogram(ax, tables[label], end)
        if programs and label in programs:
            _draw_organic(ax, programs[label], end, label="% organic")
        ax.set_yticks([])
        ax.set_ylabel(label, rotation=0, ha="right", va="center", fontsize=8)
    axes[-1, 0].set_xlabel("time (min)")
    axes[0, 0].set_title(title, fontsize=10, loc="left", pad=48)
    foot = ("Simulated from predicted times and widths (zero-shot); confirm by injection."
            + (" Dashed: % organic at the column outlet." if programs else ""))
    axes[-1, 0].text(0.0, -0.45, foot, transform=axes[-1, 0].transAxes, fontsize=7, va="top")
    fig.tight_layout()
    return fig


def save_figure(fig, path: Path, *, force: bool, inputs=()) -> None:
    """Write ``fig`` as PNG atomically (never over an input; an existing file only with
    ``force``) and close it."""
    plt = pyplot()
    with atomic_output_path(path, force=force, inputs=inputs) as tmp:
        fig.savefig(tmp, format="png")
    plt.close(fig)
