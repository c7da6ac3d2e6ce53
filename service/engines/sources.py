"""Where a Dask fit reads its data: a checked ``source`` (a Parquet dataset or CSV files the workers read), or
uploaded records spilled to Parquet on storage the workers share.

A ``source`` is refused (``SourceForbidden``, 403) before anything is opened unless it lies under one of the
prefixes of ``SEGSCORE_SOURCE_PREFIXES``:

- no prefix configured: every source is refused;
- ``..`` or ``.`` path segments, backslashes, percent-encoded dots or slashes and control characters are
  refused outright (they serve only to disguise where a path leads);
- a local path (``/data/x`` or ``file:///data/x``) is resolved on this machine, symbolic links included, and
  so is every file it names (a glob's matches, a dataset directory's files): each must lie inside a resolved
  prefix, so a link inside the prefix that points outside is refused too. The server only lists and resolves
  names (no file is read); the workers then open exactly the files listed;
- a URL of another scheme (``s3://``, ``gs://``, ``https://``...) must start with a prefix of the same scheme at
  a segment boundary; the server does not contact the store.
"""

from __future__ import annotations

import glob
import os
import re
import uuid
from dataclasses import dataclass
from pathlib import Path
from typing import Literal, Sequence

import numpy as np

from service.errors import InvalidInput, SourceForbidden

# Rows per spilled Parquet file: each file is one partition, so the workers share the work.
SPILL_ROWS_PER_FILE = 100_000
_DISGUISES = re.compile(r"%2e|%2f|%5c|\\|[\x00-\x1f\x7f]", re.IGNORECASE)
_GLOB = re.compile(r"[*?\[]")


@dataclass(frozen=True)
class DataSource:
    """What the workers read: a format and the files (local absolute paths) or URLs."""

    format: Literal["parquet", "csv"]
    paths: tuple[str, ...]
    spilled: Path | None = None        # a directory of spilled uploads, removed after the fit


def _format_of(name: str) -> Literal["parquet", "csv"]:
    lowered = name.lower()
    return "csv" if lowered.endswith((".csv", ".csv.gz", ".csv.bz2", ".csv.xz", ".csv.zst")) else "parquet"


def _split(url: str) -> tuple[str, str]:
    """(scheme, rest): a bare path is scheme "file"; file:///x -> ("file", "/x")."""
    if "://" in url:
        scheme, rest = url.split("://", 1)
        return scheme.lower(), rest
    return "file", url


def _inside(path: str, root: str) -> bool:
    return path == root or os.path.commonpath([path, root]) == root


def _refuse_disguises(source: str) -> None:
    if _DISGUISES.search(source):
        raise SourceForbidden("backslashes, control characters and percent-encoded dots or slashes are not allowed")
    _, rest = _split(source)
    if any(part in ("..", ".") for part in rest.split("/")):
        raise SourceForbidden("'..' and '.' path segments are not allowed")


def check_source(source: str, prefixes: Sequence[str]) -> DataSource:
    """The files or URLs the workers may read for ``source``; SourceForbidden (403) if it is not allowed."""
    if not prefixes:
        raise SourceForbidden("no source prefix is configured, so no source is allowed; an operator can allow "
                              "locations with SEGSCORE_SOURCE_PREFIXES (comma-separated)")
    _refuse_disguises(source)
    scheme, rest = _split(source)
    if scheme == "file":
        return _check_local(rest, prefixes)
    for prefix in prefixes:
        p_scheme, p_rest = _split(prefix)
        if p_scheme == scheme and (rest == p_rest.rstrip("/") or rest.startswith(p_rest.rstrip("/") + "/")):
            return DataSource(_format_of(rest), (source,))
    raise SourceForbidden("it is not under any allowed prefix")


def _check_local(path: str, prefixes: Sequence[str]) -> DataSource:
    if not os.path.isabs(path):
        raise SourceForbidden("a local source must be an absolute path (or a file:// URL)")
    roots = [os.path.realpath(p_rest) for p_scheme, p_rest in map(_split, prefixes) if p_scheme == "file"]
    if not roots:
        raise SourceForbidden("no local (file://) prefix is allowed")
    head, tail = os.path.split(path)
    if _GLOB.search(head):
        raise SourceForbidden("wildcards are allowed in the last path segment only")
    if _GLOB.search(tail):
        real_head = os.path.realpath(head)
        if not any(_inside(real_head, root) for root in roots):
            raise SourceForbidden("it is not under any allowed prefix")
        named = sorted(glob.glob(os.path.join(glob.escape(real_head), tail)))
    else:
        if not any(_inside(os.path.realpath(path), root) for root in roots):
            raise SourceForbidden("it is not under any allowed prefix (symbolic links resolved)")
        named = [path]
    files: list[str] = []
    for item in named:
        real = os.path.realpath(item)
        if not any(_inside(real, root) for root in roots):
            raise SourceForbidden("it names a file that resolves (through a symbolic link) outside the allowed prefixes")
        if os.path.isdir(real):
            for folder, dirs, names in os.walk(real):
                dirs[:] = sorted(d for d in dirs if not d.startswith((".", "_")))
                for name in sorted(names):
                    if name.startswith((".", "_")):
                        continue        # hidden files and dataset metadata (_SUCCESS, _metadata)
                    found = os.path.realpath(os.path.join(folder, name))
                    if not any(_inside(found, root) for root in roots):
                        raise SourceForbidden("its dataset holds a file that resolves (through a symbolic link) "
                                              "outside the allowed prefixes")
                    files.append(found)
        elif os.path.isfile(real):
            files.append(real)
    if not files:
        raise InvalidInput("the source names no file (nothing exists at that path)", field="source")
    formats = {_format_of(f) for f in files}
    if len(formats) > 1:
        raise InvalidInput("the source mixes CSV and Parquet files; name one kind", field="source")
    return DataSource(formats.pop(), tuple(files))


def spill_records(values: np.ndarray, features: list[str], spill_dir: Path) -> DataSource:
    """Write uploaded training rows as Parquet files in a fresh folder of ``spill_dir`` (shared with the
    workers) and return them as a source. The caller removes ``DataSource.spilled`` after the fit."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    folder = Path(spill_dir) / f"upload-{uuid.uuid4().hex}"
    folder.mkdir(parents=True, exist_ok=False)
    paths = []
    for part, start in enumerate(range(0, max(values.shape[0], 1), SPILL_ROWS_PER_FILE)):
        chunk = values[start:start + SPILL_ROWS_PER_FILE]
        table = pa.table({name: pa.array(chunk[:, j], from_pandas=True) for j, name in enumerate(features)})
        path = folder / f"part-{part:05d}.parquet"
        pq.write_table(table, path)
        paths.append(str(path.resolve()))
    return DataSource("parquet", tuple(paths), spilled=folder)
