"""Speed of the integration backends against a hand-written reference kernel.

In one process, for an SEIR model (4 states) and a 16-group age-structured SEIR (64
states, a 16 x 16 contact matrix), 365 days at step 0.25 with RK4, it measures

(a) a Python loop of scipy's ``solve_ivp`` (RK45, rtol 1e-8) over a sample of members;
(b) the numpy backend (:func:`ensemble.integrate.reference.integrate_fixed`);
(c) the compiled backend
    (:func:`ensemble.integrate.kernels.launch.integrate_fixed_compiled`, compile time
    excluded and printed apart);
(d) a hand-written member-blocked numba kernel doing the same RK4 integrations and
    storing the same reports (steps outside, members inside, parallel over blocks): the
    practical limit of this machine;

and prints member-steps per second and the ratios against (d) measured in the same run;
then the cost per step of the implicit methods on the 16-group model relative to RK4,
and the end-to-end time and peak memory of ``ensemble run`` (a subprocess) for 200,000
SEIR members (``keep_members = false``, the step check on) against (d) doing the same
integrations (the run at h and the check at h/2: three times the steps).

Each figure is the best of a few repetitions (the machine may be shared).  Models and
numbers are invented, illustrative only.

Usage::

    python scripts/benchmark.py [--members 20480] [--run-members 200000]
                                [--skip-run | --run-only]
"""

from __future__ import annotations

import argparse
import dataclasses
import subprocess
import sys
import tempfile
import threading
import time
from collections.abc import Callable
from pathlib import Path

import numba
import numpy as np
import psutil
from numba import njit, prange
from scipy.integrate import solve_ivp

from ensemble.examples import seir_text
from ensemble.integrate.kernels.cache import KernelCache
from ensemble.integrate.kernels.launch import integrate_fixed_compiled
from ensemble.integrate.reference import integrate_fixed
from ensemble.methods import METHODS
from ensemble.model.lower import lower_model
from ensemble.sampling import make_design
from ensemble.scenario.load import load_scenario


DAYS = 365
STEP = 0.25
STEPS_PER_REPORT = 4
GROUPS = 16
BLOCK = 512
"""Members per block of the reference kernels (a multiple of the SIMD width)."""

def seir_scenario(n_members: int, method: str = "rk4", step: float = STEP) -> str:
    """The illustrative SEIR of :func:`ensemble.examples.seir_text` (invented numbers), as
    the benchmark runs it: a year, a large town, members not kept in the result."""
    return seir_text(members=n_members, days=DAYS, method=method, step=step,
                     population=250000, seed=6, keep_members=False,
                     output="benchmark-seir.nc", name="benchmark-seir",
                     title="Illustrative SEIR for the benchmark (invented numbers)")


def age_scenario(n_members: int, method: str) -> str:
    """A 16-group SEIR with an invented contact matrix that decays away from the
    diagonal (illustrative only)."""
    groups = [f"age{g}" for g in range(GROUPS)]
    rows = []
    for g in range(GROUPS):
        row = [round(0.3 + 2.5 * np.exp(-abs(g - h) / 2.5), 4) for h in range(GROUPS)]
        rows.append("[" + ", ".join(str(v) for v in row) + "]")
    population = [40000 + 1000 * g for g in range(GROUPS)]
    return f"""\
[scenario]
name = "benchmark-age"
title = "Illustrative 16-group SEIR for the benchmark (invented numbers)"
days = {DAYS}
members = {n_members}
seed = 16

[model]
compartments = ["S", "E", "I", "R"]
groups = {groups!r}
population = {population!r}
initial = {{ S = "rest", I = "seed_infectious" }}

[model.matrices]
contacts = [{", ".join(rows)}]

[[model.flows]]
name = "infection"
from = "S"
to = "E"
rate = "transmissibility * S * (contacts @ (I / N))"

[[model.flows]]
name = "onset"
from = "E"
to = "I"
rate = "E / latent_days"

[[model.flows]]
name = "recovery"
from = "I"
to = "R"
rate = "I / infectious_days"

[parameters]
transmissibility = {{ dist = "uniform", low = 0.02, high = 0.04 }}
latent_days = {{ dist = "gamma", mean = 3.0, sd = 0.7 }}
infectious_days = {{ dist = "uniform", low = 4.0, high = 6.0 }}
seed_infectious = {{ dist = "uniform", low = 1, high = 5, per_group = true }}

[solver]
method = "{method}"
step = {STEP}
"""


