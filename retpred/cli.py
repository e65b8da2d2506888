"""Command-line interface (thin: parse, call the library, print).

Exit codes: 0 success, 2 bad input (one line naming file, line and field), 1 internal error.
"""

from __future__ import annotations

import sys
from pathlib import Path
from typing import Annotated

import typer
from rich.console import Console

from retpred import __version__
from retpred.errors import InputError

app = typer.Typer(
    add_completion=False,
    no_args_is_help=True,
    help="Reversed-phase HPLC/UHPLC retention prediction for method development. "
    "Predictions are estimates: confirm them by injection.",
)
err = Console(stderr=True)
REPO_ROOT = Path(__file__).resolve().parent.parent
DEMO_DIR = REPO_ROOT / "datasets" / "demo"


def _version(value: bool) -> None:
    if value:
        typer.echo(f"retpred {__version__}")
        raise typer.Exit()


@app.callback()
def main(
    version: Annotated[
        bool, typer.Option("--version", callback=_version, is_eager=True, help="Show version.")
    ] = False,
) -> None:
    """retpred: elution order, times, co-elution risk and column/pH choice from structures."""


def _run(fn):
    """Run a command body; map errors to exit codes without tracebacks."""
    try:
        return fn()
    except InputError as exc:
        typer.echo(f"error: {exc.one_line()}", err=True)
        raise typer.Exit(code=2) from None
    except typer.Exit:
        raise
    except KeyboardInterrupt:
        err.print("interrupted; no output file was written under its final name")
        raise typer.Exit(code=130) from None
    except Exception as exc:  # internal error: short message, exit 1
        typer.echo(" ".join(f"internal error: {type(exc).__name__}: {exc}".split()), err=True)
        if "--debug" in sys.argv:
            raise
        raise typer.Exit(code=1) from None


MethodOpt = Annotated[Path, typer.Option("--method", "-m", help="Method file (TOML).")]
ModelOpt = Annotated[
    Path | None, typer.Option("--model", help="Model file (default: the shipped model).")
]
ForceOpt = Annotated[bool, typer.Option("--force", help="Replace existing output files.")]
AnalytesArg = Annotated[Path, typer.Argument(help="CSV/TSV with a smiles column, .smi or .sdf")]
QuietOpt = Annotated[bool, typer.Option("--quiet", "-q", help="No table or progress output.")]


CalibrantsOpt = Annotated[
    Path | None, typer.Option(help="Measured reference compounds: smiles, rt_min[, name].")
]
CalibrationOpt = Annotated[
    Path | None, typer.Option(help="A calibration file written by 'retpred calibrate'.")
]


@app.command()
def predict(
    analytes: AnalytesArg,
    method: MethodOpt,
    calibrants: CalibrantsOpt = None,
    calibration: CalibrationOpt = None,
    model: ModelOpt = None,
    out: Annotated[Path | None, typer.Option(help="Write the results as CSV here.")] = None,
    plot: Annotated[Path | None, typer.Option(help="Write a simulated chromatogram PNG.")] = None,
    jobs: Annotated[int, typer.Option(min=1, help="Worker processes.")] = 1,
    chunk_size: Annotated[int, typer.Option(min=100, help="Rows per streamed chunk.")] = 5000,
    scheduler: Annotated[
        str | None, typer.Option(help="Dask scheduler address for a cluster run.")
    ] = None,
    cache: Annotated[
        Path | None, typer.Option(help="Feature cache directory for repeated runs on the "
                                  "same library (default: $RETPRED_CACHE_DIR if set).")
    ] = None,
    force: ForceOpt = False,
    quiet: QuietOpt = False,
) -> None:
    """Predict retention times, elution order and co-elution risk on one method."""

    def body():
        from retpred import workflow

        workflow.run_predict(
            analytes, method, calibrants=calibrants, calibration=calibration, model=model,
            out=out, plot=plot, jobs=jobs, chunk_size=chunk_size, force=force, quiet=quiet,
            scheduler=scheduler, cache_dir=cache,
        )

    _run(body)


@app.command()
def demo(
    out: Annotated[Path | None, typer.Option(help="Also write the results as CSV.")] = None,
    plot: Annotated[Path | None, typer.Option(help="Also write the chromatogram PNG.")] = None,
    force: ForceOpt = False,
) -> None:
    """Run the shipped demo scenario (invented method-development case) end to end."""

    def body():
        from retpred import workflow

        readme = DEMO_DIR / "README.md"
        if readme.is_file():
            Console().print(readme.read_text(encoding="utf-8").split("\n\n")[1].strip())
        workflow.run_predict(
            DEMO_DIR / "analytes.csv", DEMO_DIR / "method.toml", out=out, plot=plot,
            force=force, quiet=False,
        )
        workflow.run_columns(DEMO_DIR / "analytes.csv", DEMO_DIR / "method.toml",
                             phases=None, model=None, quiet=False, caution=False)

    _run(body)


