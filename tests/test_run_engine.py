"""The run engine's handling of a chunk that fails (a failure during a run is reported in
one line, and the chunks finished before it are kept for --resume)."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

import ensemble.run.execute as execute
import ensemble.run.executors as executors
import ensemble.run.journal as journal_module
import ensemble.run.tasks as tasks
from ensemble import api
from ensemble.model.lower import lower_model
from ensemble.run.journal import WorkJournal
from ensemble.errors import RunFailed
from ensemble.run.executors import open_client
from ensemble.run.progress import Progress
from ensemble.scenario.load import load_scenario
from support import assert_same_numbers, layout_of, write_scenario


def test_failed_chunk_stops_the_run_and_keeps_finished_chunks(tmp_path: Path,
                                                              monkeypatch) -> None:
    """A chunk fails in the middle of the first variant: the run stops naming it, the two
    chunks before it stay saved, and a resume with another chunk size computes every other
    member exactly once and gives the bits of an uninterrupted run."""
    monkeypatch.chdir(tmp_path)     # the result goes to result.nc, as the file says
    scenario = write_scenario(tmp_path)
    real_make_design = tasks.make_design

    def failing_make_design(scenario, variant, model, members):
        if 25 in members:
            raise FloatingPointError("an illustrative failure")
        return real_make_design(scenario, variant, model, members)

    monkeypatch.setattr(tasks, "make_design", failing_make_design)
    with pytest.raises(RunFailed) as failure:
        api.run(scenario, workers=0, chunk=10, progress=False)
    message = str(failure.value)
    assert "members 20..29 of variant 'no-change'" in message
    assert "FloatingPointError: an illustrative failure" in message
    work = tmp_path / "result.nc.partial"
    assert len(list(work.glob("chunk-*"))) == 2     # members 0..9 and 10..19
    assert not (tmp_path / "result.nc").exists()

    computed: list[tuple[str, int]] = []

    def counting_make_design(scenario, variant, model, members):
        computed.extend((variant.name, int(member)) for member in members)
        return real_make_design(scenario, variant, model, members)

    monkeypatch.setattr(tasks, "make_design", counting_make_design)
    resumed = api.run(scenario, workers=0, chunk=7, resume=True, progress=False)
    everything = {(name, member) for name in ("no-change", "distancing")
                  for member in range(40)}
    kept = {("no-change", member) for member in range(20)}
    assert sorted(computed) == sorted(everything - kept), "resume redid saved members"

    monkeypatch.setattr(tasks, "make_design", real_make_design)
    reference = api.run(scenario, output=tmp_path / "reference.nc", workers=0,
                        progress=False)
    assert_same_numbers(resumed, reference)


def test_a_task_error_on_a_worker_becomes_run_failed(tmp_path: Path) -> None:
    """A chunk that raises inside a dask worker (here: members past the end, refused by the
    sampler) stops the run with a message naming the chunk."""
    scenario = load_scenario(write_scenario(tmp_path))
    models = [lower_model(scenario, variant) for variant in scenario.variants]
    with open_client(workers=1) as client:
        outputs = executors.on_cluster(client, scenario, models, [(1, 35, 45)], "numpy")
        with pytest.raises(RunFailed, match=r"members 35\.\.44 of variant 'distancing'"):
            list(outputs)


def test_resume_without_work_in_progress_starts_afresh(tmp_path: Path) -> None:
    """The project's reference (command line): --resume starts afresh when there is no
    <PATH>.partial."""
    scenario = write_scenario(tmp_path, members=6)
    result = api.run(scenario, output=tmp_path / "result.nc", workers=0, resume=True,
                     progress=False)
    assert result == tmp_path / "result.nc" and result.is_file()
    assert not (tmp_path / "result.nc.partial").exists()


def test_a_worker_saves_its_chunk_only_where_it_sees_the_work_directory(tmp_path: Path
                                                                        ) -> None:
    """A task that reads back the driver's marker token saves its chunk itself and hands
    back only the key; one that reads another token (a worker on a host without the
    directory) hands the whole chunk back, and the driver's save of it is the same file.
    The local cluster's workers always see it."""
    scenario = load_scenario(write_scenario(tmp_path, members=12))
    models = [lower_model(scenario, variant) for variant in scenario.variants]
    layout = layout_of(scenario)
    journal = WorkJournal.open(tmp_path / "result.nc", layout, resume=False, force=False)
    token = journal.mark()
    assert journal.shares_directory(token) and not journal.shares_directory("elsewhere")

    elsewhere = tasks.compute_and_save_chunk(scenario, models[0], (0, 0, 6), journal,
                                               "elsewhere", "numpy")
    assert isinstance(elsewhere, tasks.ChunkOutput) and journal.saved() == []
    saved = tasks.compute_and_save_chunk(scenario, models[0], (0, 6, 12), journal, token,
                                           "numpy")
    assert saved == tasks.ChunkSaved((0, 6, 12)) and journal.saved() == [(0, 6, 12)]

    driver = WorkJournal.open(tmp_path / "driver.nc", layout, resume=False, force=False)
    output = tasks.compute_chunk(scenario, models[0], (0, 6, 12), "numpy")
    driver.save(output.key, output.result, output.reported)
    chunk = "chunk-v0-0000000006-0000000012"
    for name in ("state.npy", "flow_count.npy"):
        assert ((journal.work / chunk / name).read_bytes()
                == (driver.work / chunk / name).read_bytes()), name
    with np.load(journal.work / chunk / "members.npz") as ours, \
            np.load(driver.work / chunk / "members.npz") as theirs:
        assert sorted(ours.files) == sorted(theirs.files)
        for name in ours.files:
            np.testing.assert_array_equal(ours[name], theirs[name], err_msg=name)

    with open_client(workers=1) as client:
        outputs = list(executors.on_cluster(client, scenario, models, [(1, 0, 12)], "numpy",
                                           journal))
    assert outputs == [tasks.ChunkSaved((1, 0, 12))]
    assert journal.saved() == [(0, 6, 12), (1, 0, 12)]