# ------------------------------------------------------------------ reference kernels


@njit(parallel=True, boundscheck=False)
def seir_reference(y0, beta, latent, infectious, h, steps_per_report, n_reports,
                   state_out, flow_out):
    """Hand-written RK4 for SEIR over blocks of members (steps outside, members inside),
    storing states and flow counts at every report, report-major."""
    for blk in prange(y0.shape[1] // BLOCK):
        m0 = blk * BLOCK
        y = np.empty((4, BLOCK))
        fc = np.empty((3, BLOCK))
        for b in range(BLOCK):
            for s in range(4):
                y[s, b] = y0[s, m0 + b]
                state_out[0, s, m0 + b] = y[s, b]
        for k in range(1, n_reports):
            fc[:, :] = 0.0
            for j in range(steps_per_report):
                for b in range(BLOCK):
                    m = m0 + b
                    be, la, inf = beta[m], latent[m], infectious[m]
                    s0, e0, i0, r0 = y[0, b], y[1, b], y[2, b], y[3, b]
                    a1 = be * s0 * i0 / (s0 + e0 + i0 + r0)
                    b1 = e0 / la
                    c1 = i0 / inf
                    s1, e1 = s0 - 0.5 * h * a1, e0 + 0.5 * h * (a1 - b1)
                    i1, r1 = i0 + 0.5 * h * (b1 - c1), r0 + 0.5 * h * c1
                    a2 = be * s1 * i1 / (s1 + e1 + i1 + r1)
                    b2 = e1 / la
                    c2 = i1 / inf
                    s2, e2 = s0 - 0.5 * h * a2, e0 + 0.5 * h * (a2 - b2)
                    i2, r2 = i0 + 0.5 * h * (b2 - c2), r0 + 0.5 * h * c2
                    a3 = be * s2 * i2 / (s2 + e2 + i2 + r2)
                    b3 = e2 / la
                    c3 = i2 / inf
                    s3, e3 = s0 - h * a3, e0 + h * (a3 - b3)
                    i3, r3 = i0 + h * (b3 - c3), r0 + h * c3
                    a4 = be * s3 * i3 / (s3 + e3 + i3 + r3)
                    b4 = e3 / la
                    c4 = i3 / inf
                    da = h / 6.0 * (a1 + 2.0 * a2 + 2.0 * a3 + a4)
                    db = h / 6.0 * (b1 + 2.0 * b2 + 2.0 * b3 + b4)
                    dc = h / 6.0 * (c1 + 2.0 * c2 + 2.0 * c3 + c4)
                    y[0, b] = s0 - da
                    y[1, b] = e0 + da - db
                    y[2, b] = i0 + db - dc
                    y[3, b] = r0 + dc
                    fc[0, b] += da
                    fc[1, b] += db
                    fc[2, b] += dc
            for b in range(BLOCK):
                for s in range(4):
                    state_out[k, s, m0 + b] = y[s, b]
                for f in range(3):
                    flow_out[k, f, m0 + b] = fc[f, b]


@njit(parallel=True, boundscheck=False)
def age_reference(y0, transmissibility, latent, infectious, contacts, h, steps_per_report,
                  n_reports, state_out, flow_out):
    """Hand-written RK4 for the G-group SEIR (states S, E, I, R group-minor) over blocks
    of members, members innermost in every loop; reports as :func:`seir_reference`."""
    groups = contacts.shape[0]
    weights = (0.0, 0.5, 0.5, 1.0)
    final = (1.0 / 6.0, 1.0 / 3.0, 1.0 / 3.0, 1.0 / 6.0)
    for blk in prange(y0.shape[1] // BLOCK):
        m0 = blk * BLOCK
        y = np.empty((4 * groups, BLOCK))
        stage = np.empty((4 * groups, BLOCK))
        rates = np.empty((3 * groups, BLOCK))
        inc = np.empty((3 * groups, BLOCK))
        fc = np.empty((3 * groups, BLOCK))
        prevalence = np.empty((groups, BLOCK))
        for s in range(4 * groups):
            for b in range(BLOCK):
                y[s, b] = y0[s, m0 + b]
                state_out[0, s, m0 + b] = y[s, b]
        for k in range(1, n_reports):
            fc[:, :] = 0.0
            for j in range(steps_per_report):
                inc[:, :] = 0.0
                for i in range(4):
                    for s in range(4 * groups):
                        for b in range(BLOCK):
                            stage[s, b] = y[s, b]
                    if i > 0:
                        for g in range(groups):
                            for b in range(BLOCK):
                                a = weights[i] * h * rates[g, b]
                                o = weights[i] * h * rates[groups + g, b]
                                r = weights[i] * h * rates[2 * groups + g, b]
                                stage[g, b] -= a
                                stage[groups + g, b] += a - o
                                stage[2 * groups + g, b] += o - r
                                stage[3 * groups + g, b] += r
                    for g in range(groups):
                        for b in range(BLOCK):
                            total = (stage[g, b] + stage[groups + g, b]
                                     + stage[2 * groups + g, b] + stage[3 * groups + g, b])
                            prevalence[g, b] = stage[2 * groups + g, b] / total
                    for g in range(groups):
                        for b in range(BLOCK):
                            force = 0.0
                            for q in range(groups):
                                force += contacts[g, q] * prevalence[q, b]
                            m = m0 + b
                            rates[g, b] = transmissibility[m] * stage[g, b] * force
                            rates[groups + g, b] = stage[groups + g, b] / latent[m]
                            rates[2 * groups + g, b] = stage[2 * groups + g, b] / infectious[m]
                    for f in range(3 * groups):
                        for b in range(BLOCK):
                            inc[f, b] += final[i] * h * rates[f, b]
                for g in range(groups):
                    for b in range(BLOCK):
                        a, o, r = inc[g, b], inc[groups + g, b], inc[2 * groups + g, b]
                        y[g, b] -= a
                        y[groups + g, b] += a - o
                        y[2 * groups + g, b] += o - r
                        y[3 * groups + g, b] += r
                for f in range(3 * groups):
                    for b in range(BLOCK):
                        fc[f, b] += inc[f, b]
            for b in range(BLOCK):
                for s in range(4 * groups):
                    state_out[k, s, m0 + b] = y[s, b]
                for f in range(3 * groups):
                    flow_out[k, f, m0 + b] = fc[f, b]


# ------------------------------------------------------------------ measurements


def tree_rss(root: psutil.Process) -> int:
    """Resident bytes of ``root`` and its descendants (an upper bound: shared pages count
    once per process)."""
    total = 0
    for process in [root, *root.children(recursive=True)]:
        try:
            total += process.memory_info().rss
        except (psutil.NoSuchProcess, psutil.AccessDenied):
            pass
    return total


def best_time(action: Callable[[], object], repeats: int = 3) -> float:
    """Shortest wall time of ``repeats`` calls (after one warm-up call)."""
    action()
    best = np.inf
    for _ in range(repeats):
        began = time.perf_counter()
        action()
        best = min(best, time.perf_counter() - began)
    return best


class Case:
    """One model: its scenario, lowered model and a design of ``n_members`` members."""

    def __init__(self, directory: Path, name: str, text: str, n_members: int):
        path = directory / f"{name}.toml"
        path.write_text(text)
        self.scenario = load_scenario(str(path))
        self.variant = self.scenario.variants[0]
        self.model = lower_model(self.scenario, self.variant)
        self.n_members = n_members
        self.design = make_design(self.scenario, self.variant, self.model,
                                  np.arange(n_members))
        self.n_reports = self.scenario.n_reports
        self.steps = (self.n_reports - 1) * STEPS_PER_REPORT
        self.newton = self.scenario.solver.newton

    def parameter(self, name: str) -> np.ndarray:
        return np.ascontiguousarray(
            self.design.parameters[self.model.parameter_slots.index(name)])

    def subset(self, count: int) -> "Case":
        """The same case with the first ``count`` members."""
        part = object.__new__(Case)
        part.__dict__.update(self.__dict__)
        rows = np.arange(count)
        design = self.design
        part.design = dataclasses.replace(
            design, member_index=design.member_index[rows], parameters=design.parameters[:, rows],
            initial=design.initial[:, rows], invalid_start=design.invalid_start[rows],
            schedule_values=tuple(v[:, rows] for v in design.schedule_values))
        part.n_members = count
        return part

    def backend_rate(self, integrate, method: str = "rk4") -> float:
        """Member-steps per second of ``integrate`` with ``method``."""
        seconds = best_time(lambda: integrate(self.model, self.design, METHODS[method], STEP,
                                              STEPS_PER_REPORT, self.n_reports, self.newton,
                                              0.01))
        return self.n_members * self.steps / seconds

    def solve_ivp_seconds_per_member(self, sample: int) -> float:
        """Wall time per member of solve_ivp (RK45, rtol 1e-8) with a numpy right-hand
        side written for this model, daily output."""
        stoichiometry = self.model.stoichiometry
        groups = self.model.n_groups
        contacts = None
        if groups > 1:
            contacts = np.array(self.scenario.model.matrices["contacts"])
        began = time.perf_counter()
        for m in range(sample):
            y0 = self.design.initial[:, m]
            if groups == 1:
                beta, latent, infectious = (self.parameter(n)[m] for n in
                                            ("beta", "latent_days", "infectious_days"))

                def rhs(t, y):
                    s, e, i, r = y
                    return stoichiometry @ np.array(
                        [beta * s * i / (s + e + i + r), e / latent, i / infectious])
            else:
                beta, latent, infectious = (self.parameter(n)[m] for n in
                                            ("transmissibility", "latent_days",
                                             "infectious_days"))

                def rhs(t, y):
                    s, e, i, r = y.reshape(4, groups)
                    force = contacts @ (i / (s + e + i + r))
                    return stoichiometry @ np.concatenate(
                        [beta * s * force, e / latent, i / infectious])
            solve_ivp(rhs, (0.0, float(DAYS)), y0, method="RK45", rtol=1e-8, atol=1e-6,
                      t_eval=np.arange(DAYS + 1.0))
        return (time.perf_counter() - began) / sample

    def reference_rate(self, step: float = STEP, steps_per_report: int = STEPS_PER_REPORT,
                       buffers=None) -> float:
        """Member-steps per second of the hand-written reference kernel (d)."""
        n_members = self.n_members - self.n_members % BLOCK
        state = np.empty((self.n_reports, self.model.n_states, n_members))
        flows = np.empty((self.n_reports, self.model.n_flow_elements, n_members))
        y0 = np.ascontiguousarray(self.design.initial[:, :n_members])
        latent, infectious = (self.parameter(name)[:n_members]
                              for name in ("latent_days", "infectious_days"))
        if self.model.n_groups == 1:
            args = (y0, self.parameter("beta")[:n_members], latent, infectious, step,
                    steps_per_report, self.n_reports, state, flows)
            kernel = seir_reference
        else:
            contacts = np.array(self.scenario.model.matrices["contacts"])
            args = (y0, self.parameter("transmissibility")[:n_members], latent, infectious,
                    contacts, step, steps_per_report, self.n_reports, state, flows)
            kernel = age_reference
        seconds = best_time(lambda: kernel(*args))
        return n_members * (self.n_reports - 1) * steps_per_report / seconds


def compile_seconds(case: Case, method: str) -> float:
    """Time to generate and compile (or load from the disk cache) a kernel, measured by a
    first call on a few members."""
    small = case.subset(8)
    began = time.perf_counter()
    KernelCache.for_environment().load(case.model, METHODS[method])
    integrate_fixed_compiled(small.model, small.design, METHODS[method], STEP,
                             STEPS_PER_REPORT, 2, case.newton, 0.01)
    return time.perf_counter() - began


def report_model(title: str, case: Case, sample: int, numpy_case: Case) -> float:
    """Print (a)-(d) for one model; return the reference rate."""
    print(f"\n== {title}: {case.model.n_states} states, {DAYS} days, step {STEP}, RK4, "
          f"{case.n_members} members ==")
    print(f"compile (or load) the rk4 kernel: {compile_seconds(case, 'rk4'):.1f} s")
    reference = case.reference_rate()
    compiled = case.backend_rate(integrate_fixed_compiled)
    numpy_rate = numpy_case.backend_rate(integrate_fixed)
    per_member_ivp = case.solve_ivp_seconds_per_member(sample)
    per_member_compiled = case.steps / compiled
    print(f"(a) solve_ivp loop ({sample} members): {per_member_ivp * 1e3:9.2f} ms per member")
    print(f"(b) numpy backend:      {numpy_rate:10.3e} member-steps/s, "
          f"{case.steps / numpy_rate * 1e6:9.2f} us per member")
    print(f"(c) compiled backend:   {compiled:10.3e} member-steps/s, "
          f"{per_member_compiled * 1e6:9.2f} us per member")
    print(f"(d) reference kernel:   {reference:10.3e} member-steps/s, "
          f"{case.steps / reference * 1e6:9.2f} us per member")
    print(f"ratio compiled / reference: {compiled / reference:6.2f}   (target >= 0.5)")
    print(f"ratio numpy / reference:    {numpy_rate / reference:6.3f}")
    target = "   (target >= 1000)" if case.model.n_groups == 1 else "   (no target: the SEIR one)"
    print(f"speed-up compiled vs solve_ivp per member: {per_member_ivp / per_member_compiled:8.0f}"
          + target)
    return reference


def report_implicit(case: Case) -> None:
    """Cost per step of the implicit methods relative to RK4, compiled backend."""
    print(f"\n== implicit methods, compiled, {case.model.n_states} states, "
          f"{case.n_members} members ==")
    rk4 = case.backend_rate(integrate_fixed_compiled, "rk4")
    for method in (name for name, method in METHODS.items() if method.implicit):
        seconds = compile_seconds(case, method)
        rate = case.backend_rate(integrate_fixed_compiled, method)
        print(f"{method:15s} compile {seconds:6.1f} s, {rate:10.3e} member-steps/s, "
              f"cost per step / RK4's: {rk4 / rate:6.2f}   (target <= 5)")


class TreeWatch:
    """Peak resident memory and CPU time of a process and its descendants, sampled."""

    def __init__(self, root: psutil.Process):
        self.root = root
        self.peak = 0
        self.cpu: dict[int, float] = {}

    def sample(self) -> None:
        for process in [self.root, *self.root.children(recursive=True)]:
            try:
                times = process.cpu_times()
                self.cpu[process.pid] = times.user + times.system
            except (psutil.NoSuchProcess, psutil.AccessDenied):
                pass
        self.peak = max(self.peak, tree_rss(self.root))


@dataclasses.dataclass
class RunMeasure:
    """One ``ensemble run`` subprocess: wall time, progress lines, memory and CPU."""

    wall: float
    lines: list[tuple[float, str]]
    watch: TreeWatch
    returncode: int

    def seen(self, text: str) -> str:
        return next((f"{at:5.1f} s" for at, line in self.lines if text in line), "  -  ")


def measure_run(command: list[str], directory: Path) -> RunMeasure:
    """Run ``command`` in ``directory``, sampling its process tree."""
    lines: list[tuple[float, str]] = []
    began = time.monotonic()
    process = subprocess.Popen(command, cwd=directory, stdout=subprocess.DEVNULL,
                               stderr=subprocess.PIPE, text=True)
    reader = threading.Thread(target=lambda: lines.extend(
        (time.monotonic() - began, line) for line in process.stderr))
    reader.start()
    watch = TreeWatch(psutil.Process(process.pid))
    while process.poll() is None:
        watch.sample()
        time.sleep(0.1)
    wall = time.monotonic() - began
    reader.join()
    return RunMeasure(wall, lines, watch, process.returncode)


def report_end_to_end(directory: Path, n_members: int, case: Case, reference: float,
                      repeats: int = 3) -> None:
    """``ensemble run`` on ``n_members`` SEIR members against (d) doing the same steps, with
    the times at which the run's progress lines appear (planned, every chunk saved); the
    fastest of ``repeats`` runs, as every figure here is a best of a few.  The reference
    rate is the faster of (d) measured before (``reference``) and right after the runs
    on ``case``: the machine's speed drifts, and the faster reference gives the stricter
    ratio."""
    path = directory / "run.toml"
    path.write_text(seir_scenario(n_members))
    command = [sys.executable, "-m", "ensemble", "run", str(path), "--force",
               "--backend", "compiled", "--output", str(directory / "run.nc")]
    runs = [measure_run(command, directory) for _ in range(repeats)]
    best = min(runs, key=lambda run: run.wall)
    wall, watch = best.wall, best.watch
    reference = max(reference, case.reference_rate())
    # the run at h and the step check at h/2: 1 + 2 = 3 times the steps of one run
    steps = DAYS * STEPS_PER_REPORT
    reference_seconds = n_members * steps * 3 / reference
    print(f"\n== end to end: ensemble run --backend compiled, {n_members} SEIR members, "
          "keep_members = false, step check on (h and h/2) ==")
    print(f"exit status {best.returncode}, wall {wall:.1f} s (fastest of "
          f"{', '.join(f'{run.wall:.1f}' for run in runs)} s), peak memory of the process "
          f"tree {max(run.watch.peak for run in runs) / 1e9:.2f} GB (goal < 2 GB), CPU time "
          f"of the tree {sum(watch.cpu.values()):.1f} s on {psutil.cpu_count()} cores")
    print(f"chunks planned at {best.seen('chunks to compute')}, every chunk saved at "
          f"{best.seen('every chunk saved')}, result written at {wall:5.1f} s")
    print(f"reference kernel (d) for the same integrations: {reference_seconds:.2f} s "
          "(the faster of its rates before and after the run)")
    print(f"ratio run / reference: {wall / reference_seconds:6.1f}   (target <= 5)")


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--members", type=int, default=20480,
                        help="members of the SEIR measurements (the 16-group use 1/8)")
    parser.add_argument("--run-members", type=int, default=200_000)
    parser.add_argument("--skip-run", action="store_true", help="skip the end-to-end run")
    parser.add_argument("--run-only", action="store_true",
                        help="only the end-to-end run (and the reference it is compared to)")
    options = parser.parse_args()
    print(f"numba threads: {numba.get_num_threads()}, cores: {psutil.cpu_count()}")
    with tempfile.TemporaryDirectory(prefix="ensemble-benchmark-") as temporary:
        directory = Path(temporary)
        seir = Case(directory, "seir", seir_scenario(options.members), options.members)
        if options.run_only:
            report_end_to_end(directory, options.run_members, seir, seir.reference_rate())
            return 0
        reference = report_model("SEIR", seir, 20, seir.subset(min(options.members, 4096)))
        age_members = max(BLOCK, options.members // 8 // BLOCK * BLOCK)
        age = Case(directory, "age", age_scenario(age_members, "rk4"), age_members)
        report_model("16-group SEIR", age, 3, age.subset(min(age_members, 256)))
        report_implicit(age.subset(min(age_members, 512)))
        if not options.skip_run:
            report_end_to_end(directory, options.run_members, seir, reference)
    return 0


if __name__ == "__main__":
    sys.exit(main())
