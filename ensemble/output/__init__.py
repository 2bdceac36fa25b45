"""Result files: the CF dataset, the streaming store, and summaries over members."""

from ensemble.output.layout import ParameterInfo, ResultLayout
from ensemble.output.store import WorkStore, partial_path, result_fingerprint

__all__ = ["ParameterInfo", "ResultLayout", "WorkStore", "partial_path", "result_fingerprint"]
