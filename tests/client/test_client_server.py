"""The Python client end to end against a real ``segscore serve`` process on a loopback port, with API keys."""

from __future__ import annotations

import pandas as pd
import pytest

from segscore.client import Client, Forbidden, NotFound, Unauthorized
from tests.conftest import create_keys
from tests.serving import segscore_server


@pytest.fixture
def keys(tmp_path) -> dict[str, str]:
    """Two API keys in the server's store: {"full": ..., "read": ...}."""
    return create_keys(tmp_path / "store", {"full": ["fit", "read", "assign", "drift"], "read": ["read"]})


@pytest.fixture
def server(tmp_path, keys):
    """``segscore serve`` on a free loopback port over a store holding two API keys; yields its base URL."""
    with segscore_server(tmp_path, "--store", str(tmp_path / "store")) as url:
        yield url


def test_client_against_a_server_process(server, keys, wine, tmp_path):
    frame = pd.DataFrame(wine.data, columns=wine.feature_names)
    frame.insert(0, "wine_id", range(1000, 1000 + len(frame)))
    source = tmp_path / "wines.csv"
    frame.to_csv(source, index=False)

    with Client(server, key=keys["full"]) as api:
        first = api.fit("wines", source, id_column="wine_id", k=3, n_init=1, seed=0)     # the file is streamed
        second = api.fit("wines", frame, id_column="wine_id", k=3, n_init=1, seed=2)
        assert (first["version"], second["version"]) == (1, 2)
        assert first["data_sha256"] == second["data_sha256"]
        api.label("wines", 1, 0, "light")
        comparison = api.compare("wines", 1, 2)
        assert comparison["adjusted_rand_index"] > 0.9
        assert [s["label"] for s in api.carry_labels("wines", 1, 2)] == ["light"]
        assert api.promote("wines", 2)["live_version"] == 2

        summary = api.assign_csv("wines", source, tmp_path / "tagged.csv", batch_rows=40)
        assert summary == {"version": 2, "rows": 178, "assigned": 178, "errors": []}
        tagged = pd.read_csv(tmp_path / "tagged.csv", keep_default_na=False)
        assert tagged["wine_id"].tolist() == frame["wine_id"].tolist()
        assert tagged["label"].tolist().count("light") == sum(
            s["size"] for s in api.version("wines", 2)["segments"] if s["label"] == "light")
        assert api.assign("wines", frame)["segment"].tolist() == tagged["segment"].tolist()
        assert api.drift("wines", frame)["n_records"] == 178
        with pytest.raises(NotFound) as caught:
            api.compare("wines", 1, 9)
        assert caught.value.status == 404 and "9" in caught.value.detail

    with pytest.raises(Unauthorized):
        Client(server).versions("wines")
    with Client(server, key=keys["read"]) as reader:
        assert [v["live"] for v in reader.versions("wines")] == [False, True]
        with pytest.raises(Forbidden) as caught:
            reader.promote("wines", 1)
        assert caught.value.status == 403 and "fit" in caught.value.detail
