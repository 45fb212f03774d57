"""Command line: parse, call the pipeline, print.  No science here.

Commands
--------
``screener run PROJECT.toml --out DIR``      the whole analysis
``screener check PROJECT.toml``              validate inputs without fitting anything
``screener demo --out DIR``                  write the invented demo scenario and run it
``screener debrief FIELD.csv --run DIR --out DIR2``   score predictions after a survey
``screener reproduce DIR/run.json --out DIR2``        rerun from a run's provenance
"""

from __future__ import annotations

import errno
import functools
import logging
import sys
import warnings
from pathlib import Path

import click

from screener import __version__
from screener.errors import (
    InputError,
    OutputError,
    RecordsError,
    ScreenerDeprecationWarning,
    ScreenerError,
)

log = logging.getLogger("screener")

debug_opt = click.option(
    "--debug", is_flag=True, help="Show full tracebacks for errors (for bug reports)."
)
out_opt = click.option(
    "--out", "out", required=True, type=click.Path(file_okay=False, path_type=Path),
    help="Output folder (must not exist unless --overwrite).",
)
overwrite_opt = click.option(
    "--overwrite", is_flag=True, help="Replace the output folder if it exists."
)
scheduler_opt = click.option(
    "--scheduler", default=None, metavar="auto|serial|processes|dask|ADDRESS",
    help="Where independent work runs: auto (processes for heavy work, else serial), "
    "serial, local processes, a local Dask cluster, or a Dask scheduler address "
    "(tcp://host:8786). Default: [compute] scheduler.",
)
cache_opt = click.option(
    "--cache-dir", default=None, type=click.Path(file_okay=False, path_type=Path),
    help="Stage cache folder (default: .screener-cache beside the project file).",
)
nocache_opt = click.option("--no-cache", is_flag=True, help="Neither read nor write the cache.")


def _echo_err(text):
    click.echo(text, err=True)


#: errno values of file-system failures the user can fix (exit code 2, like bad input)
_USER_OS_ERRORS = {
    errno.ENOENT: "no such file or folder",
    errno.EACCES: "permission denied",
    errno.EPERM: "operation not permitted",
    errno.EROFS: "read-only file system",
    errno.ENOSPC: "the disk is full",
    errno.EDQUOT: "disk quota exceeded",
    errno.EISDIR: "is a folder, not a file",
    errno.ENOTDIR: "a part of the path is a file, not a folder",
}


def _interrupt_message(command: str, cached: bool) -> str:
    text = "Interrupted. Nothing was written to the output folder"
    if cached:
        return (
            text + "; finished stages are cached, so running the same command again "
            "resumes where this run stopped."
        )
    if command == "run":
        return text + " (--no-cache: a rerun starts from the beginning)."
    return text + "; run the same command again to start over."


def handle_errors(fn):
    """Turn errors into a short message and an exit code.

    Exit codes: 0 success; 2 bad input or an output folder that cannot be written
    (the user can fix it; click's usage errors are 2 as well); 1 a bug in the
    screener; 130 interrupted (Ctrl-C).  ``--debug`` shows the traceback instead.
    """

    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        debug = kwargs.get("debug", False)
        cached = fn.__name__ == "run" and not kwargs.get("no_cache", False)
        try:
            with warnings.catch_warnings():
                # renamed settings are listed with the run's own warnings ("Warning:
                # ..." on the console, run.json, the report), not as Python warnings
                warnings.simplefilter("ignore", ScreenerDeprecationWarning)
                return fn(*args, **kwargs)
        except KeyboardInterrupt:
            if debug:
                raise
            _echo_err(_interrupt_message(fn.__name__, cached))
            sys.exit(130)
        except click.ClickException:
            raise
        except ScreenerError as exc:
            if debug:
                raise
            _echo_err(f"Error: {exc.args[0] if exc.args else exc}")
            sys.exit(2 if isinstance(exc, (InputError, OutputError)) else 1)
        except MemoryError:
            if debug:
                raise
            _echo_err(
                "Error: out of memory. Use a coarser grid or a smaller region, or lower "
                "[background] max_points."
            )
            sys.exit(1)
        except OSError as exc:
            if debug:
                raise
            what = _USER_OS_ERRORS.get(exc.errno)
            where = exc.filename or "the file system"
            if what is not None:
                _echo_err(
                    f"Error: {where}: {what}. Check the path and its permissions, or "
                    "free disk space, then run again."
                )
                sys.exit(2)
            _echo_err(f"Error: {exc.strerror or exc} ({where}).")
            sys.exit(1)
        except Exception as exc:
            if debug:
                raise
            _echo_err(
                f"Internal error ({type(exc).__name__}: {exc}). This is a bug in the "
                "screener, not in your data: rerun with --debug and report the traceback."
            )
            sys.exit(1)

    return wrapper


