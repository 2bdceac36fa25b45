"""Batch ensemble runner for epidemic compartment models.

The pipeline, one module a stage::

    scenario file -> ensemble.scenario (validated, frozen dataclasses)
                  -> ensemble.model     (compiled right-hand side and Jacobian)
                  -> ensemble.sampling  (parameter design, draws per member)
                  -> ensemble.integrate (fixed-step integration of a chunk, step check)
                  -> ensemble.output    (CF result dataset, streaming writer, summaries)

``ensemble.api`` is what notebooks and the command line call.
"""

from ensemble.about import CAUTION, VERSION as __version__

_API = ("load_scenario", "scenario_warnings", "run", "simulate", "open_result", "summarize",
        "merge", "array_script")


def __getattr__(name: str):
    """Expose :mod:`ensemble.api` at the top level, imported only when first used so that
    worker processes that need just the numerics stay light."""
    if name in _API:
        from ensemble import api

        return getattr(api, name)
    raise AttributeError(f"module 'ensemble' has no attribute {name!r}")


__all__ = ["CAUTION", "__version__", *_API]
