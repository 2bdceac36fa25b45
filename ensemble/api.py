"""The Python API that notebooks and the command line call.

    >>> import ensemble
    >>> scenario = ensemble.load_scenario("scenarios/seir-demo.toml")   # doctest: +SKIP
    >>> path = ensemble.run(scenario)                                  # doctest: +SKIP
    >>> ds = ensemble.open_result(path)                                # doctest: +SKIP
"""

from __future__ import annotations

import os
from collections.abc import Sequence
from datetime import datetime, timezone
from pathlib import Path
from typing import TYPE_CHECKING

from ensemble.scenario.load import load_scenario, scenario_warnings
from ensemble.scenario.schema import Scenario

__all__ = ["load_scenario", "scenario_warnings", "check_report", "run", "simulate",
           "open_result", "summarize", "status_counts", "merge", "array_script",
           "worker_script", "cluster_profile", "default_part_path", "history_line"]

if TYPE_CHECKING:
    import xarray as xr

    from ensemble.run.clusters import ClusterProfile
    from ensemble.run.shards import Shard


def check_report(scenario: Scenario) -> str:
    """The text ``ensemble check`` prints: what the scenario sets, its basic
    reproduction number R0 by the next-generation matrix (at the parameters' medians and
    over the first members of each variant), the figures of running it (work, memory,
    disk) and its warnings.

    Raises
    ------
    ensemble.errors.InputError : the run could not finish or be written
        (:func:`ensemble.run.feasibility.refuse_infeasible`), a part of an expression
        made of numbers alone is not finite, or an ``[[observations]]`` table or its
        counts file is wrong.
    """
    import numpy as np

    from ensemble.fit.observations import scenario_observations
    from ensemble.model.reproduction import infected_compartments
    from ensemble.run.feasibility import (advice, estimate, machine_cores,
                                          refuse_infeasible, section)
    from ensemble.run.layout import lowered_models
    from ensemble.sampling.design import make_design, median_design
    from ensemble.scenario.describe import describe, reproduction_section

    figures = estimate(scenario)
    refuse_infeasible(scenario, figures, Path(scenario.output.path))
    scenario_observations(scenario)     # [[observations]] and their counts files
    first_members = np.arange(min(scenario.member_count, QUICK_DRAW))
    rows = []
    for variant, model in zip(scenario.variants, lowered_models(scenario)):
        median = median_design(scenario, variant, model).basic_reproduction_number[0]
        drawn = make_design(scenario, variant, model, first_members)
        rows.append((variant.name, float(median), drawn.basic_reproduction_number))
    infected = infected_compartments(scenario.model)
    cores = machine_cores()
    return describe(scenario, scenario_warnings(scenario), [
        reproduction_section(infected.compartments, infected.note, rows),
        section(figures, advice(scenario, figures, cores), cores)])


QUICK_DRAW = 200
"""Members of each variant (the first ones) over which ``ensemble check`` gives R0's
range."""


def history_line(command: str) -> str:
    """A result's ``history`` entry: the UTC time and the command that made it."""
    return f"{datetime.now(timezone.utc).strftime('%Y-%m-%dT%H:%M:%SZ')} {command}"


