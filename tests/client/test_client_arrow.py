"""The client sends large tables as Arrow IPC streams (and reads Arrow assign answers): same results as CSV.

Every check compares the Arrow round trip with the same client sending CSV (``Client(arrow=False)``) to the
same server; the CSV path is itself checked against scikit-learn in tests/client/test_client.py and
tests/api/test_assign.py. Data: the Wine data set shipped with scikit-learn, resampled with seeded noise.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pyarrow as pa
import pytest
from click.testing import CliRunner

from segscore.client import Client, InvalidInput
from service.cli import main
from service.client import _arrow

NAME = "wines"
ARROW = "application/vnd.apache.arrow.stream"


@pytest.fixture
def recorded(client, monkeypatch):
    """The Content-Type of every request the clients send through the app's TestClient."""
    sent: list[str] = []
    original = client.request

    def request(method, url, **kwargs):
        if method == "POST":
            sent.append((kwargs.get("headers") or {}).get("Content-Type", ""))
        return original(method, url, **kwargs)

    monkeypatch.setattr(client, "request", request)
    return sent


@pytest.fixture
def clients(client, wine):
    arrow, csv = Client(http=client), Client(http=client, arrow=False)
    frame = pd.DataFrame(wine.data, columns=wine.feature_names)
    frame.insert(0, "wine_id", [f"w-{i:03d}" for i in range(len(frame))])
    csv.fit(NAME, frame, id_column="wine_id", k=3)
    csv.label(NAME, 1, 2, "bold")
    return arrow, csv


