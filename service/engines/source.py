"""The training matrix on disk: float64 rows, C order, NaN = missing, read back in chunks.

A streamed upload is converted once into this file (``service.inputs.streamed``); the fit worker gets its path,
never the data. ``MatrixFile`` is a small picklable description (path, shape, the columns in use), so it
crosses the worker pipe in bytes. Chunks are read with plain file reads (no memory map), so a pass over the
file keeps one chunk resident, whatever the file's size.
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from pathlib import Path
from typing import Iterator

import numpy as np

# Bytes of one chunk of the raw file (rows x all stored columns x 8): small against any memory limit, large
# enough that per-chunk Python overhead is negligible.
CHUNK_BYTES = 8 * 1024 * 1024


@dataclass(frozen=True)
class MatrixFile:
    """``n_rows`` x ``n_stored`` float64 values in ``path``; ``columns`` picks (and orders) those in use."""

    path: Path
    n_rows: int
    n_stored: int
    columns: tuple[int, ...]

    @property
    def shape(self) -> tuple[int, int]:
        return self.n_rows, len(self.columns)

    def select(self, columns: list[int]) -> "MatrixFile":
        """The same file with a subset of the columns in use (positions into the current selection)."""
        return replace(self, columns=tuple(self.columns[j] for j in columns))

    def chunk_rows(self) -> int:
        return max(1024, CHUNK_BYTES // (8 * max(self.n_stored, 1)))

    def chunks(self, rows: int | None = None, min_rows: int = 1) -> Iterator[tuple[int, np.ndarray]]:
        """(first row, block) pairs covering every row in order; no block is shorter than ``min_rows`` unless the
        whole file is (a short tail joins the block before it)."""
        rows = rows or self.chunk_rows()
        all_columns = self.columns == tuple(range(self.n_stored))
        with open(self.path, "rb") as handle:
            start = 0
            while start < self.n_rows:
                stop = min(start + rows, self.n_rows)
                if 0 < self.n_rows - stop < min_rows:
                    stop = self.n_rows
                block = np.fromfile(handle, dtype=np.float64, count=(stop - start) * self.n_stored)
                block = block.reshape(stop - start, self.n_stored)
                yield start, (block if all_columns else np.ascontiguousarray(block[:, list(self.columns)]))
                start = stop

    def load(self) -> np.ndarray:
        """The whole matrix in memory (the in-memory engine)."""
        values = np.fromfile(self.path, dtype=np.float64, count=self.n_rows * self.n_stored)
        values = values.reshape(self.n_rows, self.n_stored)
        if self.columns == tuple(range(self.n_stored)):
            return values
        return np.ascontiguousarray(values[:, list(self.columns)])

    @classmethod
    def write(cls, path: Path, values: np.ndarray) -> "MatrixFile":
        """A matrix already in memory (a JSON fit run out of core) -> a file."""
        np.ascontiguousarray(values, dtype=np.float64).tofile(path)
        return cls(Path(path), int(values.shape[0]), int(values.shape[1]), tuple(range(values.shape[1])))