def run(scenario: Scenario | str | os.PathLike[str], *,
        output: str | os.PathLike[str] | None = None,
        chunk: int | None = None, workers: int | None = None, address: str | None = None,
        resume: bool = False, force: bool = False, progress: bool | None = None,
        backend: str | None = None, history: str | None = None,
        cluster: ClusterProfile | str | None = None, shard: Shard | str | None = None,
        processes: bool = False, dashboard: bool | str = False) -> Path:
    """Run every variant of a scenario and write its result file.

    Parameters
    ----------
    scenario : a validated scenario (:func:`load_scenario`, with any member or seed
        override), or the path of a scenario file.
    output : result path, instead of the file's ``output.path``.
    chunk : members per task (default: the file's ``[compute] chunk``, else a size that
        gives tasks of a second or so and several per worker).
    workers : workers on this machine (default: the file's, else one per core): threads
        of this process, or worker processes with ``processes``; ``0`` computes
        everything in this process, without dask.distributed.
    address : a running dask scheduler to use instead of a local cluster.
    resume : continue from ``<output>.partial`` (afresh if there is none; nothing to do
        if the result is complete with the same fingerprint).
    force : replace an existing result, and discard the saved chunks of an unfinished
        run in ``<output>.partial`` (without it, and without ``resume``, they are kept and
        the run refuses).
    progress : draw a progress bar on standard error (default: when it is a terminal).
    backend : ``"numpy"`` or ``"compiled"`` integration (default
        :data:`ensemble.run.tasks.DEFAULT_BACKEND`).
    history : the result's ``history`` attribute (default: this call and the time).
    cluster : a cluster profile (name or path, :mod:`ensemble.run.clusters`; default the
        file's ``[compute] cluster``) whose batch-system worker jobs do the work;
        ``"local"`` is this machine.
    shard : ``"I/N"``: compute only shard I of N and write a part file to ``output``
        (default ``<result stem>.shard-I-of-N.nc``) for :func:`merge`.
    processes : local workers in processes of their own (a worker that dies loses only
        its task) instead of threads of this process (faster: nothing is copied between
        processes or imported again).
    dashboard : serve dask's dashboard from the scheduler the run starts (its address is
        printed): ``True`` on this machine's loopback address (a free port), or at
        ``"HOST:PORT"``; off by default, as it takes about half a second to start and
        shows the run's tasks and logs to whoever reaches it
        (:mod:`ensemble.run.listening`).

    Returns
    -------
    The result's (or part's) path.

    Raises
    ------
    ensemble.errors.ResultExists, ensemble.errors.FingerprintMismatch,
    ensemble.errors.WorkInProgress, ensemble.errors.WorkLocked : nothing was computed
        (the command line exits with 2).
    ensemble.errors.RunFailed, ensemble.errors.StoreWriteError : the run failed;
        finished chunks are kept for ``resume`` (exit 1).
    """
    from ensemble.run.listening import dashboard_at
    from ensemble.run.local import LocalStart

    if not isinstance(scenario, Scenario):
        scenario = load_scenario(scenario)
    profile = cluster if not isinstance(cluster, (str, type(None))) else cluster_profile(
        cluster if cluster is not None else scenario.compute.cluster)
    local_workers = workers if workers is not None else scenario.compute.workers
    _refuse_infeasible(scenario, output, shard, resume)
    on_this_machine = (local_workers != 0 and profile is None
                       and (address or scenario.compute.address) is None)
    # the local cluster starts while the rest of the pipeline is imported
    dashboard = dashboard_at(dashboard)
    started = LocalStart(local_workers, processes, dashboard) if on_this_machine else None
    try:
        return _run(scenario, started, output=output, chunk=chunk, workers=workers,
                    address=address, resume=resume, force=force, progress=progress,
                    backend=backend, history=history, profile=profile, shard=shard,
                    processes=processes, dashboard=dashboard)
    finally:
        if started is not None:
            started.close()


def _refuse_infeasible(scenario: Scenario, output: str | os.PathLike[str] | None,
                       shard: Shard | str | None, resume: bool) -> None:
    """Refuse, before anything starts, a run that cannot finish or be written
    (:func:`ensemble.run.feasibility.refuse_infeasible`: exit status 2 with the
    figures)."""
    from ensemble.run.feasibility import estimate, refuse_infeasible
    from ensemble.run.shards import Shard, default_part_path as part_path

    part = Shard.parse(shard) if isinstance(shard, str) else shard
    if part is not None and output is None:
        output = part_path(scenario, part)
    target = Path(output if output is not None else scenario.output.path)
    refuse_infeasible(scenario, estimate(scenario, _members_computed(scenario, part)),
                      target, resume)


def _members_computed(scenario: Scenario, part: Shard | None) -> int | None:
    """Members per variant a run computes: a shard's, or None for all of them."""
    if part is None:
        return None
    start, end = part.member_range(scenario.member_count)
    return end - start


