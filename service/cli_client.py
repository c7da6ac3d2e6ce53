"""The terminal commands that talk to a running server: ``segscore fit FILE --name N``, ``versions``, ``show``,
``compare``, ``promote``, ``label``, ``assign``, ``drift``, ``jobs``.

Each is a thin layer over ``service.client.Client`` (no server code is imported): it checks the local file
(``service.client._files``), sends the request, and prints the answer as tables (``service.cli_tables``) or,
with ``--json``, as the server sent it. Exit status: 0 success; 1 the server refused or could not be reached
(the status and the ``detail`` are printed); 2 a usage or local file problem.
"""

from __future__ import annotations

import functools
import json
import sys
from pathlib import Path
from typing import Any, Callable, get_args

import click

from service.client import (
    KEY_VARIABLE,
    URL_VARIABLE,
    ApiError,
    Client,
    LocalInputError,
    SegscoreError,
)
from service.client._errors import detail_lines
from service.client._files import check_csv_file

# Columns ``segscore assign`` adds to the input rows.
ASSIGN_COLUMNS = ("segment", "label", "distance", "outlier")
EXIT_SERVER = 1
EXIT_LOCAL = 2


def _choices(field: str) -> click.Choice:
    """The allowed values of a fit parameter, read from the wire contract (one fact in one place)."""
    from schemas import FitRequest

    return click.Choice(get_args(FitRequest.model_fields[field].annotation))


def _parse_components(text: str | None) -> Any:
    if text is None:
        return None
    if text.strip().lower() == "none":
        return "none"
    for kind in (int, float):
        try:
            return kind(text)
        except ValueError:
            pass
    raise click.BadParameter(f"expected a count, a variance share in (0, 1) or 'none'; got {text!r}",
                             param_hint="--components")


def _parse_k(text: str | None) -> int | dict[str, int] | None:
    if text is None:
        return None
    low, sep, high = text.strip().partition("-")
    try:
        return {"min": int(low), "max": int(high)} if sep else int(low)
    except ValueError:
        raise click.BadParameter(f"expected an int or a range like 2-10; got {text!r}", param_hint="--k") from None


def fit_options(function: Callable) -> Callable:
    """The fit parameters as options; left out, the server's (or the request model's) default applies."""
    options = [
        click.option("--features", default=None, help="comma-separated columns (default: every numeric column)"),
        click.option("--id-column", default=None, help="a column of record ids (not a feature)"),
        click.option("--scaling", type=_choices("scaling"), default=None, help="default standard"),
        click.option("--components", default=None, help="count, variance share in (0,1), or 'none' (default 0.9)"),
        click.option("--method", type=_choices("method"), default=None, help="default kmeans"),
        click.option("--linkage", type=_choices("linkage"), default=None, help="agglomerative only"),
        click.option("--k", "k_text", default=None, help="an int, or a range like 2-10 (default 2-10)"),
        click.option("--selection", type=_choices("selection"), default=None, help="default elbow"),
        click.option("--seed", type=int, default=None),
        click.option("--live/--not-live", "make_live", default=None, help="make the new version live"),
    ]
    for option in reversed(options):
        function = option(function)
    return function


def fit_params(*, features: str | None, id_column: str | None, scaling: str | None, components: str | None,
               method: str | None, linkage: str | None, k_text: str | None, selection: str | None,
               seed: int | None, make_live: bool | None) -> dict[str, Any]:
    """The options given, as fit request fields (``components: None`` means no PCA; left out: the default)."""
    given = {"features": features.split(",") if features else None, "id_column": id_column, "scaling": scaling,
             "components": _parse_components(components), "method": method, "linkage": linkage,
             "k": _parse_k(k_text), "selection": selection, "seed": seed, "make_live": make_live}
    params = {key: value for key, value in given.items() if value is not None}
    if params.get("components") == "none":
        params["components"] = None
    return params


def _connection_options(function: Callable) -> Callable:
    function = click.option("--json", "as_json", is_flag=True, help="print the server's answer as JSON")(function)
    function = click.option("--key", default=None, help=f"API key (default ${KEY_VARIABLE})")(function)
    return click.option("--url", default=None, help=f"server URL (default ${URL_VARIABLE} or "
                        "http://127.0.0.1:8000)")(function)


