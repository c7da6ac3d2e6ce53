"""The ``segscore`` command: serve the API, write demo data, fit and list from the shell."""

from __future__ import annotations

import json
import logging
import sys
from pathlib import Path

import click

from service.settings import Settings

DEMO_NAME = "demo"


def _settings(**overrides) -> Settings:
    clean = {k: v for k, v in overrides.items() if v is not None}
    return Settings(**clean)


def fit_csv_into_store(settings: Settings, name: str, csv_bytes: bytes, params: dict) -> dict:
    """Fit a CSV file into the store with the same checks as the HTTP fit endpoint."""
    from schemas import FitRequest
    from service.api.payload import check_name
    from service.api.segmentations import training_inputs
    from service.api.validation import validate_model
    from service.core.fit import fit_bundle
    from service.core.frame import read_csv
    from service.store import FilesystemStore

    check_name(name)
    request = validate_model(FitRequest, params)
    values, config = training_inputs(request, settings, frame=read_csv(csv_bytes))
    bundle = fit_bundle(values, config, max_agglomerative_rows=settings.max_agglomerative_rows)
    store = FilesystemStore(settings.store_dir, cache_size=settings.bundle_cache_size)
    return store.save_version(name, bundle, make_live=request.make_live)


def ensure_demo(settings: Settings) -> None:
    """Fit the ``demo`` segmentation from synthetic data unless the store already has it."""
    from service.demo import demo_customers
    from service.store import FilesystemStore

    store = FilesystemStore(settings.store_dir)
    if any(row["name"] == DEMO_NAME for row in store.list_segmentations()):
        return
    csv_bytes = demo_customers().to_csv(index=False).encode()
    report = fit_csv_into_store(settings, DEMO_NAME, csv_bytes, {"id_column": "customer_id"})
    click.echo(f"fitted '{DEMO_NAME}' version {report['version']}: k={report['k']}, "
               f"{report['components']} components, {report['n_records']} records", err=True)


@click.group()
def main() -> None:
    """segscore: fit, version and serve customer segmentations."""
    logging.basicConfig(level=logging.INFO, format="%(asctime)s %(levelname)s %(name)s: %(message)s")


@main.command()
@click.option("--host", default=None, help="bind address (default 127.0.0.1; env SEGSCORE_HOST)")
@click.option("--port", type=int, default=None, help="port (default 8000; env SEGSCORE_PORT)")
@click.option("--store", "store_dir", type=click.Path(path_type=Path), default=None,
              help="store directory (default models_store; env SEGSCORE_STORE_DIR)")
@click.option("--demo", is_flag=True, help="fit the 'demo' segmentation from synthetic data if absent")
def serve(host: str | None, port: int | None, store_dir: Path | None, demo: bool) -> None:
    """Run the HTTP API with uvicorn (one process)."""
    import uvicorn
    from threadpoolctl import threadpool_limits

    from service.app import create_app

    settings = _settings(host=host, port=port, store_dir=store_dir)
    if demo:
        ensure_demo(settings)
    # One BLAS/OpenMP thread per server process: on small machines two pools fighting over two cores make
    # the small products of the assign path erratic (threadpoolctl limits are process-wide).
    threadpool_limits(limits=1)
    uvicorn.run(create_app(settings), host=settings.host, port=settings.port,
                access_log=settings.access_log, log_level=settings.log_level)


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


def _parse_components(text: str) -> int | float | None:
    if text.strip().lower() == "none":
        return None
    for kind in (int, float):
        try:
            return kind(text)
        except ValueError:
            pass
    raise click.BadParameter(f"expected a count, a variance share in (0, 1) or 'none'; got {text!r}",
                             param_hint="--components")


def _parse_k(text: str) -> int | dict[str, int]:
    low, sep, high = text.strip().partition("-")
    try:
        return {"min": int(low), "max": int(high)} if sep else int(low)
    except ValueError:
        raise click.BadParameter(f"expected an int or a range like 2-10; got {text!r}", param_hint="--k") from None


@main.command()
@click.argument("name")
@click.argument("csv_file", type=click.Path(exists=True, dir_okay=False, path_type=Path))
@click.option("--store", "store_dir", type=click.Path(path_type=Path), default=None)
@click.option("--features", default=None, help="comma-separated columns (default: every numeric column)")
@click.option("--id-column", default=None)
@click.option("--scaling", type=click.Choice(["standard", "robust", "minmax", "none"]), default="standard")
@click.option("--components", default="0.9", help="count, variance share in (0,1), or 'none'")
@click.option("--method", type=click.Choice(["kmeans", "agglomerative"]), default="kmeans")
@click.option("--linkage", type=click.Choice(["complete", "average", "single", "ward"]), default="complete")
@click.option("--k", "k_text", default="2-10", help="an int, or a range like 2-10")
@click.option("--selection", type=click.Choice(["elbow", "silhouette"]), default="elbow")
@click.option("--seed", type=int, default=0)
@click.option("--live/--not-live", "make_live", default=None, help="make the new version live")
def fit(name, csv_file, store_dir, features, id_column, scaling, components, method, linkage, k_text,
        selection, seed, make_live) -> None:
    """Fit a new version of NAME from CSV_FILE into the local store; print the fit report."""
    from service.errors import ServiceError

    params = {
        "features": features.split(",") if features else None, "id_column": id_column, "scaling": scaling,
        "components": _parse_components(components), "method": method, "linkage": linkage,
        "k": _parse_k(k_text), "selection": selection, "seed": seed, "make_live": make_live,
    }
    try:
        report = fit_csv_into_store(_settings(store_dir=store_dir), name, csv_file.read_bytes(), params)
    except ServiceError as exc:
        raise click.ClickException(json.dumps(exc.detail)) from None
    click.echo(json.dumps(report, indent=2))


@main.command("list")
@click.option("--store", "store_dir", type=click.Path(path_type=Path), default=None)
def list_segmentations(store_dir: Path | None) -> None:
    """List the segmentations in the local store."""
    from service.store import FilesystemStore

    settings = _settings(store_dir=store_dir)
    for row in FilesystemStore(settings.store_dir).list_segmentations():
        click.echo(f"{row['name']}\tlive={row['live_version']}\tlatest={row['latest_version']}\t"
                   f"updated={row['updated_at']}")


@main.command("upgrade-store")
@click.option("--store", "store_dir", type=click.Path(path_type=Path), default=None)
def upgrade_store(store_dir: Path | None) -> None:
    """Convert versions written in the legacy pickle format into pickle-free serving artifacts (run once).

    This reads the old pickled files, so run it only on a store whose files you trust."""
    from service.errors import ServiceError
    from service.store import FilesystemStore

    settings = _settings(store_dir=store_dir)
    try:
        converted = FilesystemStore(settings.store_dir).upgrade_legacy_versions()
    except ServiceError as exc:
        raise click.ClickException(str(exc.detail)) from None
    for name, version in converted:
        click.echo(f"converted '{name}' version {version}")
    click.echo(f"{len(converted)} version(s) converted")


if __name__ == "__main__":
    main()
