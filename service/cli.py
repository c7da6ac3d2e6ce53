"""The ``segscore`` command: serve the API, write demo data, fit into a local store, list, manage API keys;
and the client commands that talk to a running server (``service.cli_client``: fit, show, assign, ...)."""

from __future__ import annotations

import json
import sys
from pathlib import Path

import click

from service.cli_client import COMMANDS as CLIENT_COMMANDS
from service.cli_client import fit_options, fit_params
from service.settings import SCOPES, Settings

DEMO_NAME = "demo"


def _settings(**overrides) -> Settings:
    """The settings, or a clean message naming each bad ``SEGSCORE_*`` variable (exit 2), not a traceback."""
    from pydantic import ValidationError

    clean = {k: v for k, v in overrides.items() if v is not None}
    try:
        return Settings(**clean)
    except ValidationError as exc:
        lines = []
        for error in exc.errors():
            field = str(error["loc"][0]) if error.get("loc") else ""
            # The value itself is not printed: it may be a secret (an API key).
            where = f"SEGSCORE_{field.upper()}" if field else "settings"
            lines.append(f"  {where}: {error['msg']}")
        raise click.UsageError("bad setting(s):\n" + "\n".join(lines)) from None


def pin_blas_threads() -> None:
    """One BLAS/OpenMP thread for this process (threadpoolctl limits are process-wide).

    On small machines a second pool fighting over the cores makes numpy/scikit-learn work erratic and, for
    fits, about 2x slower; ``serve`` and every command that fits call this first.
    """
    from threadpoolctl import threadpool_limits

    threadpool_limits(limits=1)


def fit_csv_into_store(settings: Settings, name: str, csv_bytes: bytes, params: dict, store=None) -> dict:
    """Fit a CSV file into the store with the same checks as the HTTP fit endpoint."""
    from schemas import FitRequest
    from service.core.fit import fit_bundle
    from service.core.frame import read_csv
    from service.inputs.checks import check_name, validate_model
    from service.inputs.fit_input import training_inputs
    from service.store import open_store

    check_name(name)
    request = validate_model(FitRequest, params)
    frame = read_csv(csv_bytes, request.id_column, max_rows=settings.max_fit_rows)
    values, config = training_inputs(request, settings, frame=frame)
    bundle = fit_bundle(values, config, max_agglomerative_rows=settings.max_agglomerative_rows)
    store = store or open_store(settings)
    return store.save_version(name, bundle, make_live=request.make_live)


def ensure_demo(settings: Settings, store=None) -> None:
    """Fit the ``demo`` segmentation from synthetic data unless the store already has it."""
    from service.demo import demo_customers
    from service.store import open_store

    store = store or open_store(settings)
    if any(row["name"] == DEMO_NAME for row in store.list_segmentations()):
        return
    csv_bytes = demo_customers().to_csv(index=False).encode()
    report = fit_csv_into_store(settings, DEMO_NAME, csv_bytes, {"id_column": "customer_id"}, store)
    click.echo(f"fitted '{DEMO_NAME}' version {report['version']}: k={report['k']}, "
               f"{report['components']} components, {report['n_records']} records", err=True)


def _store_options(function):
    """``--backend``, ``--database-url`` and ``--store``: on every command that opens a store."""
    function = click.option("--store", "store_dir", type=click.Path(path_type=Path), default=None,
                            help="artifact directory (default models_store; env SEGSCORE_STORE_DIR)")(function)
    function = click.option("--database-url", default=None,
                            help="postgresql:// URL of the index (postgres backend; env SEGSCORE_DATABASE_URL)")(function)
    return click.option("--backend", "store_backend", type=click.Choice(["local", "postgres"]), default=None,
                        help="store backend (default local; env SEGSCORE_STORE_BACKEND)")(function)


def _open_store(**options):
    """The store of the command's options (a clean message, not a traceback, when it cannot be opened)."""
    from service.errors import ServiceError
    from service.store import open_store

    try:
        return open_store(_settings(**options))
    except ServiceError as exc:
        raise click.ClickException(str(exc.detail)) from None


@click.group()
def main() -> None:
    """segscore: fit, version and serve customer segmentations."""
    from service.logs import configure_logging

    configure_logging("info")


@main.command()
@click.option("--host", default=None, help="bind address (default 127.0.0.1; env SEGSCORE_HOST)")
@click.option("--port", type=int, default=None, help="port (default 8000; env SEGSCORE_PORT)")
@click.option("--workers", type=int, default=None,
              help="server processes behind the port (default 1; env SEGSCORE_WORKERS)")