def _run(scenario: Scenario, started, *, output, chunk, workers, address, resume, force,
         progress, backend, history, profile, shard, processes, dashboard) -> Path:
    """:func:`run` once the scenario is loaded and any local cluster is starting."""
    import dataclasses

    from ensemble.run.execute import fewer_collections, run_scenario
    from ensemble.run.feasibility import advice, estimate, machine_cores
    from ensemble.run.progress import Progress
    from ensemble.run.tasks import DEFAULT_BACKEND
    from ensemble.run.plan import fingerprint
    from ensemble.run.shards import Shard, engine_options, part_is_complete

    backend = backend or DEFAULT_BACKEND
    part = Shard.parse(shard) if isinstance(shard, str) else shard
    if part is not None and output is None:
        output = default_part_path(scenario, part)
    if output is not None:
        scenario = dataclasses.replace(
            scenario, output=dataclasses.replace(scenario.output, path=os.fspath(output)))
    if history is None:
        history = history_line(f"ensemble.api.run({scenario.source.path!r})")
    if part is not None and resume and not force and part_is_complete(
            output, fingerprint(scenario, backend), part):
        return Path(output)
    reporter = Progress(bar=progress)
    local = profile is None and (address or scenario.compute.address) is None
    figures = estimate(scenario, _members_computed(scenario, part))
    for note in advice(scenario, figures, machine_cores(), local):
        reporter.note(note)
    with fewer_collections():
        return run_scenario(scenario, history=history, backend=backend,
                            chunk=chunk, workers=workers, address=address, cluster=profile,
                            resume=resume, force=force, progress=reporter,
                            started=started, processes=processes, dashboard=dashboard,
                            **(engine_options(scenario, part, backend) if part else {}))


def step_check_report(path: str | os.PathLike[str]) -> list[str]:
    """The step check in plain words for each variant of a result (or part) file with
    flagged members: the share flagged per reason, the worst ``step_error`` and a step
    that would pass (:mod:`ensemble.present.step_check`); no lines when no member is
    flagged."""
    import xarray as xr

    from ensemble.present.step_check import advice

    lines = []
    with xr.open_dataset(path, decode_times=False) as dataset:
        names = dataset["variant_name"].values if "variant_name" in dataset else \
            range(dataset.sizes["variant"])
        for index, name in enumerate(names):
            status = dataset["status"].isel(variant=index).values
            errors = dataset["step_error"].isel(variant=index).values \
                if "step_error" in dataset else status * float("nan")
            found = advice(status, errors, str(dataset.attrs.get("solver_method", "")),
                           float(dataset.attrs.get("solver_step", float("nan"))))
            lines.extend(f"variant {name}: {line}" for line in found)
    return lines


def status_counts(path: str | os.PathLike[str]) -> dict[str, int]:
    """Members of a result file behind each status bit, over every variant.

    Returns
    -------
    flag word (as in the file's ``flag_meanings``) -> number of members with that bit.
    """
    import xarray as xr

    from ensemble.present.summary import status_counts as count_bits

    with xr.open_dataset(path, decode_times=False) as dataset:
        return count_bits(dataset["status"].values)


def open_result(path: str | os.PathLike[str]) -> xr.Dataset:
    """Open a complete result file, with its labels as indexes.

    ``ds.sel(compartment="I", variant="distancing")`` then works; times are dates when
    the scenario has a ``start`` (float days otherwise), and differences of times
    (``difference_quantile_peak_time``) stay float days.

    Raises
    ------
    ensemble.errors.NotAResult : ``path`` is missing, not netCDF, work in progress or a
        part file.
    """
    import xarray as xr

    from ensemble.output.dataset import with_label_indexes
    from ensemble.output.result_file import result_fingerprint

    result_fingerprint(path)
    return with_label_indexes(xr.open_dataset(path, decode_timedelta=False))