def _client(url: str | None, key: str | None) -> Client:
    """A Client for the server; tests put a factory ``(url, key) -> Client`` in the root context's ``obj``."""
    import logging

    logging.getLogger("httpx2").setLevel(logging.WARNING)     # not a line per request on the terminal
    factory = click.get_current_context().find_root().obj
    return factory(url, key) if callable(factory) else Client(url, key=key)


def _console(stderr: bool = False):
    from rich.console import Console

    # Written where click writes (so CliRunner captures it); no colour codes when that is not a terminal.
    return Console(file=sys.stderr if stderr else sys.stdout, soft_wrap=False)


def _talks_to_server(command: Callable) -> Callable:
    """Maps the client's errors to the exit status and a readable message on standard error."""

    @functools.wraps(command)
    def wrapper(*args: Any, **kwargs: Any) -> None:
        try:
            command(*args, **kwargs)
        except ApiError as error:
            from http import HTTPStatus

            try:
                reason = HTTPStatus(error.status).phrase
            except ValueError:
                reason = ""
            lines = detail_lines(error.detail)
            click.echo(f"error: the server refused ({error.status} {reason}; {error.method} {error.path}):", err=True)
            for line in lines[:20]:
                click.echo(f"  {line}", err=True)
            if len(lines) > 20:
                click.echo(f"  ... and {len(lines) - 20} more", err=True)
            sys.exit(EXIT_SERVER)
        except LocalInputError as error:
            click.echo(f"error: {error}", err=True)
            sys.exit(EXIT_LOCAL)
        except SegscoreError as error:            # ServerUnreachable, UnexpectedResponse
            click.echo(f"error: {error}", err=True)
            sys.exit(EXIT_SERVER)

    return wrapper


def _print(answer: Any, as_json: bool, render: Callable[[], Any]) -> None:
    if as_json:
        click.echo(json.dumps(answer, indent=2))
    else:
        _console().print(render())


def _input_file(function: Callable) -> Callable:
    return click.argument("file", type=click.Path(exists=True, dir_okay=False, path_type=Path))(function)


def _live_features(api: Client, name: str, version: int | None) -> list[str]:
    """The features of ``version`` (default: the live one): the columns whose types the local check reads."""
    if version is None:
        version = api.segmentation(name)["live_version"]
        if version is None:
            return []                       # the server answers 409 (no live version) for the request itself
    return api.version(name, version)["features"]


def _moved_to_store_fit(context: click.Context, parameter: click.Parameter, value: Any) -> None:
    """``segscore fit NAME FILE --store DIR`` was the local fit before ``fit`` talked to a server."""
    if value is not None:
        raise click.UsageError("'segscore fit' sends the file to a server; to fit into a local store without "
                               "one, run 'segscore store-fit NAME FILE --store DIR'")


# ---------------------------------------------------------------------------------------------------- commands
@click.command("fit")
@click.option("--store", hidden=True, is_eager=True, expose_value=False, callback=_moved_to_store_fit)
@_input_file
@click.option("--name", required=True, help="the segmentation to fit a new version of")
@fit_options
@_connection_options
@_talks_to_server
def fit_command(file: Path, name: str, url: str | None, key: str | None, as_json: bool, **options: Any) -> None:
    """Upload FILE (CSV, optionally .gz) to the server and fit a new version of a segmentation; print its report.

    The file is checked here first (header, delimiter, column types of the first rows, gzip integrity), then
    streamed with a progress bar; the server runs the fit as a background job, which is followed with a second
    progress bar (its step and share done). Interrupted (Ctrl-C), the job goes on: see 'segscore jobs'."""
    from rich.progress import BarColumn, DownloadColumn, Progress, SpinnerColumn, TextColumn, TimeElapsedColumn

    params = fit_params(**options)
    check_csv_file(file, columns=params.get("features"), skip=[params["id_column"]] if "id_column" in params else ())
    with _client(url, key) as api:
        with Progress(SpinnerColumn(), TextColumn("{task.description}"), BarColumn(), DownloadColumn(),
                      TimeElapsedColumn(), console=_console(stderr=True), transient=True) as progress:
            upload = progress.add_task(f"uploading {file.name}", total=file.stat().st_size)
            job = api.fit(name, file, upload_progress=lambda done, total: progress.update(
                upload, completed=done, total=total), background=True, wait=False, **params)
        with Progress(SpinnerColumn(), TextColumn("{task.description}"), BarColumn(),
                      TextColumn("{task.percentage:>3.0f}%"), TimeElapsedColumn(), console=_console(stderr=True),
                      transient=True) as progress:
            fitting = progress.add_task(f"fitting '{name}' (job {job['id']})", total=1.0)

            def moved(step: str, fraction: float) -> None:
                progress.update(fitting, completed=fraction, description=f"fitting '{name}': {step}")

            try:
                report = api.follow_job(job["id"], progress=moved)
            except KeyboardInterrupt:
                click.echo(f"stopped following job {job['id']}; it goes on on the server (see 'segscore jobs "
                           f"--segmentation {name}'; cancel it with DELETE /v1/jobs/{job['id']})", err=True)
                sys.exit(EXIT_SERVER)
    from service import cli_tables

    _print(report, as_json, lambda: cli_tables.fit_report(report))


