"""The ``ensemble`` command line: a thin layer over :mod:`ensemble.api`.

Exit status: 0 success, 1 failure during a run, 2 invalid scenario or usage, 130
interrupted; every error is an :class:`ensemble.errors.EnsembleError` whose
``exit_status`` the command exits with (:func:`_reported`, the one place that maps them).
"""

from __future__ import annotations

import atexit
import logging
import os
import sys
from collections.abc import Iterator
from contextlib import contextmanager
from enum import Enum
from pathlib import Path
from typing import Annotated, Optional

import psutil
import typer

from ensemble.about import CAUTION

app = typer.Typer(add_completion=False, no_args_is_help=True,
                  help="Run sampled ensembles of epidemic compartment models.")


class Backend(str, Enum):
    """Integration backends of ``ensemble run --backend``."""

    numpy = "numpy"
    compiled = "compiled"


def _interrupt(signum: int, frame: object) -> None:
    """Ctrl-C or SIGTERM: stop, keep finished work, exit 130.

    The interrupt may land inside a call that dask's event loop thread is serving, whose
    clean-up callbacks can then fail and log tracebacks (distributed 2026.8: ``sync``'s
    ``cancel`` reads a name not yet bound); the run is being abandoned, so those logs are
    silenced and the one-line message stays the only output.  Integrations running in
    other threads of this process (dask worker threads) are asked to stop too
    (:mod:`ensemble.integrate.interrupts`), and the main thread's compiled kernels return
    between blocks, so the run ends within seconds in every mode."""
    from ensemble.integrate.interrupts import request_stop

    request_stop()
    logging.getLogger("tornado.application").setLevel(logging.CRITICAL)
    raise KeyboardInterrupt


def _shard_option(text: Optional[str]):
    """``--shard I/N`` read into a :class:`~ensemble.run.shards.Shard` (usage error: exit 2)."""
    from ensemble.run.shards import Shard

    if text is None:
        return None
    try:
        return Shard.parse(text)
    except ValueError as error:
        raise typer.BadParameter(str(error)) from None


ScenarioFile = Annotated[Path, typer.Argument(help="Scenario file (TOML).")]
OutputFile = Annotated[Optional[Path], typer.Option(
    "--output", "-o", help="Result file (default: the file's output.path).")]
MemberCount = Annotated[Optional[int], typer.Option(
    "--members", min=1, help="Members per variant, instead of the file's.")]
Seed = Annotated[Optional[int], typer.Option(
    "--seed", min=0, help="Seed, instead of the file's.")]
Settings = Annotated[Optional[list[str]], typer.Option(
    "--set", metavar="KEY=VALUE",
    help="Set a key of the scenario file, as editing the file would (repeatable), e.g. "
         "--set scenario.days=240 --set parameters.R0.high=3.5.")]
ChunkSize = Annotated[Optional[int], typer.Option(
    "--chunk", min=1, help="Members per task (changes no number of the result).")]
BackendChoice = Annotated[Optional[Backend], typer.Option(
    "--backend", help="Integration backend (changes numbers at round-off level).")]
Force = Annotated[bool, typer.Option("--force", help="Replace an existing result file.")]
WorkerCount = Annotated[Optional[int], typer.Option(
    "--workers", min=0,
    help="Workers on this machine (default one per core): threads of this process, "
         "or processes with --processes; 0: no dask, everything in this process.")]
InProcesses = Annotated[bool, typer.Option(
    "--processes",
    help="Local workers in processes of their own (a worker that dies loses only its "
         "task) instead of threads.")]
Dashboard = Annotated[bool, typer.Option(
    "--dashboard",
    help="Serve dask's dashboard on this machine's loopback address (a free port) and "
         "print its address; without it nothing is served.")]
DashboardAddress = Annotated[Optional[str], typer.Option(
    "--dashboard-address", metavar="HOST:PORT",
    help="Serve the dashboard at HOST:PORT instead (implies --dashboard), e.g. "
         "127.0.0.1:8787, or :8787 for every interface.")]
