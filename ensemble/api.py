"""The Python API that notebooks and the command line call.

    >>> import ensemble
    >>> scenario = ensemble.load_scenario("scenarios/seir-demo.toml")   # doctest: +SKIP
    >>> path = ensemble.run(scenario)                                  # doctest: +SKIP
    >>> ds = ensemble.open_result(path)                                # doctest: +SKIP
"""

from __future__ import annotations

import os
from pathlib import Path

from ensemble.scenario.load import load_scenario, scenario_warnings
from ensemble.scenario.schema import Scenario


def run(scenario: Scenario | str | os.PathLike[str], *,
        output: str | os.PathLike[str] | None = None,
        chunk: int | None = None, workers: int | None = None, address: str | None = None,
        resume: bool = False, force: bool = False, progress: bool | None = None,
        backend: str | None = None, history: str | None = None) -> Path:
    """Run every variant of a scenario and write its result file.

    Parameters
    ----------
    scenario : a validated scenario (:func:`load_scenario`, with any member or seed
        override), or the path of a scenario file.
    output : result path, instead of the file's ``output.path``.
    chunk : members per task (default: the file's ``[compute] chunk``, else a size that
        gives tasks of a second or so and several per worker).
    workers : worker processes on this machine (default: the file's, else one per core);
        ``0`` computes everything in this process, without dask.distributed.
    address : a running dask scheduler to use instead of a local cluster.
    resume : continue from ``<output>.partial`` (afresh if there is none; nothing to do
        if the result is complete with the same fingerprint).
    force : replace an existing result.
    progress : draw a progress bar on standard error (default: when it is a terminal).
    backend : ``"numpy"`` or ``"compiled"`` integration (default
        :data:`ensemble.run.execute.DEFAULT_BACKEND`).
    history : the result's ``history`` attribute (default: this call and the time).

    Returns
    -------
    The result's path.

    Raises
    ------
    ensemble.output.ResultExists, ensemble.output.FingerprintMismatch : nothing was
        computed (the command line exits with 2).
    ensemble.run.RunFailed, ensemble.output.StoreWriteError, OSError : the run failed;
        finished chunks are kept for ``resume`` (exit 1).
    """
    import dataclasses
    from datetime import datetime, timezone

    from ensemble.run.execute import DEFAULT_BACKEND, Progress, run_scenario

    if not isinstance(scenario, Scenario):
        scenario = load_scenario(scenario)
    if output is not None:
        scenario = dataclasses.replace(
            scenario, output=dataclasses.replace(scenario.output, path=os.fspath(output)))
    if history is None:
        now = datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")
        history = f"{now} ensemble.api.run({scenario.source.path!r})"
    return run_scenario(scenario, history=history, backend=backend or DEFAULT_BACKEND,
                        chunk=chunk, workers=workers, address=address, resume=resume,
                        force=force, progress=Progress(bar=progress))


def status_counts(path: str | os.PathLike[str]) -> dict[str, int]:
    """Members of a result file behind each status bit, over every variant.

    Returns
    -------
    flag word (as in the file's ``flag_meanings``) -> number of members with that bit.
    """
    import numpy as np
    import xarray as xr

    from ensemble.integrate.check import STATUS_FLAGS

    with xr.open_dataset(path, decode_times=False) as dataset:
        status = dataset["status"].values
    return {word: int(np.count_nonzero(status & bit)) for bit, word in STATUS_FLAGS}