@_store_options
@click.option("--demo", is_flag=True, help="fit the 'demo' segmentation from synthetic data if absent")
def serve(host: str | None, port: int | None, workers: int | None, demo: bool, **store_options) -> None:
    """Run the HTTP API with uvicorn (one process, or --workers processes behind one port)."""
    from service.app import create_app, start_up_refusal
    from service.logs import configure_logging

    settings = _settings(host=host, port=port, workers=workers, **store_options)
    configure_logging(settings.log_level, settings.log_format)
    store = _open_store(**store_options)
    app = create_app(settings, store)
    refusal = start_up_refusal(settings, app.state.keyring)
    if refusal:
        click.echo(refusal, err=True)
        store.close()
        sys.exit(1)
    pin_blas_threads()
    if demo:
        ensure_demo(settings, store)
    if settings.workers > 1:
        store.close()       # each worker opens its own
        run_workers(settings, host=host, port=port, workers=workers, **store_options)
        return
    try:
        run_server(app, settings)
    finally:
        store.close()


def run_server(app, settings: Settings) -> None:
    """uvicorn with the service's connection settings (also used by the tests that start a real server)."""
    import uvicorn

    from service.connections import head_limited_protocol

    # log_config=None: uvicorn keeps our logging set-up (request ids in every line) instead of its own.
    _exit_zero_after_graceful_stop()
    uvicorn.run(app, host=settings.host, port=settings.port, log_config=None,
                access_log=False, log_level=settings.log_level,   # the app logs requests itself
                timeout_keep_alive=settings.keep_alive_seconds,
                http=head_limited_protocol(settings.header_read_timeout_seconds, settings.max_header_bytes))


def _exit_zero_after_graceful_stop() -> None:
    """On SIGTERM (or SIGINT) uvicorn stops accepting, finishes the requests in flight, and then raises the
    signal again under the handlers it found when it started; with Python's defaults the process would then
    die by that signal (status 143) after a clean stop. The handlers it finds do nothing, so ``serve``
    returns and exits 0. Called just before uvicorn starts, which installs its own handlers at once."""
    import signal

    for stop in (signal.SIGTERM, signal.SIGINT):
        signal.signal(stop, lambda *_: None)


def run_workers(settings: Settings, **command_line: object) -> None:
    """``settings.workers`` uvicorn worker processes, each building its app with ``service.app.worker_app``.

    The workers are new interpreters: they read the settings from the environment, so the command-line
    options are passed on as ``SEGSCORE_*`` variables. Their metrics go to a fresh directory (multiprocess
    mode, so that /metrics adds up every worker's counts), removed when the server stops."""
    import os
    import shutil
    import tempfile

    import uvicorn

    from service.connections import WORKER_PROTOCOL
    from service.metrics import MULTIPROCESS_DIRECTORY_VARIABLE

    for field, value in command_line.items():
        if value is not None:
            os.environ[f"SEGSCORE_{field.upper()}"] = str(value)
    metrics_dir = tempfile.mkdtemp(prefix="segscore-metrics-")
    os.environ[MULTIPROCESS_DIRECTORY_VARIABLE] = metrics_dir
    try:
        _exit_zero_after_graceful_stop()
        uvicorn.run("service.app:worker_app", factory=True, workers=settings.workers,
                    host=settings.host, port=settings.port, log_config=None, access_log=False,
                    log_level=settings.log_level, timeout_keep_alive=settings.keep_alive_seconds,
                    http=WORKER_PROTOCOL)
    finally:
        shutil.rmtree(metrics_dir, ignore_errors=True)


@main.command("demo-data")
@click.option("--rows", type=click.IntRange(10, 1_000_000), default=4000, show_default=True)
@click.option("--seed", type=int, default=7, show_default=True)
@click.option("--out", type=click.Path(path_type=Path), default=Path("demo_customers.csv"), show_default=True,
              help="CSV file to write ('-' for standard output)")
def demo_data(rows: int, seed: int, out: Path) -> None:
    """Write synthetic customers of an invented tea-subscription shop as CSV."""
    from service.demo import demo_customers

    frame = demo_customers(rows, seed)
    if str(out) == "-":
        frame.to_csv(sys.stdout, index=False)
    else:
        frame.to_csv(out, index=False)
        click.echo(f"wrote {rows} customers to {out}", err=True)