def simulate(scenario: Scenario | str | os.PathLike[str], *,
             variants: Sequence[str] | None = None, backend: str | None = None
             ) -> xr.Dataset:
    """Run every member of a scenario in this process and return the result dataset.

    Nothing is written and dask is not used: meant for notebooks and ensembles that fit
    in memory.  The members are computed as the run engine computes a chunk and the
    dataset is made by the code that makes the result file, so it is the dataset
    :func:`open_result` returns for the file :func:`run` writes for the same scenario
    (same variables, numbers and attributes, apart from ``history``).

    Parameters
    ----------
    scenario : a validated scenario or the path of a scenario file.
    variants : names of the variants to run (default all); ``output.compare_to`` is
        dropped when its variant is not among them.
    backend : ``"numpy"`` or ``"compiled"`` integration (default, as for :func:`run`,
        :data:`ensemble.run.tasks.DEFAULT_BACKEND`).

    Raises
    ------
    ValueError : an unknown variant name.
    """
    from ensemble.output.dataset import decode
    from ensemble.output.finish import Finisher
    from ensemble.output.sources import MembersInMemory
    from ensemble.output.writer import result_dataset
    from ensemble.run.tasks import DEFAULT_BACKEND, compute_chunk
    from ensemble.run.layout import lowered_models, result_layout
    from ensemble.run.plan import fingerprint

    if not isinstance(scenario, Scenario):
        scenario = load_scenario(scenario)
    if variants is not None:
        scenario = _with_variants(scenario, variants)
    backend = backend or DEFAULT_BACKEND
    models = lowered_models(scenario)
    layout = result_layout(scenario, models, fingerprint(scenario, backend),
                           history="ensemble.api.simulate (in memory)")
    chunks = []
    for index, model in enumerate(models):
        output = compute_chunk(scenario, model, (index, 0, scenario.member_count), backend)
        chunks.append((output.key, output.result, output.reported))
    return decode(result_dataset(Finisher(layout, MembersInMemory(layout, chunks))))


def score(result: str | os.PathLike[str], observed: str | os.PathLike[str], *,
          measure: str | None = None, flow: str | None = None,
          after: str | None = None) -> str:
    """The text of ``ensemble score``: the quantiles of a flow measure (or of a flow's
    counts) in a complete result file scored against the counts of ``observed`` (a CSV
    file date,value), per variant and horizon (days after the ISO date ``after``,
    by default the last day a fit saw, else the start), by the weighted interval score and the coverage of the central intervals.

    Raises
    ------
    ensemble.errors.NotAResult : ``result`` is not a complete result file.
    ensemble.errors.UsageError : a bad counts file (naming its line), an unknown measure
        or flow, or a date that ends no window of the series.
    """
    import xarray as xr

    from ensemble.fit.counts_file import read_counts
    from ensemble.fit.score_result import format_scores, score_result
    from ensemble.output.result_file import result_fingerprint

    result_fingerprint(result)
    counts = read_counts(observed)
    with xr.open_dataset(result, decode_times=False) as dataset:
        table = score_result(dataset.load(), counts, str(result), measure=measure,
                             flow=flow, after=after)
    return format_scores(table)


