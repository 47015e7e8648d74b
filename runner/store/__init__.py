"""The results store: one SQLite file per recipe, touched only through ``Store``."""

from runner.store.database import SCHEMA_VERSION, Store, StoredJob, StoredModule
from runner.store.lock import STALE_AFTER, RunnerLock
from runner.store.opening import StoreGone, StoreReadOnly

__all__ = [
    "SCHEMA_VERSION",
    "STALE_AFTER",
    "RunnerLock",
    "Store",
    "StoreGone",
    "StoreReadOnly",
    "StoredJob",
    "StoredModule",
]
