"""Result files: the CF dataset, the streaming store, and summaries over members."""

from ensemble.output.layout import ParameterInfo, ResultLayout
from ensemble.output.store import (
    ChunkKey,
    FingerprintMismatch,
    IncompleteWork,
    OutputError,
    ResultExists,
    StoreWriteError,
    WorkStore,
)

__all__ = [
    "ChunkKey", "FingerprintMismatch", "IncompleteWork", "OutputError", "ParameterInfo",
    "ResultExists", "ResultLayout", "StoreWriteError", "WorkStore",
]