def fit(scenario: Scenario | str | os.PathLike[str], *,
        output: str | os.PathLike[str] | None = None, particles: int = 2000,
        seed: int | None = None, backend: str | None = None, chunk: int | None = None,
        force: bool = False, resume: bool = False, workers: int | None = None,
        address: str | None = None, cluster: ClusterProfile | str | None = None,
        processes: bool = False, dashboard: bool | str = False,
        report=None, note=None) -> Path:
    """Condition the scenario's ensemble on its ``[[observations]]`` by tempered
    sequential Monte Carlo and write a result file whose members are the posterior
    (equally weighted, with their log-likelihoods), projected for every variant.

    Each round's likelihood and the projection are computed where :func:`run` computes
    its chunks (``workers``, ``address``, ``cluster``, ``processes`` and ``dashboard`` as
    for :func:`run`); the file is the same, bit for bit, wherever they are computed.

    Parameters
    ----------
    scenario : a validated scenario or the path of a scenario file.
    output : the result file (default ``output.path`` with ``-fit`` before ``.nc``).
    particles : particles of the sampler, the members of the result.
    seed : the sampler's seed (default the scenario's); the same seed gives the same bits.
    backend : ``"numpy"`` or ``"compiled"`` (default as for :func:`run`).
    chunk : members integrated at once, one task each (default ``compute.chunk``, else
        1000).
    force : replace an existing result file.
    resume : go on from the state an interrupted fit kept after its last round (in
        ``<output>.fit-partial``); the file is the same, bit for bit.
    workers : workers on this machine (default: the file's, else one per core): threads
        of this process, or worker processes with ``processes``; ``0`` computes
        everything in this process, without dask.distributed.
    address : a running dask scheduler to use instead of a local cluster.
    cluster : a cluster profile (name or path; default the file's ``[compute] cluster``)
        whose batch-system worker jobs do the work; ``"local"`` is this machine.
    processes : local workers in processes of their own instead of threads.
    dashboard : serve dask's dashboard from the scheduler the fit starts (``True`` on
        the loopback address, or at ``"HOST:PORT"``); its address goes to ``note``.
    report : called after each round with its number and its
        :class:`ensemble.fit.smc.Round` (temperature, effective size, acceptance).
    note : called with a line of information (the dashboard's address).

    Raises
    ------
    ensemble.errors.ScenarioError : bad observations (naming the key or the counts
        file's line), none, or no drawn parameter.
    ensemble.errors.ProfileError : no such cluster profile, or an invalid one.
    ensemble.errors.ResultExists : the output exists and ``force`` is not set.
    ensemble.errors.RunFailed : a chunk failed (exit 1).
    """
    from ensemble.errors import ResultExists
    from ensemble.fit.result import fit_and_write
    from ensemble.fit.smc import SamplerSettings
    from ensemble.run.executors import Workers
    from ensemble.run.listening import dashboard_at
    from ensemble.run.local import LocalStart
    from ensemble.run.tasks import DEFAULT_BACKEND

    if not isinstance(scenario, Scenario):
        scenario = load_scenario(scenario)
    profile = cluster if not isinstance(cluster, (str, type(None))) else cluster_profile(
        cluster if cluster is not None else scenario.compute.cluster)
    dashboard = dashboard_at(dashboard)
    default = Path(scenario.output.path)
    target = Path(output) if output is not None else default.with_name(
        f"{default.stem}-fit{default.suffix}")
    if target.exists() and not force:
        raise ResultExists(str(target), "", None, "already exists", "use --force to replace it")
    target.parent.mkdir(parents=True, exist_ok=True)
    settings = SamplerSettings(particles=particles,
                               seed=scenario.seed if seed is None else seed)
    local_workers = workers if workers is not None else scenario.compute.workers
    address = address if address is not None else scenario.compute.address
    started = (LocalStart(local_workers, processes, dashboard)
               if local_workers != 0 and profile is None and address is None else None)
    try:
        fit_and_write(scenario, target, settings, backend=backend or DEFAULT_BACKEND,
                      chunk=chunk or scenario.compute.chunk or 1000, resume=resume,
                      where=Workers(local_workers, address, profile, started, processes,
                                    dashboard), report=report, note=note)
    finally:
        if started is not None:
            started.close()
    return target


def fit_summary(scenario: Scenario, result: str | os.PathLike[str]) -> str:
    """The prior and posterior 5%, 50% and 95% quantiles of every drawn parameter of
    ``scenario`` (first variant), the posterior from the members of the fitted
    ``result``: the table ``ensemble fit`` prints last."""
    from ensemble.fit.parameters_text import prior_and_posterior

    with open_result(result) as dataset:
        return prior_and_posterior(scenario, dataset.load())


def _with_variants(scenario: Scenario, names: Sequence[str]) -> Scenario:
    """``scenario`` with only the variants ``names``, in that order (``compare_to``
    dropped when its variant is not among them).

    Raises
    ------
    ValueError : an unknown variant name.
    """
    import dataclasses

    from ensemble.errors import did_you_mean

    known = {variant.name: variant for variant in scenario.variants}
    for name in names:
        if name not in known:
            hint = did_you_mean(name, known)
            raise ValueError(f"no variant {name!r} in {scenario.source.path}"
                             + (f"; {hint}" if hint else ""))
    compare_to = scenario.output.compare_to
    return dataclasses.replace(
        scenario, variants=tuple(known[name] for name in names),
        output=dataclasses.replace(
            scenario.output, compare_to=compare_to if compare_to in names else None))


