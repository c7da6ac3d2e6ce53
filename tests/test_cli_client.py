"""The client commands of ``segscore`` (fit, versions, show, compare, promote, label, assign, drift).

Most tests run the commands with click's CliRunner and the client pointed at the app in this process (a
starlette TestClient as its HTTP client); one runs them end to end against a real ``segscore serve`` process.
The data is scikit-learn's wine data set (178 wines, 13 measurements), written as CSV with an id column; the
tables' numbers are checked against the server's own JSON answer.
"""

from __future__ import annotations

import gzip
import json
import re
from pathlib import Path

import pandas as pd
import pytest
from click.testing import CliRunner

from segscore.client import Client
from service.cli import main
from service.cli_tables import distinctive, drift_items, number
from tests.serving import free_port

NAME = "wines"
WIDE = {"COLUMNS": "240", "NO_COLOR": "1"}      # rich tables on one line per row, no colour codes


@pytest.fixture
def wine_csv(wine, tmp_path) -> Path:
    frame = pd.DataFrame(wine.data, columns=wine.feature_names)
    frame.insert(0, "wine_id", [f"w-{i:03d}" for i in range(len(frame))])
    path = tmp_path / "wines.csv"
    frame.to_csv(path, index=False)
    return path


@pytest.fixture
def cli(client):
    """Run ``segscore ARGS`` with the client talking to the in-process app; returns click's Result."""

    def run(*arguments: str):
        return CliRunner(env=WIDE).invoke(main, [str(a) for a in arguments], obj=lambda url, key: Client(http=client))

    run.api = Client(http=client)
    return run


@pytest.fixture
def fitted(cli, wine_csv):
    result = cli("fit", wine_csv, "--name", NAME, "--id-column", "wine_id", "--k", "2-6", "--seed", "0")
    assert result.exit_code == 0, result.output
    return cli


def table_rows(output: str) -> list[list[str]]:
    """The cells of every body row of the rich tables in ``output`` (rows drawn with '│')."""
    return [[cell.strip() for cell in line.strip().strip("│").split("│")] for line in output.splitlines()
            if line.strip().startswith("│")]


# ------------------------------------------------------------------------------------------------ fit and show
def test_fit_prints_the_k_curve_and_segments_matching_the_servers_report(fitted):
    report = fitted.api.version(NAME, 1)
    shown = fitted("show", NAME, 1)
    assert shown.exit_code == 0, shown.output
    rows = table_rows(shown.output)
    curve = [row for row in rows if len(row) == 4]
    assert [int(row[0]) for row in curve] == [point["k"] for point in report["selection"]["curve"]] == [2, 3, 4, 5, 6]
    assert [row[1] for row in curve] == [number(point["distortion"]) for point in report["selection"]["curve"]]
    assert [row[2] for row in curve] == [number(point["silhouette"]) for point in report["selection"]["curve"]]
    assert [int(row[0]) for row in curve if row[3] == "*"] == [report["k"]]
    segments = [row for row in rows if len(row) == 5 and row[0].isdigit()]
    assert [(int(r[0]), int(r[1])) for r in segments] == [(s["id"], s["size"]) for s in report["segments"]]
    assert sum(int(r[1]) for r in segments) == 178
    assert [r[2] for r in segments] == [f"{100 * s['share']:.1f}%" for s in report["segments"]]
    # The first feature line of each segment is its largest |z| feature, its mean in original units.
    for row, segment in zip(segments, report["segments"]):
        name, entry = distinctive(segment)[0]
        assert max(abs(e["z"]) for e in segment["profile"].values()) == abs(entry["z"])
        assert row[4] == f"{name} {number(entry['mean'])} (z {entry['z']:+.2f})"


def test_fit_output_is_the_report_of_the_new_version(cli, wine_csv):
    first = cli("fit", wine_csv, "--name", NAME, "--id-column", "wine_id", "--k", "3", "--json")
    assert first.exit_code == 0, first.output
    report = json.loads(first.stdout)
    assert (report["version"], report["k"], report["n_records"], report["live"]) == (1, 3, 178, True)
    assert report == cli.api.version(NAME, 1)
    second = cli("fit", wine_csv, "--name", NAME, "--id-column", "wine_id", "--k", "3", "--components", "none",
                 "--features", "alcohol,malic_acid,hue", "--scaling", "robust", "--not-live", "--json")
    assert second.exit_code == 0, second.output
    report = json.loads(second.stdout)
    assert (report["version"], report["live"], report["components"]) == (2, False, None)
    assert (report["features"], report["config"]["scaling"]) == (["alcohol", "malic_acid", "hue"], "robust")