@click.command("jobs")
@click.option("--segmentation", default=None, help="only the jobs of this segmentation")
@click.option("--limit", type=click.IntRange(min=1, max=1000), default=None, help="at most this many (default 50)")
@_connection_options
@_talks_to_server
def jobs_command(segmentation: str | None, limit: int | None, url: str | None, key: str | None,
                 as_json: bool) -> None:
    """Background fit jobs, newest first: state, step, progress, the version written or the error."""
    from service import cli_tables

    with _client(url, key) as api:
        rows = api.jobs(segmentation=segmentation, limit=limit)
    _print(rows, as_json, lambda: cli_tables.jobs(rows))


@click.command("versions")
@click.argument("name")
@_connection_options
@_talks_to_server
def versions_command(name: str, url: str | None, key: str | None, as_json: bool) -> None:
    """The versions of segmentation NAME (the live one starred)."""
    from service import cli_tables

    with _client(url, key) as api:
        rows = api.versions(name)
    _print(rows, as_json, lambda: cli_tables.versions(name, rows))


@click.command("show")
@click.argument("name")
@click.argument("version", type=click.IntRange(min=1))
@_connection_options
@_talks_to_server
def show_command(name: str, version: int, url: str | None, key: str | None, as_json: bool) -> None:
    """The fit report of version VERSION of NAME: the k curve and each segment's size, share, label, features."""
    from service import cli_tables

    with _client(url, key) as api:
        report = api.version(name, version)
    _print(report, as_json, lambda: cli_tables.fit_report(report))


@click.command("compare")
@click.argument("name")
@click.argument("v", type=click.IntRange(min=1))
@click.argument("w", type=click.IntRange(min=1))
@click.option("--min-share", type=click.FloatRange(0, 1), default=None,
              help="overlap share above which a label is suggested (server default 0.6)")
@_connection_options
@_talks_to_server
def compare_command(name: str, v: int, w: int, min_share: float | None, url: str | None, key: str | None,
                    as_json: bool) -> None:
    """How the segments of version V of NAME map onto those of version W, with label suggestions."""
    from service import cli_tables

    with _client(url, key) as api:
        answer = api.compare(name, v, w, min_share=min_share)
    _print(answer, as_json, lambda: cli_tables.comparison(answer))


@click.command("promote")
@click.argument("name")
@click.argument("version", type=click.IntRange(min=1))
@_connection_options
@_talks_to_server
def promote_command(name: str, version: int, url: str | None, key: str | None, as_json: bool) -> None:
    """Make version VERSION of NAME live (promote, or roll back)."""
    with _client(url, key) as api:
        answer = api.promote(name, version)
    _print(answer, as_json, lambda: f"'{name}' version {answer['live_version']} is live")


@click.command("label")
@click.argument("name")
@click.argument("version", type=click.IntRange(min=1))
@click.argument("segment", type=click.IntRange(min=0), required=False)
@click.argument("text", required=False)
@click.option("--from-version", type=click.IntRange(min=1), default=None,
              help="apply the label suggestions of 'compare NAME FROM VERSION' instead")
