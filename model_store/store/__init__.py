"""The version store: immutable published versions, checked activation and rollback, tamper-evident history.

    from model_store.store import Store, resolve_store_root
    store = Store(resolve_store_root(None, os.environ))
    store.active("iris")                      # ActiveRecord or None; one small file read
    bundle = store.load_verified("iris", "1.2.0")

The store is a directory (layout in ``model_store.store.layout``); several
processes may read it at once while one changes it under a file lock.
"""

from model_store.store.layout import default_store_root, resolve_store_root
from model_store.store.pointer import ActiveRecord
from model_store.store.publishing import PublishOutcome
from model_store.store.signing import TrustedKey
from model_store.store.store import Store, VersionInfo

__all__ = [
    "ActiveRecord",
    "PublishOutcome",
    "Store",
    "TrustedKey",
    "VersionInfo",
    "default_store_root",
    "resolve_store_root",
]