def test_fit_reads_a_gzip_file_as_the_plain_one(cli, wine_csv, tmp_path):
    packed = tmp_path / "wines.csv.gz"
    packed.write_bytes(gzip.compress(wine_csv.read_bytes()))
    plain = json.loads(cli("fit", wine_csv, "--name", NAME, "--k", "3", "--json").stdout)
    from_gzip = cli("fit", packed, "--name", NAME, "--k", "3", "--json")
    assert from_gzip.exit_code == 0, from_gzip.output
    assert json.loads(from_gzip.stdout)["data_sha256"] == plain["data_sha256"]


def test_versions_and_promote(fitted, wine_csv):
    fitted("fit", wine_csv, "--name", NAME, "--k", "3", "--not-live")
    listing = fitted("versions", NAME)
    assert listing.exit_code == 0
    assert [(int(r[0]), r[1]) for r in table_rows(listing.output)] == [(1, "*"), (2, "")]
    promoted = fitted("promote", NAME, 2)
    assert promoted.exit_code == 0 and "version 2 is live" in promoted.output
    assert json.loads(fitted("versions", NAME, "--json").stdout) == fitted.api.versions(NAME)
    assert [v["live"] for v in fitted.api.versions(NAME)] == [False, True]


# ------------------------------------------------------------------------------------------------ labels, compare
def test_label_and_carry_labels_with_from_version(fitted, wine_csv):
    assert fitted("label", NAME, 1, 0, "light reds").exit_code == 0
    assert fitted("fit", wine_csv, "--name", NAME, "--id-column", "wine_id", "--k", "2-6", "--seed", "1").exit_code == 0
    comparison = fitted.api.compare(NAME, 1, 2)
    shown = fitted("compare", NAME, 1, 2)
    assert shown.exit_code == 0, shown.output
    assert f"adjusted Rand index {comparison['adjusted_rand_index']:.4f}" in shown.output
    assert json.loads(fitted("compare", NAME, 1, 2, "--json").stdout) == comparison
    expected = [(s["segment"], s["label"]) for s in comparison["suggestions"]]
    assert ("light reds" in [label for _, label in expected])       # a refit with another seed: a clear match
    carried = fitted("label", NAME, 2, "--from-version", 1, "--json")
    assert carried.exit_code == 0, carried.output
    assert [(s["segment"], s["label"]) for s in json.loads(carried.stdout)] == expected
    labels = {s["id"]: s["label"] for s in fitted.api.version(NAME, 2)["segments"]}
    assert all(labels[segment] == label for segment, label in expected)
    again = fitted("label", NAME, 2, "--from-version", 1)            # nothing left to carry
    assert again.exit_code == 0 and "no label to carry over" in again.output


@pytest.mark.parametrize("arguments", [[NAME, 1], [NAME, 1, 0], [NAME, 1, 0, "x", "--from-version", 1]],
                         ids=["nothing", "segment-without-text", "both"])
def test_label_usage_errors_exit_2(fitted, arguments):
    result = fitted("label", *arguments)
    assert result.exit_code == 2, result.output


# ------------------------------------------------------------------------------------------------ assign, drift
def test_assign_writes_the_input_rows_with_four_columns_added(fitted, wine_csv, tmp_path):
    out = tmp_path / "tagged.csv"
    result = fitted("assign", NAME, wine_csv, "-o", out, "--batch-rows", 50)
    assert result.exit_code == 0, result.output
    source = pd.read_csv(wine_csv)
    tagged = pd.read_csv(out, keep_default_na=False)
    assert list(tagged.columns) == [*source.columns, "segment", "label", "distance", "outlier"]
    pd.testing.assert_frame_equal(tagged[source.columns], source)
    expected = fitted.api.assign(NAME, source)
    assert tagged["segment"].tolist() == expected["segment"].tolist()
    assert tagged["distance"].tolist() == pytest.approx(expected["distance"].tolist(), rel=1e-12)
    assert tagged["outlier"].tolist() == expected["outlier"].tolist()
    assert set(pd.read_csv(out, dtype=str)["outlier"]) <= {"true", "false"}
    summary = json.loads(fitted("assign", NAME, wine_csv, "-o", out, "--json").stdout)
    assert summary == {"version": 1, "rows": 178, "assigned": 178, "errors": []}


def test_assign_refuses_to_overwrite_an_input_column_or_the_input(fitted, wine_csv, tmp_path):
    clashing = tmp_path / "has_segment.csv"
    pd.read_csv(wine_csv).assign(segment="old").to_csv(clashing, index=False)
    out = tmp_path / "tagged.csv"
    result = fitted("assign", NAME, clashing, "-o", out)
    assert result.exit_code == 2
    assert "segment" in result.output and "never overwritten" in result.output
    assert not out.exists()
    same = fitted("assign", NAME, wine_csv, "-o", wine_csv)
    assert same.exit_code == 2 and "overwrite the input" in same.output


