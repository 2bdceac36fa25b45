"""Running a scenario: the chunk plan and fingerprint (:mod:`.plan`), one chunk's task
(:mod:`.tasks`), where the tasks run (:mod:`.executors`, :mod:`.local`,
:mod:`.clusters`), the work journal of saved chunks (:mod:`.journal`,
:mod:`.chunk_files`), the engine that ties them together (:mod:`.execute`), and sharded
runs with their part files and job arrays (:mod:`.shards`, :mod:`.job_array`).

The names below are imported from their modules when first used, so that importing a
light module of this package (:mod:`.local`) does not import the whole pipeline.
"""

_EXPORTS = {"compute_chunk": "tasks", "open_client": "executors", "run_scenario": "execute",
            "fingerprint": "plan", "plan_chunks": "plan", "shard_range": "plan"}


def __getattr__(name: str):
    if name in _EXPORTS:
        import importlib

        return getattr(importlib.import_module(f"ensemble.run.{_EXPORTS[name]}"), name)
    raise AttributeError(f"module 'ensemble.run' has no attribute {name!r}")


__all__ = sorted(_EXPORTS)