def test_checkpoints_make_the_saved_chunks_durable(tmp_path: Path, monkeypatch) -> None:
    """The journal's contract (ensemble/run/journal.py): chunks saved during a run reach the
    durable list in the background, so a resume after a crash of the system keeps them.
    With the interval at zero every chunk arriving while no batch runs starts one; leaving
    waits for the last batch."""
    monkeypatch.setattr(journal_module, "CHECKPOINT_SECONDS", 0.0)
    scenario = load_scenario(write_scenario(tmp_path, members=12))
    journal = WorkJournal.open(tmp_path / "result.nc", layout_of(scenario), resume=False,
                           force=False)
    models = [lower_model(scenario, variant) for variant in scenario.variants]
    keys = [(0, 0, 6), (0, 6, 12), (1, 0, 12)]
    outputs = executors.in_process(scenario, models, keys, "numpy")
    execute.save_all(journal, outputs, Progress(bar=False))
    durable = (journal.work / "durable-chunks").read_text().split()
    assert durable and set(durable) <= {path.name for path in journal.work.glob("chunk-*")}
    assert "chunk-v0-0000000000-0000000006" in durable


def test_chunks_written_into_reused_buffers_have_the_same_bits(tmp_path: Path) -> None:
    """The task's contract (ensemble/run/tasks.py): a worker writes chunk after chunk
    into the same arrays (ReportBuffers); each chunk has the bits it has in fresh arrays,
    including a last, shorter chunk, whatever was left in the arrays before."""
    from ensemble.integrate.kernels.launch import ReportBuffers

    scenario = load_scenario(write_scenario(tmp_path, members=40))
    model = lower_model(scenario, scenario.variants[1])
    buffers = ReportBuffers()
    for key in [(1, 0, 16), (1, 16, 32), (1, 32, 40), (1, 0, 16)]:
        reused = tasks.compute_chunk(scenario, model, key, "compiled", 1, buffers)
        fresh = tasks.compute_chunk(scenario, model, key, "compiled", 1)
        for name in ("state", "flow_count", "step_error", "observed_order", "status"):
            np.testing.assert_array_equal(getattr(reused.result, name),
                                          getattr(fresh.result, name), err_msg=name)