def test_drift_table_lists_items_worst_first(fitted, wine_csv, tmp_path):
    shifted = tmp_path / "shifted.csv"
    frame = pd.read_csv(wine_csv)
    frame["alcohol"] += 1.0              # about 1.2 sd of the wine data's alcohol: an obvious shift
    frame.to_csv(shifted, index=False)
    result = fitted("drift", NAME, shifted)
    assert result.exit_code == 0, result.output
    report = fitted.api.drift_reports(NAME, limit=1)[0]
    rows = [r for r in table_rows(result.output) if len(r) == 6]
    assert [r[0] for r in rows] == [item["item"] for item in drift_items(report)]
    assert rows[0][:2] == ["feature alcohol", "alert"]
    ranks = [("alert", "watch", "stable").index(r[1]) for r in rows]
    assert ranks == sorted(ranks)
    assert len(rows) == 13 + 3          # every feature, the segment mix, the outlier rate, the residual
    as_json = fitted("drift", NAME, shifted, "--json")
    assert as_json.exit_code == 0 and json.loads(as_json.stdout)["features"] == report["features"]


# ------------------------------------------------------------------------------------------------ exit codes
def test_a_refusal_exits_1_with_the_status_and_detail(fitted, wine_csv):
    missing = fitted("show", NAME, 9)
    assert missing.exit_code == 1
    assert "404" in missing.output and "no version 9" in missing.output
    unknown_feature = fitted("fit", wine_csv, "--name", NAME, "--features", "alcohol,colour")
    assert unknown_feature.exit_code == 1
    assert "422" in unknown_feature.output and "field features" in unknown_feature.output
    assert len(fitted.api.versions(NAME)) == 1


def test_an_unreachable_server_exits_1():
    result = CliRunner(env=WIDE).invoke(main, ["versions", NAME, "--url", f"http://127.0.0.1:{free_port()}"])
    assert result.exit_code == 1
    assert "no answer from" in result.output and "Traceback" not in result.output


@pytest.mark.parametrize("arguments", [["--k", "two"], ["--components", "most"], ["--scaling", "log"]],
                         ids=["k", "components", "scaling"])
def test_an_unparseable_option_exits_2(cli, wine_csv, arguments):
    result = cli("fit", wine_csv, "--name", NAME, *arguments)
    assert result.exit_code == 2 and arguments[0] in result.output


def test_the_old_local_fit_invocation_points_to_store_fit(cli, tmp_path, wine_csv):
    result = cli("fit", "tea", wine_csv, "--store", tmp_path / "local")
    assert result.exit_code == 2 and "segscore store-fit NAME FILE --store DIR" in result.output
    assert not (tmp_path / "local").exists()


def test_fit_without_name_is_a_usage_error(cli, wine_csv):
    result = cli("fit", wine_csv)
    assert result.exit_code == 2 and "--name" in result.output


# ------------------------------------------------------------------------------------------------ bad files
def _lines(wine_csv: Path) -> list[str]:
    return wine_csv.read_text().splitlines(keepends=True)


BAD_FILES = {
    # name: (how to make the file from the good one, problem word, where)
    "semicolons": (lambda text, lines: text.replace(",", ";").encode(), "delimiter", "line 1"),
    "stray-delimiter": (lambda text, lines: "".join(lines[:30] + [lines[30].rstrip("\n") + ",9\n"]
                                                      + lines[31:]).encode(), "delimiter", "line 31"),
    "no-header": (lambda text, lines: "".join(line.split(",", 1)[1] for line in lines[1:]).encode(), "header",
                  "line 1"),
    "mixed-types": (lambda text, lines: "".join(lines[:57] + [re.sub(r",[^,]*,", ",n/a,", lines[57], count=1)]
                                                + lines[58:]).encode(), "column", "line 58, column 'alcohol'"),
    "empty": (lambda text, lines: b"", "empty", "empty"),
    "header-only": (lambda text, lines: lines[0].encode(), "empty", "line 1"),
    "truncated-gzip": (lambda text, lines: gzip.compress(text.encode())[:-40], "gzip", "truncated"),
    "binary": (lambda text, lines: b"PAR1\x15\x04\x15\xff\xfe\x00" * 20, "encoding", "line 1"),
}


