"""Running a scenario: the chunk plan and fingerprint (:mod:`.plan`), the local cluster
(:mod:`.local`), and the engine that computes chunks on dask workers and saves them as
they finish (:mod:`.execute`).

The names below are imported from their modules when first used, so that importing a
light module of this package (:mod:`.local`) does not import the whole pipeline.
"""

_EXPORTS = {"compute_chunk": "execute", "open_client": "execute",
            "run_scenario": "execute", "fingerprint": "plan", "plan_chunks": "plan",
            "shard_range": "plan"}


def __getattr__(name: str):
    if name in _EXPORTS:
        import importlib

        return getattr(importlib.import_module(f"ensemble.run.{_EXPORTS[name]}"), name)
    raise AttributeError(f"module 'ensemble.run' has no attribute {name!r}")


__all__ = sorted(_EXPORTS)