@pytest.mark.parametrize("refine_pilots", [4, 2], ids=["pilot-brackets", "refined"])
@pytest.mark.parametrize("misleading", [False, True])
def test_candidate_chunks_give_the_bits_of_whole_chunks(tmp_path: Path, monkeypatch,
                                                         misleading: bool,
                                                         refine_pilots: int) -> None:
    """The selection's contract (ensemble/output/selection.py): past the pilot, chunks keep
    only candidates for the quantiles, and the file has the bits of a run that keeps
    every chunk whole; with a misleading pilot (its values inflated by a third, so the
    brackets miss) the missed cells are computed again from the chunks, with the same
    bits.  A failure half-way and a resume change nothing either, nor a chunk whose
    candidates were cut with other brackets.  With refined brackets (from the first two
    pilots' worth of members; 40,000 members are too few for four), the chunks after them
    are cut with those and the ones before cut again at the finish."""
    import ensemble.output.brackets as brackets_module
    import ensemble.output.finish as finish_module
    import ensemble.output.selection as selection_module

    monkeypatch.chdir(tmp_path)
    monkeypatch.setattr(brackets_module, "REFINE_PILOTS", refine_pilots)
    scenario = write_scenario(tmp_path, members=40_000, days=20, keep_members=False)
    monkeypatch.setattr(brackets_module, "PILOT_BYTES", 0)
    reference = api.run(scenario, output=tmp_path / "whole.nc", workers=0, chunk=4000,
                        progress=False)

    monkeypatch.setattr(brackets_module, "PILOT_BYTES", 2**30)
    if misleading:
        real_ranges = selection_module.pilot_ranges
        monkeypatch.setattr(selection_module, "pilot_ranges",
                            lambda pilot, probabilities: real_ranges(pilot * 1.3,
                                                                     probabilities))
    kept = []
    real_candidates = selection_module.chunk_candidates

    def counting_candidates(values, included, brackets, out=None):
        candidates = real_candidates(values, included, brackets, out)
        kept.append(candidates.values.size / values.size)
        return candidates

    monkeypatch.setattr(selection_module, "chunk_candidates", counting_candidates)
    missed = []
    real_recomputed = finish_module.Finisher._recomputed_quantiles

    def counting_recomputed(self, name, keys, included, cells):
        missed.append(len(cells))
        return real_recomputed(self, name, keys, included, cells)

    monkeypatch.setattr(finish_module.Finisher, "_recomputed_quantiles", counting_recomputed)
    recut = []
    real_recut = selection_module.recut

    def counting_recut(part, coarse, fine):
        recut.append(part)
        return real_recut(part, coarse, fine)

    monkeypatch.setattr(selection_module, "recut", counting_recut)
    real_make_design = tasks.make_design

    def failing_make_design(scenario, variant, model, members):
        if 21_000 in members and variant.name == "distancing":
            raise FloatingPointError("an illustrative failure")
        return real_make_design(scenario, variant, model, members)

    monkeypatch.setattr(tasks, "make_design", failing_make_design)
    with pytest.raises(RunFailed):
        api.run(scenario, workers=0, chunk=4000, progress=False)
    refined = sorted((tmp_path / "result.nc.partial").glob("refined-brackets-*"))
    assert bool(refined) == (refine_pilots == 2)
    # a chunk cut with other brackets (not expected) is computed again at the finish
    tampered = sorted((tmp_path / "result.nc.partial").glob("chunk-*/state-brackets"))[-1]
    tampered.write_text("other brackets")
    monkeypatch.setattr(tasks, "make_design", real_make_design)
    resumed = api.run(scenario, workers=0, chunk=5000, resume=True, progress=False)
    assert kept and min(kept) < 1.0, "no chunk was kept as candidates"
    assert bool(missed) == misleading, "only a misleading pilot misses cells"
    assert bool(recut) == (refine_pilots == 2), "chunks cut with the pilot's brackets"
    assert_same_numbers(resumed, reference)


def test_the_collector_is_set_back_after_a_run_even_a_failed_one():
    """During a run the collector skips the objects alive at its start and collects young
    objects less often; afterwards (also after an error) it is as it was (the engine's own
    contract, ensemble/run/execute.py)."""
    import gc

    before = gc.get_threshold()
    assert gc.get_freeze_count() == 0
    with pytest.raises(RuntimeError):
        with execute.fewer_collections():
            assert gc.get_freeze_count() > 0
            assert gc.get_threshold() == (execute.COLLECTION_THRESHOLD, *before[1:])
            raise RuntimeError("an illustrative failure")
    assert gc.get_threshold() == before and gc.get_freeze_count() == 0


def test_an_adaptive_cluster_sees_the_backlog_it_may_grow_to(tmp_path: Path,
                                                             monkeypatch) -> None:
    """dask's adaptive loop asks for worker jobs from the tasks the scheduler holds
    (``distributed.deploy.adaptive``), so with a batch profile that may grow to more
    threads than have connected, the driver submits for the threads it may grow to: 4
    here, 3 tasks each, against 3 for the one thread connected."""
    scenario = load_scenario(write_scenario(tmp_path, members=40))
    models = [lower_model(scenario, variant) for variant in scenario.variants]
    with open_client(workers=1) as client:
        assert sum(client.nthreads().values()) == 1
        submitted = []
        real_submit = client.submit

        def counting_submit(*arguments, **options):
            submitted.append(options["key"])
            return real_submit(*arguments, **options)

        monkeypatch.setattr(client, "submit", counting_submit)
        for variant, (capacity, most) in enumerate(((0, 4), (4, 13))):
            submitted.clear()
            keys = [(variant, begin, begin + 2) for begin in range(0, 40, 2)]
            outputs = executors.on_cluster(client, scenario, models, keys, "numpy",
                                           capacity=capacity)
            next(outputs)
            assert len(submitted) == most, capacity
            outputs.close()
