"""The ``lesion-growth`` command: parse, call the stages, turn errors into one line and a status.

Exit status: 0 every input processed; 1 some inputs failed (listed in errors.tsv), the rest
written; 2 usage or configuration error, nothing computed.
"""
from __future__ import annotations

import functools
import sys
from pathlib import Path

import typer

from pipeline import DISCLAIMER, __version__
from pipeline.errors import ConfigError, InputError, PipelineError, UsageError
from pipeline.run.outdir import check_out

EPILOG = f"{DISCLAIMER} lesion-growth {__version__}."

app = typer.Typer(add_completion=False, no_args_is_help=True, rich_markup_mode=None,
                  help="Lesion volumes, lesion tracks across sessions and growth-law fits from "
                       "longitudinal lesion masks (NIfTI). " + DISCLAIMER,
                  epilog=EPILOG, pretty_exceptions_enable=False)

InputArg = typer.Argument(..., help="Manifest (.tsv/.csv: subject, session, mask, date or day) "
                          "or the root of a BIDS derivatives folder.")
OutOpt = typer.Option(..., "-o", "--out", help="Output folder.")
OutArg = typer.Argument(..., help="Output folder of an earlier run.")
ConfigOpt = typer.Option(None, "--config", help="TOML file overriding configs/default.toml.")
WorkersOpt = typer.Option(1, "--workers", min=0,
                          help="Processes for reading masks and matching subjects "
                          "(0 = all cores).")
SchedulerOpt = typer.Option(None, "--scheduler", help="Address of a Dask distributed scheduler "
                            "(needs lesion-growth[dask]).")
QuietOpt = typer.Option(False, "--quiet", "-q", help="No progress display.")
EventsOpt = typer.Option(None, "--events", help="Events table (subject, date or day, event, "
                         "optional lesion) splitting series into phases.")
CorrectionsOpt = typer.Option(None, "--corrections", help="corrections.tsv from QA review "
                              "(subject, session, component, lesion).")
DescOpt = typer.Option(None, "--desc",
                       help="BIDS input: pick desc-<LABEL> masks when a session has "
                       "several (default: lesion).")
ForecastOpt = typer.Option(None, "--forecast-days", help="Forecast horizon after the last "
                           "session, in days (0 to 1826).")


def _line(exc: Exception) -> str:
    return " ".join(str(exc).split())


def _guard(command):
    """Turn a PipelineError raised by a command into one line on stderr and its exit status."""
    @functools.wraps(command)
    def wrapper(*args, **kwargs):
        try:
            return command(*args, **kwargs)
        except (UsageError, ConfigError) as exc:
            print(f"error: {_line(exc)}", file=sys.stderr)
            raise typer.Exit(2) from None
        except InputError as exc:
            print(f"error: {_line(exc)}", file=sys.stderr)
            raise typer.Exit(1) from None
        except PipelineError as exc:
            print(f"error: {_line(exc)}", file=sys.stderr)
            raise typer.Exit(2) from None
    return wrapper


def _config(path: Path | None, desc: str | None = None, forecast: float | None = None):
    from pipeline.config import load_config

    overrides: dict = {}
    if desc:
        overrides["volumes"] = {"desc": desc}
    if forecast is not None:
        overrides["fitting"] = {"forecast_days": float(forecast)}
    return load_config(path, **overrides)


def _start_pool(workers: int, scheduler: str | None) -> None:
    """Start the worker pool's fork server first, so its imports overlap this process's own."""
    if scheduler is None and workers >= 0:
        from pipeline.run.executors import start_pool_server

        start_pool_server(workers)


@app.command(epilog=EPILOG)
@_guard
def run(input: Path = InputArg, out: Path = OutOpt, events: Path | None = EventsOpt,
        config: Path | None = ConfigOpt, workers: int = WorkersOpt,
        scheduler: str | None = SchedulerOpt, corrections: Path | None = CorrectionsOpt,
        desc: str | None = DescOpt, forecast_days: float | None = ForecastOpt,
        quiet: bool = QuietOpt) -> None:
    """Every stage: volumes, matching, fitting, report."""
    check_out(out)
    _start_pool(workers, scheduler)
    from pipeline.run.commands import run_all

    settings = _config(config, desc, forecast_days)
    raise typer.Exit(run_all(input, out, config=settings, config_path=config, events=events,
                             corrections=corrections, workers=workers, scheduler=scheduler,
                             quiet=quiet))


