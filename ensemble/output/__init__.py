"""Result files: the CF dataset, the streaming store, and summaries over members."""

from ensemble.output.layout import ParameterInfo, ResultLayout
from ensemble.output.store import (

    FingerprintMismatch,
    IncompleteWork,
    NotAResult,
    OutputError,
    ResultExists,
    StoreWriteError,
    WorkStore,
    partial_path,
    result_fingerprint,
)

__all__ = [
    "FingerprintMismatch", "IncompleteWork", "NotAResult", "OutputError",
    "ParameterInfo", "ResultExists", "ResultLayout", "StoreWriteError", "WorkStore",
    "partial_path", "result_fingerprint",
]