def big_frame(wine, n: int, seed: int = 0) -> pd.DataFrame:
    """Wine rows moved by seeded noise, a few far enough to be outliers, ~2% of values missing."""
    rng = np.random.default_rng(seed)
    x = wine.data[rng.integers(0, wine.data.shape[0], n)]
    x = x + rng.normal(scale=0.3 * wine.data.std(axis=0), size=x.shape)
    x[: n // 50] *= 2.5
    x[rng.random(x.shape) < 0.02] = np.nan
    frame = pd.DataFrame(x, columns=wine.feature_names)
    frame.insert(0, "wine_id", [f"n-{i}" for i in range(n)])
    return frame


def assert_same_columns(got: pd.DataFrame, want: pd.DataFrame) -> None:
    for column in ("segment", "label", "outlier", "outlier_reasons", "runner_up", "imputed"):
        assert got[column].tolist() == want[column].tolist(), column
    for column in ("distance", "margin", "residual"):
        np.testing.assert_allclose(got[column].to_numpy(float), want[column].to_numpy(float), rtol=1e-12, atol=0)


def test_assign_frame_sends_large_batches_as_arrow_with_the_csv_answers(clients, recorded, wine):
    arrow, csv = clients
    frame = big_frame(wine, 2_500)
    got = arrow.assign(NAME, frame, batch_rows=1_000)
    assert recorded == [ARROW, ARROW, "text/csv"]          # 1,000 + 1,000 rows as Arrow; the last 500 as CSV
    want = csv.assign(NAME, frame, batch_rows=1_000)
    assert recorded[3:] == ["text/csv"] * 3
    assert got["outlier"].any() and (got["imputed"].map(len) > 0).any() and "bold" in set(got["label"])
    assert_same_columns(got, want)
    assert got.attrs == want.attrs


def test_assign_csv_file_round_trip_equals_the_csv_path(clients, recorded, wine, tmp_path):
    arrow, csv = clients
    source = tmp_path / "in.csv"
    frame = big_frame(wine, 2_200, seed=1)
    frame["note"] = ["x" if i % 9 else "" for i in range(len(frame))]      # a text column, some cells empty
    frame.to_csv(source, index=False)
    arrow.assign_csv(NAME, source, tmp_path / "arrow.csv", batch_rows=1_100)
    assert recorded == [ARROW, ARROW]
    csv.assign_csv(NAME, source, tmp_path / "csv.csv", batch_rows=1_100)
    got = pd.read_csv(tmp_path / "arrow.csv", keep_default_na=False, dtype=str)
    want = pd.read_csv(tmp_path / "csv.csv", keep_default_na=False, dtype=str)
    assert list(got.columns) == list(want.columns)
    for column in got.columns:
        if column in ("distance", "margin", "residual"):
            np.testing.assert_allclose(got[column].astype(float), want[column].astype(float), rtol=1e-12, atol=0)
        else:
            assert got[column].tolist() == want[column].tolist(), column


def test_a_batch_with_a_mixed_column_goes_as_csv_so_the_server_names_the_record(clients, recorded, wine, tmp_path):
    arrow, _ = clients
    source = tmp_path / "in.csv"
    frame = big_frame(wine, 2_000, seed=2).astype({"hue": object})
    frame.loc[1_500, "hue"] = "n/a"
    frame.to_csv(source, index=False)
    with pytest.raises(InvalidInput) as caught:
        arrow.assign_csv(NAME, source, tmp_path / "out.csv", batch_rows=1_000)
    assert [(e["record"], e["field"]) for e in caught.value.detail] == [(1_500, "hue")]
    assert recorded == [ARROW, "text/csv"]
    summary = arrow.assign_csv(NAME, source, tmp_path / "out.csv", batch_rows=1_000, on_error="skip")
    assert (summary["assigned"], [e["record"] for e in summary["errors"]]) == (1_999, [1_500])


def test_drift_of_a_large_frame_and_file_goes_as_arrow_with_the_same_report(clients, recorded, wine, tmp_path):
    arrow, csv = clients
    frame = big_frame(wine, 6_000, seed=3)
    path = tmp_path / "batch.csv"
    frame.to_csv(path, index=False)
    assert path.stat().st_size >= _arrow.ARROW_MIN_FILE_BYTES
    by_arrow = [arrow.drift(NAME, frame), arrow.drift(NAME, path)]
    assert recorded == [ARROW, ARROW]
    by_csv = [csv.drift(NAME, frame), csv.drift(NAME, path)]
    assert recorded[2:] == ["text/csv", "text/csv"]
    for got, want in zip(by_arrow, by_csv):
        strip = {"id", "created_at"}
        assert {k: v for k, v in got.items() if k not in strip} == {k: v for k, v in want.items() if k not in strip}


def test_cli_assign_and_drift_of_large_files_use_arrow(clients, recorded, client, wine, tmp_path):
    _, csv = clients
    source = tmp_path / "in.csv"
    big_frame(wine, 6_000, seed=5).to_csv(source, index=False)
    runner = CliRunner(env={"COLUMNS": "240", "NO_COLOR": "1"})
    result = runner.invoke(main, ["assign", NAME, str(source), "-o", str(tmp_path / "out.csv")],
                           obj=lambda url, key: Client(http=client))
    assert result.exit_code == 0, result.output
    result = runner.invoke(main, ["drift", NAME, str(source), "--json"], obj=lambda url, key: Client(http=client))
    assert result.exit_code == 0, result.output
    assert recorded == [ARROW, ARROW]                     # one 6,000-row assign batch; a 1.2 MB drift file
    csv.assign_csv(NAME, source, tmp_path / "by_csv.csv", columns=("segment", "label", "distance", "outlier"))
    got = pd.read_csv(tmp_path / "out.csv", keep_default_na=False, dtype=str)
    want = pd.read_csv(tmp_path / "by_csv.csv", keep_default_na=False, dtype=str)
    assert list(got.columns) == list(want.columns)
    assert got["segment"].tolist() == want["segment"].tolist() and got["outlier"].tolist() == want["outlier"].tolist()
    np.testing.assert_allclose(got["distance"].astype(float), want["distance"].astype(float), rtol=1e-12, atol=0)


def test_small_tables_still_go_as_csv(clients, recorded, wine, tmp_path):
    arrow, _ = clients
    frame = big_frame(wine, 300, seed=4)
    arrow.assign(NAME, frame)
    arrow.drift(NAME, frame)
    path = tmp_path / "small.csv"
    frame.to_csv(path, index=False)
    arrow.drift(NAME, path)
    assert recorded == ["text/csv"] * 3


@pytest.mark.parametrize("cells, expected", [
    (["1", "-2", "", "+3"], pa.array([1.0, -2.0, None, 3.0])),          # '+3' is no int64 for Arrow: float64
    (["1", "22", ""], pa.array([1, 22, None], type=pa.int64())),
    (["18446744073709551615", "7"], pa.array([2 ** 64 - 1, 7], type=pa.uint64())),
    (["1.5e3", ".25", "5."], pa.array([1500.0, 0.25, 5.0])),
    (["a", "", "b"], pa.array(["a", None, "b"])),
    (["", ""], pa.nulls(2)),
    (["1.5", "n/a"], None),
    (["1.5", "nan"], None),
    (["1.5", " 2"], None),
], ids=["float-with-plus", "int64", "uint64", "floats", "text", "all-empty", "mixed", "nan-text", "space"])
def test_csv_cells_become_typed_columns_only_when_nothing_can_change(cells, expected):
    table = _arrow.table_from_rows(["c"], [[cell] for cell in cells])
    if expected is None:
        assert table is None
    else:
        assert table.column("c").combine_chunks().equals(expected)


def test_a_column_refused_for_its_arrow_type_is_sent_again_as_csv(clients, recorded, wine):
    # The frame's id column holds decimals: a float64 Arrow column, which is no id type (as a JSON float is
    # not), while the CSV form's id is the text written, a valid id. The client sends that batch again as CSV.
    arrow, csv = clients
    frame = big_frame(wine, 1_200, seed=6)
    frame["wine_id"] = np.arange(1_200) + 0.5
    got = arrow.assign(NAME, frame, batch_rows=1_200)
    assert recorded == [ARROW, "text/csv"]
    assert_same_columns(got, csv.assign(NAME, frame, batch_rows=1_200))
    # A feature column of text: the CSV form's refusal names every record (here the first of them).
    frame["hue"] = "pale"
    with pytest.raises(InvalidInput) as caught:
        arrow.drift(NAME, frame)
    assert recorded[-2:] == [ARROW, "text/csv"]
    assert (caught.value.detail[0]["record"], caught.value.detail[0]["field"]) == (0, "hue")
