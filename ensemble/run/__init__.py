"""Running a scenario: the chunk plan and fingerprint (:mod:`.plan`), and the engine that
computes chunks on dask workers and saves them as they finish (:mod:`.execute`)."""

from ensemble.run.execute import RunFailed, compute_chunk, open_client, run_scenario
from ensemble.run.plan import fingerprint, plan_chunks, shard_range

__all__ = ["RunFailed", "compute_chunk", "fingerprint", "open_client", "plan_chunks",
           "run_scenario", "shard_range"]
