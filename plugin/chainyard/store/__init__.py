"""The run store: layout, commit protocol, single-writer lock and reading API."""

from chainyard.store.lock import StoreLock, lock_path, writer_lock
from chainyard.store.zarr_store import Store, chunk_checksum

__all__ = ["Store", "StoreLock", "chunk_checksum", "lock_path", "writer_lock"]