@app.command()
def columns(
    analytes: AnalytesArg,
    method: Annotated[list[Path], typer.Option(
        "--method", "-m", help="Method file (TOML). Repeat it to compare several methods "
        "(each with its own column and HSM parameters) as written.")],
    phases: Annotated[
        str | None, typer.Option(help="Comma-separated phase classes (default: all built-in).")
    ] = None,
    model: ModelOpt = None,
    out: Annotated[Path | None, typer.Option(help="Write the comparison as CSV.")] = None,
    detail_out: Annotated[Path | None, typer.Option(
        help="CSV: every analyte on every phase (times, widths, resolution, risk).")] = None,
    plot: Annotated[Path | None, typer.Option(
        help="PNG: simulated chromatograms, one panel per phase or method, best first.")
    ] = None,
    force: ForceOpt = False,
    quiet: QuietOpt = False,
) -> None:
    """Compare phase classes on one method, or method files: order, critical pairs, verdict."""

    def body():
        from retpred import workflow

        workflow.run_columns(analytes, method, phases=phases, model=model, out=out,
                             detail_out=detail_out, plot=plot, force=force, quiet=quiet)

    _run(body)


@app.command()
def scan(
    analytes: AnalytesArg,
    method: MethodOpt,
    ph: Annotated[
        str | None, typer.Option(help="pH range start:stop:step, e.g. 2:8:0.1")
    ] = None,
    gradient_time: Annotated[
        str | None, typer.Option(help="Main ramp duration range in min, e.g. 5:60:5 "
                                  "(with --ph: a pH x ramp map)")
    ] = None,
    phases: Annotated[
        str | None, typer.Option(help="With --ph: also scan these phase classes ('all' or list)")
    ] = None,
    rs_target: Annotated[float, typer.Option(min=0.1, help="Target smallest resolution.")] = 1.5,
    calibrants: CalibrantsOpt = None,
    calibration: CalibrationOpt = None,
    model: ModelOpt = None,
    out: Annotated[Path | None, typer.Option(help="Long CSV: each analyte at each point.")] = None,
    summary_out: Annotated[Path | None, typer.Option(help="CSV: one row per scan point.")] = None,
    plot: Annotated[Path | None, typer.Option(help="Resolution map PNG.")] = None,
    force: ForceOpt = False,
    quiet: QuietOpt = False,
) -> None:
    """Scan pH, gradient time or both: resolution map, best setting, robust window."""

    def body():
        from retpred.scan import run_scan

        run_scan(analytes, method, ph=ph, gradient_time=gradient_time, phases=phases,
                 rs_target=rs_target, calibrants=calibrants, calibration=calibration,
                 model=model, out=out, summary_out=summary_out, plot=plot, force=force,
                 quiet=quiet)

    _run(body)


@app.command("cache")
def cache_cmd(
    directory: Annotated[Path, typer.Argument(help="Feature cache directory.")],
    prune: Annotated[bool, typer.Option(
        help="Delete the files this version cannot use (other versions, unreadable).")] = False,
    max_mb: Annotated[float | None, typer.Option(
        min=0, help="With --prune: then delete the oldest files until at most this size.")
    ] = None,
) -> None:
    """List the feature-cache files of a directory; with --prune, clean it up."""

    def body():
        from retpred import workflow

        workflow.run_cache(directory, prune=prune, max_mb=max_mb)

    _run(body)


@app.command("calibrate")
def calibrate_cmd(
    calibrants: Annotated[Path, typer.Argument(help="CSV/TSV: smiles, rt_min[, name].")],
    method: MethodOpt,
    out: Annotated[Path, typer.Option(help="Calibration file to write (JSON).")],
    model: ModelOpt = None,
    force: ForceOpt = False,
    quiet: QuietOpt = False,
) -> None:
    """Fit a correction for one system from measured reference compounds."""

    def body():
        from retpred import workflow

        workflow.run_calibrate(calibrants, method, out=out, model=model, force=force,
                               quiet=quiet)

    _run(body)


@app.command()
def train(
    data: Annotated[list[Path], typer.Argument(help="CSV/TSV files: smiles, rt_min[, name].")],
    method: Annotated[
        list[Path], typer.Option("--method", "-m", help="Method file; one, or one per file.")
    ],
    out: Annotated[Path, typer.Option(help="Model file to write.")],
    model: ModelOpt = None,
    force: ForceOpt = False,
    quiet: QuietOpt = False,
) -> None:
    """Build a lab model from in-house data, starting from the shipped model."""

    def body():
        from retpred import workflow

        workflow.run_train(data, method, out=out, model=model, force=force, quiet=quiet)

    _run(body)


if __name__ == "__main__":  # pragma: no cover
    app()