SchedulerAddress = Annotated[Optional[str], typer.Option(
    "--address", help="A running dask scheduler to use, e.g. tcp://host:8786.")]
ClusterName = Annotated[Optional[str], typer.Option(
    "--cluster",
    help="Cluster profile (NAME in ./configs or ~/.config/ensemble/clusters, or a path) "
         "whose batch jobs run the workers; 'local' is this machine.")]


@app.command()
def run(
    scenario: ScenarioFile,
    output: OutputFile = None,
    member_count: MemberCount = None,
    seed: Seed = None,
    settings: Settings = None,
    chunk: ChunkSize = None,
    workers: WorkerCount = None,
    processes: InProcesses = False,
    dashboard: Dashboard = False,
    dashboard_address: DashboardAddress = None,
    address: SchedulerAddress = None,
    resume: Annotated[bool, typer.Option(
        "--resume", help="Continue an interrupted run from <output>.partial.")] = False,
    force: Annotated[bool, typer.Option(
        "--force", help="Replace an existing result file, and discard the saved chunks of "
                        "an unfinished run in <output>.partial (kept otherwise).")] = False,
    backend: BackendChoice = None,
    cluster: ClusterName = None,
    shard: Annotated[Optional[str], typer.Option(
        "--shard", metavar="I/N", callback=_shard_option,
        help="Run only shard I of N (0-based) into a part file for `ensemble merge`.")
    ] = None,
    strict: Annotated[bool, typer.Option(
        "--strict", help="Exit with status 1 when any member is flagged (the file is "
                         "still written), for pipelines that must stop.")] = False,
) -> None:
    """Run every variant of SCENARIO and write the result file."""
    import time

    from ensemble import api
    from ensemble.run.journal import partial_path

    began = time.monotonic()
    _stop_on_signals()
    loaded, profile = _loaded_for_run(scenario, member_count, seed, settings or [],
                                      cluster, address)
    if shard is not None and output is None:
        output = api.default_part_path(loaded, shard)
    for warning in api.scenario_warnings(loaded):
        typer.echo(f"warning: {warning}", err=True)
    with _reported(work=partial_path(output or loaded.output.path)):
        path = api.run(loaded, output=output, chunk=chunk, workers=workers,
                       address=address, resume=resume, force=force,
                       backend=backend.value if backend else None,
                       history=_history(), cluster=profile or "local", shard=shard,
                       processes=processes, dashboard=dashboard_address or dashboard)
    flagged = _report_run(path, loaded, time.monotonic() - began)
    if strict and flagged:
        typer.echo("error: members are flagged and --strict was given", err=True)
        raise typer.Exit(1)


def _stop_on_signals() -> None:
    """Ctrl-C and SIGTERM interrupt the run (:func:`_interrupt`); dask's own logging is
    kept to errors."""
    import signal

    import ensemble.integrate.interrupts  # noqa: F401  (imported before any signal)

    logging.getLogger("distributed").setLevel(logging.ERROR)
    # a failed chunk is reported once, in the run's one-line error (RunFailed)
    logging.getLogger("distributed.worker").setLevel(logging.CRITICAL)
    signal.signal(signal.SIGTERM, _interrupt)
    signal.signal(signal.SIGINT, _interrupt)


def _history() -> str:
    """The ``history`` line of what this command makes: the time and the command."""
    import shlex

    from ensemble import api

    return api.history_line(shlex.join(["ensemble", *sys.argv[1:]]))


def _loaded_for_run(scenario: Path, member_count: int | None, seed: int | None,
                    settings: list[str], cluster: str | None, address: str | None):
    """The scenario (with the overrides) and the cluster profile of ``ensemble run``
    (exit 2 when either is invalid, or when both a profile and an address are given)."""
    from ensemble import api
    from ensemble.errors import UsageError

    with _reported():
        loaded = api.load_scenario(scenario, member_count=member_count, seed=seed,
                                   settings=settings)
        profile = api.cluster_profile(cluster if cluster is not None
                                      else loaded.compute.cluster)
        if profile is not None and address is not None:
            raise UsageError("--cluster", "", None, "--cluster and --address both name "
                             "where the workers are", "give one")
    return loaded, profile


