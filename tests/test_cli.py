"""The ``segscore`` command: demo-data, fit, list, and serve (a real server process on a loopback port)."""

from __future__ import annotations

import json
from pathlib import Path

import pandas as pd
import pytest
from click.testing import CliRunner

from service.cli import main
from service.demo import FEATURES
from tests.serving import get_json, segscore_server


def run(*arguments: str):
    return CliRunner().invoke(main, list(arguments), catch_exceptions=False)


@pytest.fixture
def demo_csv(tmp_path) -> Path:
    out = tmp_path / "customers.csv"
    result = run("demo-data", "--rows", "600", "--seed", "3", "--out", str(out))
    assert result.exit_code == 0, result.output
    return out


def test_demo_data_writes_a_csv(demo_csv):
    frame = pd.read_csv(demo_csv)
    assert list(frame.columns) == ["customer_id", *FEATURES]
    assert len(frame) == 600 and frame["customer_id"].is_unique
    assert frame[FEATURES].isna().any().any()            # a few missing cells, to exercise imputation


def test_demo_data_is_seeded(tmp_path, demo_csv):
    again = tmp_path / "again.csv"
    run("demo-data", "--rows", "600", "--seed", "3", "--out", str(again))
    assert again.read_bytes() == demo_csv.read_bytes()
    other = tmp_path / "other.csv"
    run("demo-data", "--rows", "600", "--seed", "4", "--out", str(other))
    assert other.read_bytes() != demo_csv.read_bytes()


def test_fit_into_a_temp_store_and_list(tmp_path, demo_csv):
    store = tmp_path / "store"
    result = run("store-fit", "tea", str(demo_csv), "--store", str(store), "--id-column", "customer_id", "--k", "2-5")
    assert result.exit_code == 0, result.output
    report = json.loads(result.output)
    assert (report["name"], report["version"], report["live"]) == ("tea", 1, True)
    assert report["features"] == FEATURES and report["n_records"] == 600
    assert [row["k"] for row in report["selection"]["curve"]] == [2, 3, 4, 5]
    assert (store / "index.sqlite3").exists()

    second = run("store-fit", "tea", str(demo_csv), "--store", str(store), "--id-column", "customer_id", "--k", "3",
                 "--components", "none", "--features", "tenure_months,orders_per_year", "--not-live")
    assert second.exit_code == 0, second.output
    report = json.loads(second.output)
    assert (report["version"], report["live"], report["components"]) == (2, False, None)
    assert report["features"] == ["tenure_months", "orders_per_year"]

    listing = run("list", "--store", str(store))
    assert listing.exit_code == 0
    assert listing.output.split("\t")[:3] == ["tea", "live=1", "latest=2"]


def test_store_fit_reads_a_gzip_file_as_the_plain_one(tmp_path, demo_csv):
    import gzip

    packed = tmp_path / "customers.csv.gz"
    packed.write_bytes(gzip.compress(demo_csv.read_bytes()))
    store = str(tmp_path / "store")
    plain = json.loads(run("store-fit", "tea", str(demo_csv), "--store", store, "--k", "3").output)
    from_gzip = json.loads(run("store-fit", "tea", str(packed), "--store", store, "--k", "3").output)
    assert (plain["version"], from_gzip["version"]) == (1, 2)
    assert from_gzip["data_sha256"] == plain["data_sha256"]


@pytest.mark.parametrize(
    "arguments, field",
    [(["--features", "tenure_months,colour"], "features"), (["--k", "0"], "k"), (["--components", "9"], "components")],
    ids=["unknown-feature", "k-zero", "components-over-features"],
)
def test_fit_bad_input_fails_naming_the_field_and_writes_nothing(tmp_path, demo_csv, arguments, field):
    store = tmp_path / "store"
    result = CliRunner().invoke(main, ["store-fit", "tea", str(demo_csv), "--store", str(store),
                                       "--id-column", "customer_id", *arguments])
    assert result.exit_code != 0
    assert f'"field": "{field}' in result.output
    listing = run("list", "--store", str(store))
    assert listing.output == ""


@pytest.mark.parametrize("arguments", [["--k", "two"], ["--components", "most"]], ids=["k", "components"])
def test_fit_unparseable_option_is_a_usage_error(tmp_path, demo_csv, arguments):
    result = CliRunner().invoke(main, ["store-fit", "tea", str(demo_csv), "--store", str(tmp_path / "s"), *arguments])
    assert result.exit_code == 2            # click's usage-error exit status, not a traceback
    assert arguments[0] in result.output


def test_serve_demo_answers_readyz_and_lists_demo(tmp_path):
    store = tmp_path / "store"
    with segscore_server(tmp_path, "--demo", "--store", str(store)) as base:
        status, listing = get_json(f"{base}/v1/segmentations")
        assert status == 200
        assert [row["name"] for row in listing["segmentations"]] == ["demo"]
        assert listing["segmentations"][0]["live_version"] == 1
        status, report = get_json(f"{base}/v1/segmentations/demo/versions/1")
        assert report["features"] == FEATURES and report["id_column"] == "customer_id"
    # The store outlives the server, and --demo does not fit again when 'demo' exists.
    from service.cli import ensure_demo
    from service.settings import Settings

    ensure_demo(Settings(store_dir=store))
    assert sorted(p.name for p in (store / "segmentations" / "demo").glob("v*.json")) == ["v000001.json"]


def test_a_bad_setting_is_a_clean_message_naming_the_variable(tmp_path, demo_csv, monkeypatch):
    # Issue 7 item 11: a bad SEGSCORE_ value printed a raw pydantic traceback at start-up.
    monkeypatch.setenv("SEGSCORE_MAX_FIT_ROWS", "lots")
    result = CliRunner().invoke(main, ["store-fit", "shop", str(demo_csv), "--store", str(tmp_path / "s")])
    assert result.exit_code == 2
    assert "SEGSCORE_MAX_FIT_ROWS" in result.output and "Traceback" not in result.output
    assert not (tmp_path / "s").exists()


def test_fit_pins_blas_threads_like_serve(tmp_path, demo_csv, monkeypatch):
    # Issue 7 item 12: `segscore fit` ran with every BLAS thread (2x slower on a busy 2-core machine).
    import service.cli as cli

    calls = []
    monkeypatch.setattr(cli, "pin_blas_threads", lambda: calls.append("pinned"))
    result = run("store-fit", "shop", str(demo_csv), "--store", str(tmp_path / "s"), "--k", "3")
    assert result.exit_code == 0, result.output
    assert calls == ["pinned"]