def plot(path: str | os.PathLike[str], directory: str | os.PathLike[str] | None = None,
         measures: Sequence[str] = (), bands: Sequence[int] = (50, 90),
         observed: str | os.PathLike[str] | None = None) -> list[Path]:
    """Draw the fan chart (median and central bands over time, a panel per variant) and
    the distribution of the peak and total of each measure of a result file as PNG and
    SVG files in ``directory`` (default: beside the result); the files written.  The
    counts a fit saw are drawn on their measure's chart, and so are the counts of
    ``observed`` (a CSV file date,value), on the one measure chosen in ``measures`` or
    else the one a fit saw.

    Raises
    ------
    ensemble.errors.NotAResult : ``path`` is not a complete result file.
    ensemble.errors.UsageError : no measures, an unknown measure, a band whose
        quantiles the result does not hold, or a bad counts file (naming its line).
    """
    from ensemble.present.plot import LaterCounts, plot_measures

    later = None
    if observed is not None:
        from ensemble.fit.counts_file import read_counts

        counts = read_counts(observed)
        later = LaterCounts(counts.file, counts.dates, counts.values, counts.lines)
    target = Path(directory) if directory is not None else Path(path).parent
    with open_result(path) as dataset:
        return plot_measures(dataset, target, measures, bands, later)


def export(path: str | os.PathLike[str], directory: str | os.PathLike[str] | None = None,
           file_format: str = "csv") -> list[Path]:
    """Write tidy tables of the measures of a result file (bands, metrics, differences)
    into ``directory`` (default: beside the result), the caution as each file's leading
    ``#`` line; the files written.

    Raises
    ------
    ensemble.errors.NotAResult : ``path`` is not a complete result file.
    ensemble.errors.UsageError : a format other than ``csv``, or no measures.
    """
    from ensemble.errors import UsageError
    from ensemble.present.export import export_tables

    if file_format != "csv":
        raise UsageError("--format", "", file_format, "the only table format is csv")
    target = Path(directory) if directory is not None else Path(path).parent
    with open_result(path) as dataset:
        return export_tables(dataset, target, Path(path).stem)


def summarize(path: str | os.PathLike[str], only: Sequence[str] = (),
              show_all: bool = False) -> str:
    """A readable summary of a complete result file: the members behind the quantiles
    of each variant and the step check in plain words; quantiles of R0, of each
    measure's peak, peak time, total and days above its threshold (with units and the
    share of censored peaks), of the compartments' and flows' own metrics when the file
    has no measures (or with ``show_all``), and of the stored differences; rows without
    information left out.  ``only`` keeps the rows of those measures, compartments and
    flows.

    Raises
    ------
    ensemble.errors.NotAResult : ``path`` is not a complete result file, or one damaged
        or edited so that it cannot be read as one.
    """
    from ensemble.errors import NotAResult
    from ensemble.fit.parameters_text import stored_prior_and_posterior
    from ensemble.present.summary import summary_text

    try:
        with open_result(path) as dataset:
            fitted = "" if only else stored_prior_and_posterior(dataset)
            return summary_text(dataset, only=only, show_all=show_all, fitted=fitted)
    except (KeyError, ValueError, TypeError, IndexError, RuntimeError, OSError) as error:
        # the netCDF library's RuntimeError, or a variable missing or reshaped
        reason = (str(error).splitlines() or [""])[0][:200]
        raise NotAResult(os.fspath(path), "", None, "is damaged or was edited: it cannot "
                         f"be read as a result ({type(error).__name__}: {reason})") from None


