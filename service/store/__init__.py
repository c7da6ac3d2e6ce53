"""Versioned bundle storage (no web imports)."""

from service.store.base import BundleStore, LoadedVersion
from service.store.filesystem import FilesystemStore

__all__ = ["BundleStore", "FilesystemStore", "LoadedVersion"]
