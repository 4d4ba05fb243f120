"""Persistence: token counts, class totals, the training ledger, verdict and feedback logs."""

from mailweir.store.counts import ModelStats, ModelStore
from mailweir.store.errors import (
    SchemaTooNew,
    StoreBusy,
    StoreError,
    StoreUnavailable,
    store_errors,
)
from mailweir.store.training import TrainResult
from mailweir.store.verdicts import (
    FeedbackChannel,
    FeedbackKind,
    FeedbackRecord,
    VerdictRecord,
)

__all__ = [
    "FeedbackChannel",
    "FeedbackKind",
    "FeedbackRecord",
    "ModelStats",
    "ModelStore",
    "SchemaTooNew",
    "StoreBusy",
    "StoreError",
    "StoreUnavailable",
    "TrainResult",
    "VerdictRecord",
    "store_errors",
]