@main.command("store-fit")
@click.argument("name")
@click.argument("csv_file", type=click.Path(exists=True, dir_okay=False, path_type=Path))
@_store_options
@fit_options
def store_fit(name: str, csv_file: Path, store_dir: Path | None, database_url: str | None,
              store_backend: str | None, **options) -> None:
    """Fit a new version of NAME from CSV_FILE (optionally .gz) straight into a store, without a server;
    print the fit report as JSON. (``segscore fit FILE --name N`` fits through a running server.)"""
    from service.client._files import open_binary
    from service.errors import ServiceError

    store_options = {"store_dir": store_dir, "database_url": database_url, "store_backend": store_backend}
    params = fit_params(**options)
    settings = _settings(**store_options)
    pin_blas_threads()
    try:
        with open_binary(csv_file) as handle:
            body = handle.read()
        report = fit_csv_into_store(settings, name, body, params, _open_store(**store_options))
    except ServiceError as exc:
        raise click.ClickException(json.dumps(exc.detail)) from None
    except (EOFError, OSError) as exc:
        raise click.FileError(str(csv_file), f"cannot be read ({exc})") from None
    click.echo(json.dumps(report, indent=2))


@main.command("list")
@_store_options
def list_segmentations(**store_options) -> None:
    """List the segmentations in the store."""
    for row in _open_store(**store_options).list_segmentations():
        click.echo(f"{row['name']}\tlive={row['live_version']}\tlatest={row['latest_version']}\t"
                   f"updated={row['updated_at']}")


@main.group()
def keys() -> None:
    """Create, list and revoke the API keys of a store (a running server sees changes within 2 s)."""


@keys.command("create")
@_store_options
@click.option("--name", required=True, help="unique name; recorded as the actor of this key's writes")
@click.option("--scope", "scopes", multiple=True, required=True, type=click.Choice(SCOPES),
              help="repeat for several; admin implies every scope")
def keys_create(name: str, scopes: tuple[str, ...], **store_options) -> None:
    """Create a key and print it once, alone on the last line (the store keeps only a salted digest)."""
    from service.errors import ServiceError
    from service.inputs.checks import NAME_PATTERN

    if not NAME_PATTERN.fullmatch(name):
        raise click.BadParameter(f"must match {NAME_PATTERN.pattern}", param_hint="--name")
    scopes = sorted(set(scopes))
    try:
        key = _open_store(**store_options).create_key(name, scopes)
    except ServiceError as exc:
        raise click.ClickException(str(exc.detail)) from None
    click.echo(f"created API key '{name}' with scope(s) {', '.join(scopes)}. "
               "It is shown once; store it now. Send it as 'Authorization: Bearer <key>'.")
    click.echo(key)


@keys.command("list")
@_store_options
def keys_list(**store_options) -> None:
    """Name, scopes, creation time and the first characters of every key (never a whole key)."""
    for stored in _open_store(**store_options).stored_keys():
        click.echo(f"{stored.name}\tscopes={','.join(stored.scopes)}\tcreated={stored.created_at}\t"
                   f"starts={stored.prefix}...")


@keys.command("revoke")
@_store_options
@click.option("--name", required=True)
def keys_revoke(name: str, **store_options) -> None:
    """Delete a key; a running server refuses it within 2 s."""
    from service.errors import ServiceError

    try:
        _open_store(**store_options).revoke_key(name)
    except ServiceError as exc:
        raise click.ClickException(str(exc.detail)) from None
    click.echo(f"revoked API key '{name}'")


@main.command()
@_store_options
@click.option("--name", default=None, help="a segmentation; default: key and retention events")
@click.option("--limit", type=click.IntRange(1, 100_000), default=50, show_default=True)
def events(name: str | None, limit: int, **store_options) -> None:
    """Who did what, newest first: one JSON object per line (at, actor, action, version, details)."""
    for event in _open_store(**store_options).events(name, limit=limit):
        click.echo(json.dumps(event))


@main.command("upgrade-store")
@click.option("--store", "store_dir", type=click.Path(path_type=Path), default=None)
def upgrade_store(store_dir: Path | None) -> None:
    """Convert versions written in the legacy pickle format into pickle-free serving artifacts (run once).

    This reads the old pickled files, so run it only on a store whose files you trust."""
    from service.errors import ServiceError

    try:
        # The legacy pickle format exists only in local stores.
        converted, refused = _open_store(store_dir=store_dir, store_backend="local").upgrade_legacy_versions()
    except ServiceError as exc:
        raise click.ClickException(str(exc.detail)) from None
    for name, version in converted:
        click.echo(f"converted '{name}' version {version}")
    for name, version, reason in refused:
        click.echo(f"not converted: '{name}' version {version}: {reason}", err=True)
    click.echo(f"{len(converted)} version(s) converted")
    if refused:
        sys.exit(1)


for _command in CLIENT_COMMANDS:
    main.add_command(_command)


if __name__ == "__main__":
    main()