@click.group(context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(__version__, prog_name="screener")
@click.option("-v", "--verbose", count=True, help="More log output (repeatable).")
@click.option("-q", "--quiet", count=True, help="Less output.")
@click.pass_context
def main(ctx, verbose, quiet):
    """Rank places to survey for unknown populations and undescribed lineages.

    Predictions are hypotheses for survey, not evidence of presence or absence.
    """
    from screener.system import avoid_hugepage_stalls

    avoid_hugepage_stalls()
    level = max(10, 30 - 10 * verbose + 10 * quiet)
    logging.basicConfig(level=level, format="%(levelname)s %(name)s: %(message)s",
                        stream=sys.stderr)
    ctx.ensure_object(dict)
    ctx.obj["quiet"] = quiet > 0


def _cache_arg(cache_dir, no_cache):
    if no_cache:
        return None
    return cache_dir if cache_dir is not None else "auto"


@main.command()
@click.argument("project", type=click.Path(dir_okay=False, path_type=Path))
@out_opt
@overwrite_opt
@scheduler_opt
@cache_opt
@nocache_opt
@debug_opt
@click.pass_context
@handle_errors
def run(ctx, project, out, overwrite, scheduler, cache_dir, no_cache, debug):
    """Run PROJECT (a TOML file) and write every output into --out."""
    from screener.pipeline import run_project
    from screener.project import load_project

    settings = load_project(project)
    echo = None if ctx.obj.get("quiet") else _echo_err
    result = run_project(settings, out, overwrite=overwrite, echo=echo, scheduler=scheduler,
                         cache_dir=_cache_arg(cache_dir, no_cache))
    _print_summary(result, out)
    _print_warnings(result)


def _print_summary(result, out):
    sites = result.sites
    click.echo(f"Wrote {out}")
    if len(sites):
        click.echo("Top sites (hypotheses for survey, not proof of presence):")
        for _, row in sites.head(5).iterrows():
            click.echo(
                f"  {row['site_id']}: {row['kind']}, "
                f"{row['area_km2']:.1f} km2, nearest {row['nearest_taxon']}, "
                f"gap {row['gap_km']:.1f} km, score {row['score']:.2f}, "
                f"{row.get('threshold_set', '')} thresholds ({row.get('stability', '')})"
            )
    else:
        click.echo("No candidate sites were found at these thresholds.")
    click.echo(f"Open {Path(out) / 'report.html'} for the full plan.")


def _print_warnings(result):
    """The run's warnings (also in run.json and the report), on stderr."""
    for w in result.warnings:
        _echo_err(f"Warning: {w}")


@main.command()
@click.argument("project", type=click.Path(dir_okay=False, path_type=Path))
@debug_opt
@handle_errors
def check(project, debug):
    """Validate PROJECT without fitting: grid, layers, records kept and dropped."""
    from screener.intake import check_project
    from screener.project import load_project

    try:
        lines = check_project(load_project(project))
    except RecordsError as exc:
        # list every dropped row before the error, so all can be fixed in one pass
        found = exc.args[1] if len(exc.args) > 1 else None
        for line in getattr(found, "summary_lines", lambda: [])():
            click.echo(line)
        raise
    for line in lines:
        click.echo(line)


@main.command()
@out_opt
@overwrite_opt
@click.option("--size", type=click.Choice(["full", "small"]), default="full",
              show_default=True, help="Scenario size (small is for quick tries).")
@scheduler_opt
@debug_opt
@click.pass_context
@handle_errors
def demo(ctx, out, overwrite, size, scheduler, debug):
    """Write the invented demo scenario into --out/scenario and run it into --out/results."""
    from screener.demo import write_demo_scenario
    from screener.outputs.run_folder import RunFolder, repoint_run_json
    from screener.outputs.staging import check_output_folder, staged_output
    from screener.pipeline import run_project
    from screener.project import load_project

    out = check_output_folder(out, overwrite=overwrite)
    echo = None if ctx.obj.get("quiet") else _echo_err
    # the same staging and overwrite rules as a run: a folder that appeared
    # meanwhile, or one the screener did not write, is never replaced.  The scenario
    # stays beside the results, and run.json is pointed at where it will be.
    with staged_output(out, overwrite=overwrite) as stage:
        if echo:
            echo(f"Writing the invented demo scenario ({size}) to {out / 'scenario'}")
        project = write_demo_scenario(stage / "scenario", size=size)
        settings = load_project(project)
        result = run_project(settings, stage / "results", echo=echo, scheduler=scheduler,
                             cache_dir=None)
        repoint_run_json(RunFolder(stage / "results").run_json, stage, out)
    _print_summary(result, out / "results")
    _print_warnings(result)


allow_changed_opt = click.option(
    "--allow-changed-inputs", is_flag=True,
    help="Go on even if input files no longer match the hashes the run recorded.")


@main.command()
@click.argument("field_results", type=click.Path(dir_okay=False, path_type=Path))
@click.option("--run", "run_dir", required=True,
              type=click.Path(file_okay=False, exists=True, path_type=Path),
              help="Output folder of the run whose predictions were surveyed.")
@out_opt
@overwrite_opt
@allow_changed_opt
@debug_opt
@handle_errors
def debrief(field_results, run_dir, out, overwrite, allow_changed_inputs, debug):
    """Score a run's predictions against FIELD_RESULTS after a survey."""
    from screener.debrief import debrief_run

    summary = debrief_run(field_results, run_dir, out, overwrite=overwrite,
                          allow_changed_inputs=allow_changed_inputs)
    for line in summary:
        click.echo(line)


@main.command()
@click.argument("run_json", type=click.Path(dir_okay=False, exists=True, path_type=Path))
@out_opt
@overwrite_opt
@scheduler_opt
@allow_changed_opt
@debug_opt
@click.pass_context
@handle_errors
def reproduce(ctx, run_json, out, overwrite, scheduler, allow_changed_inputs, debug):
    """Rerun a run from its run.json (same settings, seeds and inputs)."""
    from screener.intake import reproduction_settings
    from screener.pipeline import run_project

    settings, prov = reproduction_settings(run_json, allow_changed_inputs=allow_changed_inputs)
    echo = None if ctx.obj.get("quiet") else _echo_err
    result = run_project(settings, out, overwrite=overwrite, echo=echo,
                         scheduler=scheduler or prov.get("scheduler"), cache_dir=None)
    _print_summary(result, out)
    _print_warnings(result)


if __name__ == "__main__":  # pragma: no cover
    main()