@click.option("--min-share", type=click.FloatRange(0, 1), default=None, help="with --from-version")
@click.option("--overwrite", is_flag=True, help="with --from-version: replace labels segments already have")
@_connection_options
@_talks_to_server
def label_command(name: str, version: int, segment: int | None, text: str | None, from_version: int | None,
                  min_share: float | None, overwrite: bool, url: str | None, key: str | None, as_json: bool) -> None:
    """Name segment SEGMENT of version VERSION of NAME as TEXT, or carry labels over with --from-version W."""
    if from_version is None and (segment is None or text is None):
        raise click.UsageError("give SEGMENT and TEXT, or --from-version W")
    if from_version is not None and (segment is not None or text is not None):
        raise click.UsageError("--from-version takes no SEGMENT or TEXT")
    with _client(url, key) as api:
        if from_version is None:
            answer: Any = api.label(name, version, segment, text)
            _print(answer, as_json, lambda: f"'{name}' version {version} segment {answer['id']}: "
                   f"label {answer['label']!r}")
            return
        applied = api.carry_labels(name, from_version, version, min_share=min_share, overwrite=overwrite)

    def render():
        from rich.table import Table

        table = Table(title=f"labels carried from version {from_version} to version {version} of '{name}'")
        for column in ("segment", "label", "was"):
            table.add_column(column, justify="right" if column == "segment" else "left")
        for suggestion in applied:
            table.add_row(str(suggestion["segment"]), suggestion["label"], suggestion["current_label"] or "")
        return table if applied else "no label to carry over (no suggestion, or the segments are labelled)"

    _print(applied, as_json, render)


@click.command("assign")
@click.argument("name")
@_input_file
@click.option("-o", "--out", "out", type=click.Path(dir_okay=False, path_type=Path), required=True,
              help="CSV file to write: the input rows with segment, label, distance, outlier added")
@click.option("--version", "version", type=click.IntRange(min=1), default=None, help="default: the live version")
@click.option("--batch-rows", type=click.IntRange(min=1), default=None, help="rows per request (default 10000)")
@_connection_options
@_talks_to_server
def assign_command(name: str, file: Path, out: Path, version: int | None, batch_rows: int | None, url: str | None,
                   key: str | None, as_json: bool) -> None:
    """Assign every row of FILE (CSV, optionally .gz) to a segment of NAME, in batches; write OUT."""
    from rich.progress import Progress, SpinnerColumn, TextColumn, TimeElapsedColumn

    if out.resolve() == file.resolve():
        raise LocalInputError(f"{out}: the output would overwrite the input file; choose another -o")
    extra = {"batch_rows": batch_rows} if batch_rows else {}
    with _client(url, key) as api:
        check_csv_file(file, columns=_live_features(api, name, version))
        with Progress(SpinnerColumn(), TextColumn("{task.description}"), TimeElapsedColumn(),
                      console=_console(stderr=True), transient=True) as progress:
            task = progress.add_task(f"assigning {file.name}")
            summary = api.assign_csv(name, file, out, version=version, columns=ASSIGN_COLUMNS, **extra,
                                     progress=lambda done, _: progress.update(
                                         task, description=f"assigning {file.name}: {done} rows"))
    _print(summary, as_json, lambda: f"wrote {summary['rows']} rows to {out} (version {summary['version']}, "
           f"{summary['assigned']} assigned)")


@click.command("drift")
@click.argument("name")
@_input_file
@click.option("--version", "version", type=click.IntRange(min=1), default=None, help="default: the live version")
@_connection_options
@_talks_to_server
def drift_command(name: str, file: Path, version: int | None, url: str | None, key: str | None,
                  as_json: bool) -> None:
    """Compare the rows of FILE (CSV, optionally .gz) with what NAME was fitted on; a table, worst first."""
    from service import cli_tables

    with _client(url, key) as api:
        check_csv_file(file, columns=_live_features(api, name, version))
        report = api.drift(name, file, version=version)
    _print(report, as_json, lambda: cli_tables.drift(report))


COMMANDS = (fit_command, jobs_command, versions_command, show_command, compare_command, promote_command, label_command,
            assign_command, drift_command)