def cluster_profile(name: str | os.PathLike[str] | None) -> ClusterProfile | None:
    """The cluster profile ``name`` (a path, or ``NAME.toml`` in ``./configs/`` then
    ``$XDG_CONFIG_HOME/ensemble/clusters/``), validated; None for no name or ``"local"``.

    Raises
    ------
    ensemble.errors.ProfileError : no such profile, or an invalid one (file, key
        and value named; the command line exits with 2).
    """
    from ensemble.run.clusters import resolve_profile

    return resolve_profile(None if name is None else os.fspath(name))


def worker_script(cluster: ClusterProfile | str) -> str:
    """The job script of one dask worker job of a batch-system profile, as :func:`run`
    with ``cluster`` submits it, with a placeholder for the scheduler's address; nothing
    is submitted or started.

    Raises
    ------
    ensemble.errors.InputError : invalid profile, or ``local`` (the command line exits
        with 2).
    """
    from ensemble.errors import UsageError
    from ensemble.run.worker_jobs import worker_script as script

    profile = cluster if not isinstance(cluster, str) else cluster_profile(cluster)
    if profile is None:
        raise UsageError("--cluster", "", "local",
                         "worker jobs need a batch-system profile (slurm or pbs)")
    return script(profile)


def default_part_path(scenario: Scenario, shard: Shard | str) -> Path:
    """Where ``run(..., shard=shard)`` writes its part when no output is given:
    ``<result stem>.shard-I-of-N.nc`` beside the result."""
    from ensemble.run.shards import Shard, default_part_path as part_path

    return part_path(scenario, Shard.parse(shard) if isinstance(shard, str) else shard)


def merge(parts: Sequence[str | os.PathLike[str]], output: str | os.PathLike[str], *,
          force: bool = False, history: str | None = None) -> Path:
    """Join the part files of a sharded run into its result file.

    The result is identical in every number to the file a single run of the same scenario
    writes (see :mod:`ensemble.run.shards`).

    Parameters
    ----------
    parts : the part file of every shard, in any order.
    output : the result file.
    force : replace an existing result.
    history : the line this merge adds to the result's ``history`` (default: this call).

    Raises
    ------
    ensemble.errors.PartError : not part files, parts of different runs (different
        fingerprints), a shard given twice, or missing shards (named); nothing is written.
    ensemble.errors.ResultExists : ``output`` exists and ``force`` is false.
    """
    from ensemble.run.shards import merge_parts

    if history is None:
        history = history_line(f"ensemble.api.merge({len(parts)} parts, {os.fspath(output)!r})")
    return merge_parts(parts, output, force=force, history=history)


def array_script(scenario: Scenario | str | os.PathLike[str], cluster: ClusterProfile | str,
                 shards: int, *, output: str | os.PathLike[str] | None = None,
                 run_options: Sequence[str] = ()) -> str:
    """A bash driver script that submits a sharded run as a job array plus a merge job.

    Parameters
    ----------
    scenario : a validated scenario, or the path of a scenario file.
    cluster : a batch-system cluster profile (not ``"local"``).
    shards : number of array tasks, 1 .. members.
    output : the result file (default the scenario's ``output.path``); made absolute.
    run_options : options carried into every shard's ``ensemble run`` (``--members``,
        ``--seed``, ``--chunk``, ``--backend``, as on the command line).

    Raises
    ------
    ensemble.errors.InputError : invalid scenario or profile, ``local``, or a
        shard count outside 1 .. members (the command line exits with 2).
    """
    import dataclasses

    from ensemble.run.job_array import array_script as driver
    from ensemble.errors import UsageError

    if not isinstance(scenario, Scenario):
        scenario = load_scenario(scenario)
    profile = cluster if not isinstance(cluster, str) else cluster_profile(cluster)
    if profile is None:
        raise UsageError("--cluster", "", "local",
                            "a job array needs a batch-system profile (slurm or pbs)")
    if not 1 <= shards <= scenario.member_count:
        raise UsageError("--shards", "", shards,
                            f"expected 1 .. {scenario.member_count} (the members per variant)")
    if output is not None:
        scenario = dataclasses.replace(
            scenario, output=dataclasses.replace(scenario.output, path=os.fspath(output)))
    return driver(scenario, profile, shards, run_options=run_options, cwd=Path.cwd())