@app.command(epilog=EPILOG)
@_guard
def volumes(input: Path = InputArg, out: Path = OutOpt, config: Path | None = ConfigOpt,
            workers: int = WorkersOpt, scheduler: str | None = SchedulerOpt,
            desc: str | None = DescOpt, quiet: bool = QuietOpt) -> None:
    """Stage 1 alone: lesions.tsv (one row per connected lesion component)."""
    check_out(out)
    _start_pool(workers, scheduler)
    from pipeline.run.commands import volumes_only

    settings = _config(config, desc)
    raise typer.Exit(volumes_only(input, out, config=settings, config_path=config,
                                  workers=workers, scheduler=scheduler, quiet=quiet))


@app.command(epilog=EPILOG)
@_guard
def match(out: Path = OutArg, corrections: Path | None = CorrectionsOpt,
          config: Path | None = ConfigOpt, workers: int = WorkersOpt) -> None:
    """Stage 2 alone: matches.tsv, longitudinal.tsv and tracks/ from lesions.tsv in OUT."""
    from pipeline.run.commands import match_only

    check_out(out, earlier_run=True)
    _start_pool(workers, None)
    raise typer.Exit(match_only(out, config=_config(config), corrections=corrections,
                                workers=workers))


@app.command(epilog=EPILOG)
@_guard
def fit(out: Path = OutArg, events: Path | None = EventsOpt,
        config: Path | None = ConfigOpt, forecast_days: float | None = ForecastOpt) -> None:
    """Stage 3 alone: fits.tsv and group_fits.tsv from longitudinal.tsv in OUT."""
    from pipeline.run.commands import fit_only

    check_out(out, earlier_run=True)
    raise typer.Exit(fit_only(out, config=_config(config, None, forecast_days), events=events))


@app.command(epilog=EPILOG)
@_guard
def report(out: Path = OutArg, config: Path | None = ConfigOpt) -> None:
    """report.html from what is in OUT."""
    from pipeline.run.commands import report_only

    check_out(out, earlier_run=True)
    raise typer.Exit(report_only(out, config=_config(config)))


@app.command(epilog=EPILOG)
@_guard
def evaluate(out: Path = OutArg,
             outcomes: Path = typer.Option(..., "--outcomes", help="Table: subject, lesion, "
                                           "outcome (two values)."),
             figure: list[str] = typer.Option(["beta"], "--figure", help="fits.tsv column to "
                                              "evaluate (repeatable)."),
             phase: str | None = typer.Option(None, "--phase", help="Only fits of this phase."),
             model: str = typer.Option("power", "--model", help="Fits of this model, or 'best'."),
             positive: str | None = typer.Option(None, "--positive", help="Outcome value "
                                                    "that counts as positive."),
             source: str = typer.Option("fits", "--source", help="'fits' (per-lesion fits, "
                                        "fits.tsv) or 'population' (the population model's "
                                        "individual estimates, population_lesions.tsv)."),
             config: Path | None = ConfigOpt) -> None:
    """How well a fitted figure separates two outcomes: evaluation.tsv."""
    from pipeline.run.commands import evaluate_only

    settings = _config(config)
    check_out(out, earlier_run=True)
    raise typer.Exit(evaluate_only(out, outcomes, figures=tuple(figure), phase=phase,
                                   model=model, positive=positive, source=source,
                                   config=settings))


@app.command(epilog=EPILOG)
@_guard
def check(input: Path = InputArg, config: Path | None = ConfigOpt,
          desc: str | None = DescOpt) -> None:
    """Validate every input (headers, dates, geometry, labels); compute and write nothing."""
    from pipeline.run.commands import check_inputs

    raise typer.Exit(check_inputs(input, config=_config(config, desc)))


@app.command(epilog=EPILOG)
@_guard
def demo(out: Path = typer.Argument(..., help="Folder for the demo inputs and outputs."),
         workers: int = WorkersOpt, quiet: bool = QuietOpt,
         subjects: int = typer.Option(12, "--subjects", min=1, max=99,
                                      help="Number of invented patients.")) -> None:
    """Make the invented demo cohort under OUT/inputs and run every stage on it."""
    check_out(out)
    _start_pool(workers, None)
    from pipeline.run.commands import run_demo

    raise typer.Exit(run_demo(out, workers=workers, quiet=quiet, subjects=subjects))


def _version(value: bool) -> None:
    if value:
        typer.echo(f"lesion-growth {__version__}")
        raise typer.Exit(0)


@app.callback()
def _main(version: bool = typer.Option(False, "--version", callback=_version, is_eager=True,
                                       help="Print the version and exit.")) -> None:
    """Research use only; see the epilog."""


def main(argv: list[str] | None = None) -> int:
    """Entry point of the console script and of ``python -m pipeline``.

    With ``argv`` (tests, Python callers) the exit status is returned instead of exiting.
    """
    try:
        app(args=argv, prog_name="lesion-growth")
    except SystemExit as done:
        code = done.code if isinstance(done.code, int) else (0 if done.code is None else 1)
        if argv is None:
            raise
        return code
    return 0