@pytest.mark.parametrize("case", list(BAD_FILES))
@pytest.mark.parametrize("command", ["fit", "assign", "drift"])
def test_a_bad_file_exits_2_naming_the_problem_and_writes_nothing(fitted, wine_csv, tmp_path, case, command):
    make, problem, where = BAD_FILES[case]
    bad = tmp_path / ("bad.csv.gz" if case == "truncated-gzip" else "bad.csv")
    bad.write_bytes(make(wine_csv.read_text(), _lines(wine_csv)))
    out = tmp_path / "out.csv"
    arguments = {"fit": ["fit", bad, "--name", NAME, "--id-column", "wine_id"], "assign": ["assign", NAME, bad, "-o", out],
                 "drift": ["drift", NAME, bad]}[command]
    result = fitted(*arguments)
    assert result.exit_code == 2, result.output
    message = result.stderr
    assert f"{problem}:" in message and where in message and "Traceback" not in message
    assert len(fitted.api.versions(NAME)) == 1                     # no version written
    assert fitted.api.drift_reports(NAME) == []                    # no drift report stored
    assert not out.exists()


def test_a_mixed_column_past_the_local_sample_is_the_servers_refusal(fitted, wine_csv, tmp_path, monkeypatch):
    # Only the first rows are checked locally; the server checks every row and answers 422 (exit 1).
    import service.client._files as files

    monkeypatch.setattr(files, "SAMPLE_ROWS", 10)
    lines = _lines(wine_csv)
    bad = tmp_path / "late.csv"
    bad.write_text("".join(lines[:100] + [re.sub(r",[^,]*,", ",n/a,", lines[100], count=1)] + lines[101:]))
    result = fitted("drift", NAME, bad)
    assert result.exit_code == 1, result.output
    assert "422" in result.output and "record 99, field alcohol" in result.output
    assert fitted.api.drift_reports(NAME) == []


# ------------------------------------------------------------------------------------------------ a real server
def test_the_commands_end_to_end_against_a_server_process(wine_csv, tmp_path):
    import subprocess
    import sys

    from tests.serving import segscore_server

    segscore = str(Path(sys.executable).with_name("segscore"))
    store = str(tmp_path / "store")

    def shell(*arguments, env: dict[str, str]):
        """``segscore ARGS`` as a user runs it; (exit status, standard output, standard error)."""
        done = subprocess.run([segscore, *map(str, arguments)], capture_output=True, text=True, timeout=300,
                              env={**base_env, **WIDE, **env})
        return done.returncode, done.stdout, done.stderr

    base_env = {k: v for k, v in __import__("os").environ.items() if not k.startswith("SEGSCORE_")}
    keys = {}
    for name, scope in (("analyst", "admin"), ("viewer", "read")):
        code, out, _ = shell("keys", "create", "--store", store, "--name", name, "--scope", scope, env={})
        assert code == 0
        keys[name] = out.splitlines()[-1]

    with segscore_server(tmp_path, "--store", store) as url:
        analyst = {"SEGSCORE_URL": url, "SEGSCORE_API_KEY": keys["analyst"]}
        code, out, err = shell("fit", wine_csv, "--name", NAME, "--id-column", "wine_id", "--k", "2-5", env=analyst)
        assert code == 0, err
        with Client(url, key=keys["analyst"]) as api:
            report = api.version(NAME, 1)
        chosen = [row for row in table_rows(out) if len(row) == 4 and row[3] == "*"]
        assert [int(row[0]) for row in chosen] == [report["k"]]
        code, out, _ = shell("show", NAME, 1, "--json", env=analyst)
        assert code == 0 and json.loads(out) == report

        code, out, err = shell("assign", NAME, wine_csv, "-o", tmp_path / "tagged.csv", env=analyst)
        assert code == 0, err
        assert len(pd.read_csv(tmp_path / "tagged.csv")) == 178
        code, out, err = shell("drift", NAME, wine_csv, env=analyst)
        assert code == 0 and "drift items, worst first" in out, err

        viewer = {"SEGSCORE_URL": url, "SEGSCORE_API_KEY": keys["viewer"]}
        code, out, _ = shell("versions", NAME, env=viewer)
        assert code == 0 and [int(r[0]) for r in table_rows(out)] == [1]
        code, _, err = shell("promote", NAME, 1, env=viewer)             # the read scope cannot promote
        assert code == 1 and "403" in err and "fit" in err
        code, _, err = shell("versions", NAME, env={"SEGSCORE_URL": url})  # no key
        assert code == 1 and "401" in err
        code, _, err = shell("versions", NAME, "--url", url, "--key", keys["analyst"], env={})   # the options
        assert code == 0, err
        code, _, err = shell("fit", tmp_path / "missing.csv", "--name", NAME, env=analyst)
        assert code == 2 and "missing.csv" in err
    code, _, err = shell("versions", NAME, env=analyst)                   # the server has stopped
    assert code == 1 and "no answer from" in err
