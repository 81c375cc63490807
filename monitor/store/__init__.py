"""Storage of the monitor: subgroups, signals, limits, an alert outbox, acknowledgements, checkpoints.

The only package that talks to SQLAlchemy and alembic. One :class:`Store` serves SQLite (the
default, a file next to the configuration) and PostgreSQL; :meth:`Store.open` brings the
schema up to date with the migrations shipped in ``monitor/store/migrations``.
"""

from monitor.store.rows import (
    AlertRow,
    CommitBatch,
    LimitsRow,
    OutboxAlert,
    Panel,
    SignalRow,
    StoredAck,
    SubgroupBlock,
    SubgroupRow,
)
from monitor.store.store import Store, StoreError, sqlite_url_next_to

__all__ = [
    "AlertRow",
    "CommitBatch",
    "LimitsRow",
    "OutboxAlert",
    "Panel",
    "SignalRow",
    "Store",
    "StoreError",
    "StoredAck",
    "SubgroupBlock",
    "SubgroupRow",
    "sqlite_url_next_to",
]
