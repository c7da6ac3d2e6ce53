"""Artifact files addressed by their content: ``<root>/objects/<sha[:2]>/<sha><suffix>``.

The file name is the SHA-256 of the bytes, so replicas sharing the directory never write over each other's files
(the same bytes land under the same name), and a read checks the bytes it got against the name it asked for.
Writes go to a temporary file beside the target, are fsynced and renamed into place.
"""

from __future__ import annotations

import hashlib
import os
import tempfile
from pathlib import Path


def _fsync_dir(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _write_atomic(target: Path, write) -> str:
    """Write via ``write(file)`` to a temp file beside ``target``, fsync, rename; return its SHA-256."""
    fd, tmp = tempfile.mkstemp(dir=target.parent, prefix=".tmp-", suffix=target.suffix)
    try:
        with os.fdopen(fd, "wb") as handle:
            write(handle)
            handle.flush()
            os.fsync(handle.fileno())
        digest = _sha256_file(Path(tmp))
        os.replace(tmp, target)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    _fsync_dir(target.parent)
    return digest


def _sha256_file(path: Path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


class ContentAddressedFiles:
    def __init__(self, root: Path | str) -> None:
        self.root = Path(root)

    def path(self, sha256: str, suffix: str) -> Path:
        return self.root / "objects" / sha256[:2] / f"{sha256}{suffix}"

    def put(self, data: bytes, suffix: str) -> str:
        """Store ``data`` (if not there yet); return its SHA-256. Raises OSError when the disk refuses."""
        sha256 = hashlib.sha256(data).hexdigest()
        target = self.path(sha256, suffix)
        if not target.exists():
            target.parent.mkdir(parents=True, exist_ok=True)
            _write_atomic(target, lambda handle: handle.write(data))
        return sha256

    def get(self, sha256: str, suffix: str) -> bytes | None:
        """The bytes stored under ``sha256``, or None when the file is missing, unreadable or altered."""
        try:
            data = self.path(sha256, suffix).read_bytes()
        except OSError:
            return None
        return data if hashlib.sha256(data).hexdigest() == sha256 else None

    def remove(self, sha256: str, suffix: str) -> None:
        self.path(sha256, suffix).unlink(missing_ok=True)

    def temporary_files(self) -> list[Path]:
        """Temporary files of writes that never finished (a killed writer leaves them)."""
        return list((self.root / "objects").glob("*/.tmp-*"))
