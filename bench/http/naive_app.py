"""A plain assign route written the obvious way, for the HTTP benchmark only (not part of the service).

A pydantic model per record, a pandas DataFrame, scikit-learn's Pipeline.predict of the same fitted objects
the service stores, and a plain ``def`` handler (FastAPI runs it in its thread pool). It answers only
``{"results": [{"id": row index, "segment": ...}]}`` - less than the service computes and returns (no
distances, runner-up, residual, outlier flags or imputation report), so the comparison favours this route.

    NAIVE_STORE_DIR=<store> NAIVE_NAME=bench uvicorn naive_app:app --app-dir bench/http
"""

from __future__ import annotations

import copy
import os
from pathlib import Path

import joblib

import numpy as np
import pandas as pd
from fastapi import FastAPI
from pydantic import BaseModel, create_model
from sklearn.pipeline import Pipeline


# The server's artifact holds no scikit-learn objects; the analysts' joblib file beside it does (the whole Bundle).
_store_dir, _name = Path(os.environ["NAIVE_STORE_DIR"]), os.environ.get("NAIVE_NAME", "bench")
_bundle = joblib.load(_store_dir / "segmentations" / _name / "v000001.joblib")
FEATURES = list(_bundle.features)
# The same fitted steps; the imputer is told the column names, as it would be had it been fitted on a DataFrame.
_imputer = copy.deepcopy(_bundle.imputer)
_imputer.feature_names_in_ = np.asarray(FEATURES, dtype=object)
PIPELINE = Pipeline([("impute", _imputer), ("scale", _bundle.scaler), ("pca", _bundle.pca),
                     ("cluster", _bundle.clusterer)])

Record = create_model("Record", **{name: (float | None, None) for name in FEATURES})


class AssignRequest(BaseModel):
    records: list[Record]  # type: ignore[valid-type]


class Result(BaseModel):
    id: int
    segment: int


class AssignResponse(BaseModel):
    results: list[Result]


app = FastAPI(title="naive assign (benchmark only)")


@app.get("/healthz")
def healthz() -> dict:
    return {"status": "ok"}


@app.post("/assign", response_model=AssignResponse)
def assign(request: AssignRequest) -> dict:
    frame = pd.DataFrame([record.model_dump() for record in request.records], columns=FEATURES)
    segments = PIPELINE.predict(frame)
    return {"results": [{"id": i, "segment": int(s)} for i, s in enumerate(segments)]}