def _report_run(path: Path, loaded, seconds: float) -> bool:
    """What a finished run prints: the result, its size and time, the members behind
    each status bit, the step check in plain words when members are flagged, and the
    caution; whether any member is flagged."""
    from ensemble import api

    counts = api.status_counts(path)
    typer.echo(f"result: {path}")
    typer.echo(f"{loaded.member_count} members x {len(loaded.variants)} variants "
               f"in {seconds:.1f} s")
    flagged = ", ".join(f"{word} {count}" for word, count in counts.items())
    typer.echo(f"flagged members: {flagged}")
    for line in api.step_check_report(path):
        typer.echo(line)
    typer.echo(CAUTION)
    return any(counts.values())


INTERRUPTED = 130
"""Exit status of an interrupted command (128 + SIGINT, as shells report it)."""


@contextmanager
def _reported(work: Path | None = None) -> Iterator[None]:
    """Turn the errors of the body into ``error: ...`` lines on standard error and the
    error's exit status (:mod:`ensemble.errors`: 2 for invalid input, nothing written; 1
    for a failed run).  An interrupt exits 130; an operating-system error the run did not
    expect exits 1.  A failed or interrupted run says how many finished chunks its work in
    progress ``work`` keeps for ``--resume``, when it keeps any (:func:`_kept`); an
    interrupt after the result was written says that the result is complete."""
    from ensemble.errors import EnsembleError, InterruptedAfterWriting

    try:
        yield
    except EnsembleError as error:
        lines = str(error).splitlines()
        if error.exit_status == 1:
            lines[-1] += _kept(work)
        typer.echo("\n".join(f"error: {line}" for line in lines), err=True)
        raise typer.Exit(error.exit_status) from None
    except InterruptedAfterWriting as interrupt:
        typer.echo(str(interrupt), err=True)
        raise typer.Exit(INTERRUPTED) from None
    except KeyboardInterrupt:
        typer.echo(f"interrupted{_kept(work)}", err=True)
        raise typer.Exit(INTERRUPTED) from None
    except OSError as error:
        typer.echo(f"error: {error}{_kept(work)}", err=True)
        raise typer.Exit(1) from None


def _kept(work: Path | None) -> str:
    """`` (N finished chunks are kept in WORK; continue with --resume)`` when the work in
    progress ``work`` holds saved chunks, else nothing: a run stopped before its first
    chunk was saved promises nothing to resume."""
    from ensemble.run.chunk_files import CHUNK_PREFIX

    if work is None or not work.is_dir():
        return ""
    count = sum(1 for _ in work.glob(f"{CHUNK_PREFIX}v*"))
    if not count:
        return ""
    kept = f"{count} finished chunks are" if count > 1 else "1 finished chunk is"
    return f" ({kept} kept in {work}; continue with --resume)"


@app.command()
def check(scenario: ScenarioFile, settings: Settings = None) -> None:
    """Validate SCENARIO and print its model, parameters, variants, solver, its R0 and
    warnings."""
    from ensemble import api

    with _reported():
        loaded = api.load_scenario(scenario, settings=settings or [])
        report = api.check_report(loaded)
    typer.echo(report, nl=False)


@app.command()
def summary(result: Annotated[Path, typer.Argument(
        help="Result file written by ensemble run.")],
        only: Annotated[Optional[list[str]], typer.Option(
            "--only", help="Only the rows of these measures, compartments or flows "
                           "(repeatable, or NAME,NAME).")] = None,
        show_all: Annotated[bool, typer.Option(
            "--all", help="Also every compartment's and flow's own rows.")] = False,
) -> None:
    """Print the measures' quantiles over members (peaks with the share of censored
    ones, totals, days above a threshold), R0, the stored differences between variants
    and the members behind each status bit, leaving out rows without information."""
    from ensemble import api

    with _reported():
        text = api.summarize(result, show_all=show_all, only=[
            name for item in only or [] for name in item.split(",") if name])
    typer.echo(text, nl=False)


