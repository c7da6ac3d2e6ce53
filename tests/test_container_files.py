"""Static checks of docker/Dockerfile and docker/compose.yaml (the build machines have no container engine):
the files parse, the image runs as a non-root user with a health check, and the compose file's replicas share
one PostgreSQL index and one artifact volume through settings that exist."""

from __future__ import annotations

import re
import tomllib
from pathlib import Path

import yaml

from service.settings import Settings

DOCKER = Path(__file__).resolve().parents[1] / "docker"


def instructions() -> list[tuple[str, str]]:
    lines = [line.strip() for line in (DOCKER / "Dockerfile").read_text().splitlines()]
    joined = re.sub(r"\\\n\s*", " ", "\n".join(line for line in lines if line and not line.startswith("#")))
    return [(line.split(None, 1)[0].upper(), line.split(None, 1)[1]) for line in joined.splitlines()]


def test_the_image_is_slim_runs_as_a_user_and_checks_its_health():
    steps = instructions()
    assert re.fullmatch(r"python:3\.1[1-9]-slim", steps[0][1]) and steps[0][0] == "FROM"
    users = [argument for kind, argument in steps if kind == "USER"]
    assert users and users[-1] not in ("root", "0")
    assert any(kind == "HEALTHCHECK" and "/healthz" in argument for kind, argument in steps)
    # Every package the project installs is copied into the image.
    packages = tomllib.loads((DOCKER.parent / "pyproject.toml").read_text())["tool"]["setuptools"]["packages"]["find"]
    copied = {argument.split()[0] for kind, argument in steps if kind == "COPY"}
    assert {pattern.rstrip("*") for pattern in packages["include"]} <= copied


def test_the_worker_count_comes_from_the_workers_setting():
    steps = instructions()
    environment = dict(re.findall(r"(\w+)=(\S+)", " ".join(argument for kind, argument in steps if kind == "ENV")))
    assert "workers" in Settings.model_fields
    assert Settings(workers=int(environment["SEGSCORE_WORKERS"])).workers == 1
    # The command is ``segscore serve`` with no --workers of its own, so the setting decides.
    command = [argument for kind, argument in steps if kind == "CMD"][-1]
    assert "serve" in command and "--workers" not in command


def test_compose_runs_two_replicas_on_one_index_and_one_artifact_volume():
    compose = yaml.safe_load((DOCKER / "compose.yaml").read_text())
    services = compose["services"]
    assert services["db"]["image"].startswith("postgres:") and "healthcheck" in services["db"]
    replicas = [s for name, s in services.items() if name.startswith("replica")]
    assert len(replicas) == 2
    fields = set(Settings.model_fields)
    for replica in replicas:
        environment = replica["environment"]
        for variable in environment:
            assert variable.startswith("SEGSCORE_") and variable[9:].lower() in fields, variable
        assert environment["SEGSCORE_STORE_BACKEND"] == "postgres"
        assert environment["SEGSCORE_DATABASE_URL"].startswith("postgresql://") and "@db:" in environment[
            "SEGSCORE_DATABASE_URL"]
        assert replica["depends_on"]["db"]["condition"] == "service_healthy"
        volume = replica["volumes"][0].split(":")
        assert volume == ["artifacts", environment["SEGSCORE_STORE_DIR"]]
        # The settings the replica would start with are accepted by the settings class.
        Settings(**{k[9:].lower(): v for k, v in environment.items()})
    assert len({r["ports"][0].split(":")[0] for r in replicas}) == 2
    assert set(compose["volumes"]) >= {"artifacts", "index"}


def test_compose_offers_a_dask_scheduler_and_two_workers_behind_a_profile():
    compose = yaml.safe_load((DOCKER / "compose.yaml").read_text())
    services = compose["services"]
    dask = {name: s for name, s in services.items() if name.startswith("dask-")}
    assert set(dask) == {"dask-scheduler", "dask-worker-a", "dask-worker-b"}
    replica = services["replica-a"]
    for service in dask.values():
        # Optional (a profile) and built from the replicas' image, so the package versions match.
        assert service["profiles"] == ["dask"] and service["build"] == replica["build"]
    scheduler_port = dask["dask-scheduler"]["command"][dask["dask-scheduler"]["command"].index("--port") + 1]
    address = f"tcp://dask-scheduler:{scheduler_port}"
    assert replica["environment"]["SEGSCORE_DASK_SCHEDULER"] == address
    for name in ("dask-worker-a", "dask-worker-b"):
        worker = dask[name]
        assert worker["command"][:3] == ["dask", "worker", address]
        assert worker["depends_on"]["dask-scheduler"]["condition"] == "service_healthy"
        # Uploaded records are spilled under the store dir: the workers mount the same volume there, and the
        # allowed source prefix's volume at the same path as the replicas.
        assert f"artifacts:{replica['environment']['SEGSCORE_STORE_DIR']}" in worker["volumes"]
        lake = replica["environment"]["SEGSCORE_SOURCE_PREFIXES"].removeprefix("file://").rstrip("/")
        assert any(v.split(":")[1] == lake for v in worker["volumes"])
        assert any(v.split(":")[1] == lake for v in replica["volumes"])
