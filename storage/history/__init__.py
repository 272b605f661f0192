"""The history store: run ledger, results, alerts and outbox in SQL tables.

See ``HistoryStore`` for the write API and the queries, and the README's table
reference for the tables themselves (a public contract).
"""

from storage.history._records import (
    AlertRow,
    BaselineRow,
    BaselineSnapshot,
    CheckRow,
    CoefficientRow,
    ComparisonRow,
    Delivery,
    DeliveryRow,
    MetricRow,
    RunRecord,
    SlotClaim,
    SourceFile,
    VerdictRow,
    alert_key,
)
from storage.history._schema import SCHEMA_VERSION
from storage.history._store import DEFAULT_LEASE, HistoryStore, default_store_url

__all__ = [
    "DEFAULT_LEASE",
    "SCHEMA_VERSION",
    "AlertRow",
    "BaselineRow",
    "BaselineSnapshot",
    "CheckRow",
    "CoefficientRow",
    "ComparisonRow",
    "Delivery",
    "DeliveryRow",
    "HistoryStore",
    "MetricRow",
    "RunRecord",
    "SlotClaim",
    "SourceFile",
    "VerdictRow",
    "alert_key",
    "default_store_url",
]