@app.command()
def fit(
    scenario: ScenarioFile,
    output: Annotated[Optional[Path], typer.Option(
        "--output", "-o",
        help="Result file (default: output.path with -fit before .nc).")] = None,
    particles: Annotated[int, typer.Option(
        "--particles", min=10, help="Particles of the sampler: the members of the result.")
    ] = 2000,
    seed: Seed = None,
    settings: Settings = None,
    chunk: ChunkSize = None,
    backend: BackendChoice = None,
    force: Force = False,
    resume: Annotated[bool, typer.Option(
        "--resume", help="Go on from the last round an interrupted fit kept.")] = False,
    workers: WorkerCount = None,
    processes: InProcesses = False,
    dashboard: Dashboard = False,
    dashboard_address: DashboardAddress = None,
    address: SchedulerAddress = None,
    cluster: ClusterName = None,
) -> None:
    """Fit SCENARIO's drawn parameters to its [[observations]] by tempered sequential
    Monte Carlo and write the posterior members, projected for every variant; each
    round's chunks and the projection's are computed where `ensemble run` computes its
    own (--workers, --processes, --address, --cluster)."""
    from ensemble import api

    def report(number, done) -> None:
        typer.echo(f"round {number}: temperature {done.temperature:.4g}, effective size "
                   f"{done.effective_size:.0f} of {particles}, acceptance "
                   f"{100 * done.acceptance:.0f}%")

    _stop_on_signals()
    loaded, profile = _loaded_for_run(scenario, None, None, settings or [], cluster,
                                      address)
    with _reported():
        path = api.fit(loaded, output=output, particles=particles, seed=seed,
                       backend=backend.value if backend else None, chunk=chunk,
                       force=force, resume=resume, workers=workers, address=address,
                       cluster=profile or "local", processes=processes,
                       dashboard=dashboard_address or dashboard, report=report,
                       note=lambda line: typer.echo(f"ensemble: {line}", err=True))
    typer.echo(f"result: {path} ({particles} posterior members per variant)")
    typer.echo(api.fit_summary(loaded, path), nl=False)
    typer.echo(CAUTION)


@app.command()
def score(
    result: Annotated[Path, typer.Argument(help="Result file written by ensemble run.")],
    observed: Annotated[Path, typer.Argument(
        help="CSV file with the columns date,value: counts observed after the projection "
             "was made, each date the end of a window of the scored series.")],
    measure: Annotated[Optional[str], typer.Option(
        "--measure", help="The flow measure to score (needed when the file has several).")
    ] = None,
    flow: Annotated[Optional[str], typer.Option(
        "--flow", help="Score a flow's counts per report interval instead of a measure.")
    ] = None,
    after: Annotated[Optional[str], typer.Option(
        "--after", metavar="DATE",
        help="Count horizons in days from this ISO date (default: the last day a fit saw, "
             "else the projection's start).")
    ] = None,
) -> None:
    """Score RESULT's projections against OBSERVED counts, per variant and horizon: the
    weighted interval score and whether each count is inside the central intervals."""
    from ensemble import api

    with _reported():
        text = api.score(result, observed, measure=measure, flow=flow, after=after)
    typer.echo(text, nl=False)
    typer.echo(CAUTION)


@app.command()
def merge(
    parts: Annotated[list[Path], typer.Argument(help="The part file of every shard.")],
    output: Annotated[Path, typer.Option("--output", "-o", help="Result file to write.")],
    force: Force = False,
) -> None:
    """Join the part files of a sharded run (`run --shard I/N`) into the result file."""
    from ensemble import api

    with _reported():
        path = api.merge(parts, output, force=force, history=_history())
    typer.echo(f"result: {path} (from {len(parts)} parts)")


def _bands(text: str) -> list[int]:
    """``50,90`` -> [50, 90] (exit 2 for anything but whole percentages in 1..99)."""
    from ensemble.errors import UsageError

    with _reported():
        widths = []
        for item in text.split(","):
            if not item.strip().isdigit() or not 0 < int(item) < 100:
                raise UsageError("--bands", "", text, "must list whole percentages "
                                 "between 1 and 99, such as 50,90")
            widths.append(int(item))
    return widths


@app.command()
def plot(
    result: Annotated[Path, typer.Argument(help="Result file written by ensemble run.")],
    measure: Annotated[Optional[list[str]], typer.Option(
        "--measure", help="Only this measure (repeatable).")] = None,
    bands: Annotated[str, typer.Option(
        "--bands", help="Central bands to shade, in percent of members.")] = "50,90",
    output: Annotated[Optional[Path], typer.Option(
        "--output", "-o", help="Directory for the figures (default: beside RESULT).")
    ] = None,
    observed: Annotated[Optional[Path], typer.Option(
        "--observed", help="Counts (CSV date,value) to draw as points on the fan chart "
                           "of the single --measure, else of the measure a fit saw.")
    ] = None,
) -> None:
    """Draw each measure's fan chart (a panel per variant) and the distribution of its
    peak and total, as PNG and SVG; the counts a fit saw, and --observed ones, as
    points."""
    from ensemble import api

    widths = _bands(bands)
    with _reported():
        written = api.plot(result, output, measure or [], widths, observed)
    for path in written:
        typer.echo(f"wrote {path}")


@app.command()
def export(
    result: Annotated[Path, typer.Argument(help="Result file written by ensemble run.")],
    file_format: Annotated[str, typer.Option(
        "--format", help="Table format (csv).")] = "csv",
    output: Annotated[Optional[Path], typer.Option(
        "--output", "-o", help="Directory for the tables (default: beside RESULT).")
    ] = None,
) -> None:
    """Write tidy CSV tables of the measures: bands, metrics and differences."""
    from ensemble import api

    with _reported():
        written = api.export(result, output, file_format)
    for path in written:
        typer.echo(f"wrote {path}")


@app.command("array-script")
def array_script(
    scenario: ScenarioFile,
    cluster: Annotated[str, typer.Option("--cluster",
                                         help="Cluster profile (slurm or pbs).")],
    shards: Annotated[int, typer.Option("--shards", min=1, help="Number of array tasks.")],
    output: OutputFile = None,
    member_count: MemberCount = None,
    seed: Seed = None,
    settings: Settings = None,
    chunk: ChunkSize = None,
    backend: BackendChoice = None,
) -> None:
    """Print a bash script that submits SCENARIO as a job array of shards plus a merge job
    that runs only if every shard succeeded. Run it with bash on the login node."""
    from ensemble import api

    carried = {"--members": member_count, "--seed": seed, "--chunk": chunk,
               "--backend": backend.value if backend else None}
    run_options = [str(item) for option, value in carried.items() if value is not None
                   for item in (option, value)]
    run_options += [item for setting in settings or [] for item in ("--set", setting)]
    with _reported():
        loaded = api.load_scenario(scenario, member_count=member_count, seed=seed,
                                   settings=settings or [])
        text = api.array_script(loaded, cluster, shards, output=output,
                                run_options=run_options)
    typer.echo(text, nl=False)


@app.command("worker-script")
def worker_script(
    cluster: Annotated[str, typer.Option("--cluster",
                                         help="Cluster profile (slurm or pbs).")],
) -> None:
    """Print the job script of one dask worker job as `run --cluster NAME` submits it
    (the scheduler's address a placeholder), without submitting anything."""
    from ensemble import api

    with _reported():
        text = api.worker_script(cluster)
    typer.echo(text, nl=False)


def main() -> None:
    """Console-script entry point.

    When a command has ended and left no child process behind, the process ends at once
    after its exit handlers ran (they flush and remove temporary files): tearing down the
    modules of numba, dask and xarray one by one has nothing left to do and takes about a
    second (measured after a 200,000-member run).
    """
    try:
        app()
    except SystemExit as ended:
        code = ended.code
        if not (code is None or isinstance(code, int)) or psutil.Process().children():
            raise
    atexit._run_exitfuncs()     # the handlers a normal exit runs (no public name)
    sys.stdout.flush()
    sys.stderr.flush()
    os._exit(code or 0)
