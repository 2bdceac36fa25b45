"""Speed of the integration backends against plain hand-written kernels.

In one process it measures, a year at step 0.25 with RK4 unless said otherwise:

1. an SEIR model (4 states): (a) a Python loop of scipy's ``solve_ivp`` (RK45, rtol
   1e-8) over a sample of members, (b) the numpy backend
   (:func:`ensemble.integrate.reference.integrate_fixed`), (c) the compiled backend
   (:func:`ensemble.integrate.kernels.launch.integrate_fixed_compiled`, compile time
   excluded) and (d) a hand-written member-blocked numba kernel doing the same RK4
   integrations and storing the same reports;
2. a G-group SEIR with a dense contact matrix, for G = 4, 8, 16, 32: the compiled backend
   and a plain member-blocked numba kernel written apart from the project (about 60
   lines, the contact matrix kept as data, loops over groups with the members innermost,
   blocks of 256 members, parallel over blocks, every state and flow count stored daily),
   per member and their ratio; and the cold compile time of the explicit (RK4) and
   implicit (backward Euler) kernels, each in a fresh process with an empty kernel cache;
3. the cost per step of the implicit methods on the 16-group model relative to RK4;
4. end to end, ``ensemble run`` (a subprocess) with the step check on and members not kept:
   4,096 members of the 16-group model against the plain kernel doing the same
   integrations (the run at h and the check at h/2: three times the steps), 16 members of
   the same model once its kernels are cached, and 200,000 SEIR members against (d);
   with ``--large N``, N members of the 16-group model (1,000,000 for the target), its
   time, peak memory and work directory, and their linear extrapolation to a million.

Each figure is the best of a few repetitions (the machine may be shared: compile times in
particular vary with the load).  Models and numbers are invented, illustrative only.

Usage::

    python scripts/benchmark.py [--members 20480] [--age-members 4096]
                                [--groups 4 8 16 32] [--skip-run | --run-only]
                                [--large N]
"""

from __future__ import annotations

import argparse
import dataclasses
import os
import subprocess
import sys
import tempfile
import textwrap
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
from ensemble.integrate.kernels.launch import integrate_fixed_compiled
from ensemble.integrate.reference import integrate_fixed
from ensemble.methods import METHODS
from ensemble.model.lower import lower_model
from ensemble.sampling import make_design
from ensemble.scenario.load import load_scenario

DAYS = 365
STEP = 0.25
STEPS_PER_REPORT = 4
BLOCK = 512
"""Members per block of the SEIR reference kernel (a multiple of the SIMD width)."""
PLAIN_BLOCK = 256
"""Members per block of the plain G-group kernel."""


def seir_scenario(n_members: int, method: str = "rk4", step: float = STEP) -> str:
    """The illustrative SEIR of :func:`ensemble.examples.seir_text` (invented numbers), as
    the benchmark runs it: a year, a large town, members not kept in the result."""
    return seir_text(members=n_members, days=DAYS, method=method, step=step,
                     population=250000, seed=6, keep_members=False,
                     output="benchmark-seir.nc", name="benchmark-seir",
                     title="Illustrative SEIR for the benchmark (invented numbers)")


def contact_rows(n_groups: int) -> np.ndarray:
    """An invented dense contact matrix that decays away from the diagonal."""
    return np.array([[round(0.3 + 2.5 * np.exp(-abs(g - h) / 2.5), 4) for h in range(n_groups)]
                     for g in range(n_groups)])


def age_scenario(n_members: int, method: str, n_groups: int = 16) -> str:
    """A G-group SEIR with an invented contact matrix (illustrative only)."""
    groups = [f"age{g}" for g in range(n_groups)]
    rows = ", ".join("[" + ", ".join(str(v) for v in row) + "]"
                     for row in contact_rows(n_groups))
    population = [40000 + 1000 * g for g in range(n_groups)]
    return f"""\
[scenario]
name = "benchmark-age"
title = "Illustrative {n_groups}-group SEIR for the benchmark (invented numbers)"
days = {DAYS}
members = {n_members}
seed = 16

[model]
compartments = ["S", "E", "I", "R"]
groups = {groups!r}
population = {population!r}
initial = {{ S = "rest", I = "seed_infectious" }}

[model.matrices]
contacts = [{rows}]

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

[output]
keep_members = false
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
def plain_age_kernel(y0, beta, latent, infectious, contacts, h, steps_per_report,
                     n_reports, state_out, flow_out):
    """RK4 for the G-group SEIR (rows S, E, I, R, group-minor), the contact matrix as
    data: blocks of members in parallel, every loop with the members innermost."""
    groups = contacts.shape[0]
    nodes = (0.0, 0.5, 0.5, 1.0)
    weights = (1.0 / 6.0, 1.0 / 3.0, 1.0 / 3.0, 1.0 / 6.0)
    for blk in prange(y0.shape[1] // PLAIN_BLOCK):
        m0 = blk * PLAIN_BLOCK
        y = y0[:, m0:m0 + PLAIN_BLOCK].copy()
        stage = np.empty_like(y)
        rate = np.empty((3 * groups, PLAIN_BLOCK))
        total = np.empty_like(rate)
        fc = np.empty_like(rate)
        share = np.empty((groups, PLAIN_BLOCK))
        force = np.empty((groups, PLAIN_BLOCK))
        state_out[0, :, m0:m0 + PLAIN_BLOCK] = y
        flow_out[0, :, m0:m0 + PLAIN_BLOCK] = np.nan
        for k in range(1, n_reports):
            fc[:, :] = 0.0
            for j in range(steps_per_report):
                for i in range(4):
                    for g in range(groups):
                        for b in range(PLAIN_BLOCK):
                            move = nodes[i] * h
                            a, o, r = (move * rate[g, b], move * rate[groups + g, b],
                                       move * rate[2 * groups + g, b]) if i else (0.0, 0.0, 0.0)
                            s = y[g, b] - a
                            e = y[groups + g, b] + a - o
                            n = y[2 * groups + g, b] + o - r
                            q = y[3 * groups + g, b] + r
                            stage[g, b], stage[groups + g, b] = s, e
                            stage[2 * groups + g, b], stage[3 * groups + g, b] = n, q
                            share[g, b] = n / (s + e + n + q)
                    for g in range(groups):
                        force[g, :] = 0.0
                        for other in range(groups):
                            c = contacts[g, other]
                            for b in range(PLAIN_BLOCK):
                                force[g, b] += c * share[other, b]
                    for g in range(groups):
                        for b in range(PLAIN_BLOCK):
                            m = m0 + b
                            rate[g, b] = beta[m] * stage[g, b] * force[g, b]
                            rate[groups + g, b] = stage[groups + g, b] / latent[m]
                            rate[2 * groups + g, b] = stage[2 * groups + g, b] / infectious[m]
                    for f in range(3 * groups):
                        for b in range(PLAIN_BLOCK):
                            total[f, b] = (total[f, b] if i else 0.0) + weights[i] * rate[f, b]
                for g in range(groups):
                    for b in range(PLAIN_BLOCK):
                        a, o, r = (h * total[g, b], h * total[groups + g, b],
                                   h * total[2 * groups + g, b])
                        y[g, b] -= a
                        y[groups + g, b] += a - o
                        y[2 * groups + g, b] += o - r
                        y[3 * groups + g, b] += r
                        fc[g, b] += a
                        fc[groups + g, b] += o
                        fc[2 * groups + g, b] += r
            state_out[k, :, m0:m0 + PLAIN_BLOCK] = y
            flow_out[k, :, m0:m0 + PLAIN_BLOCK] = fc


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
        self.path = path
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
            design, member_index=design.member_index[rows],
            parameters=design.parameters[:, rows], initial=design.initial[:, rows],
            invalid_start=design.invalid_start[rows],
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
        side written for the SEIR, daily output."""
        stoichiometry = self.model.stoichiometry
        began = time.perf_counter()
        for m in range(sample):
            beta, latent, infectious = (self.parameter(n)[m] for n in
                                        ("beta", "latent_days", "infectious_days"))

            def rhs(t, y):
                s, e, i, r = y
                return stoichiometry @ np.array(
                    [beta * s * i / (s + e + i + r), e / latent, i / infectious])
            solve_ivp(rhs, (0.0, float(DAYS)), self.design.initial[:, m], method="RK45",
                      rtol=1e-8, atol=1e-6, t_eval=np.arange(DAYS + 1.0))
        return (time.perf_counter() - began) / sample

    def reference_rate(self, step: float = STEP,
                       steps_per_report: int = STEPS_PER_REPORT) -> float:
        """Member-steps per second of the hand-written kernel of this model."""
        grouped = self.model.n_groups > 1
        block = PLAIN_BLOCK if grouped else BLOCK
        n_members = max(block, self.n_members - self.n_members % block)
        columns = np.arange(n_members) % self.n_members
        state = np.empty((self.n_reports, self.model.n_states, n_members))
        flows = np.empty((self.n_reports, self.model.n_flow_elements, n_members))
        y0 = np.ascontiguousarray(self.design.initial[:, columns])
        latent, infectious = (self.parameter(name)[columns]
                              for name in ("latent_days", "infectious_days"))
        if grouped:
            contacts = np.array(self.scenario.model.matrices["contacts"], dtype=np.float64)
            args = (y0, self.parameter("transmissibility")[columns], latent, infectious,
                    contacts, step, steps_per_report, self.n_reports, state, flows)
            kernel = plain_age_kernel
        else:
            args = (y0, self.parameter("beta")[columns], latent, infectious, step,
                    steps_per_report, self.n_reports, state, flows)
            kernel = seir_reference
        seconds = best_time(lambda: kernel(*args))
        return n_members * (self.n_reports - 1) * steps_per_report / seconds


def report_seir(case: Case, sample: int, numpy_case: Case) -> float:
    """Print (a)-(d) for the SEIR; return the reference rate."""
    print(f"\n== SEIR: {case.model.n_states} states, {DAYS} days, step {STEP}, RK4, "
          f"{case.n_members} members ==")
    first_call(case, "rk4")
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
    print(f"ratio compiled / reference: {compiled / reference:6.2f}")
    print(f"speed-up compiled vs solve_ivp per member: {per_member_ivp / per_member_compiled:8.0f}"
          "   (target >= 1000)")
    return reference


def first_call(case: Case, method: str) -> None:
    """Load (or compile) a kernel by a first call on a few members."""
    small = case.subset(min(8, case.n_members))
    integrate_fixed_compiled(small.model, small.design, METHODS[method], STEP,
                             STEPS_PER_REPORT, 2, case.newton, 0.01)


COLD_COMPILE = textwrap.dedent("""
    import sys, time
    import numpy as np
    from ensemble.integrate.kernels.launch import integrate_fixed_compiled
    from ensemble.methods import METHODS
    from ensemble.model.lower import lower_model
    from ensemble.sampling import make_design
    from ensemble.scenario.load import load_scenario
    scenario = load_scenario(sys.argv[1], member_count=8)
    variant = scenario.variants[0]
    model = lower_model(scenario, variant)
    design = make_design(scenario, variant, model, np.arange(8))
    began = time.perf_counter()
    integrate_fixed_compiled(model, design, METHODS[sys.argv[2]], 0.25, 4, 2,
                             scenario.solver.newton, 0.01)
    print(time.perf_counter() - began)
""")


def cold_compile_seconds(path: Path, method: str, repeats: int = 2,
                         shared: bool = False) -> float:
    """Time to generate and compile the kernel of ``method`` for the scenario at ``path``
    in a fresh process whose kernel cache is an empty directory (imports excluded), the
    best of ``repeats``; with ``shared``, numba's cache is empty too, so the functions
    every kernel shares are compiled as well (the first use after installing)."""
    times = []
    for _ in range(repeats):
        with tempfile.TemporaryDirectory(prefix="ensemble-cold-") as cache:
            environment = dict(os.environ, ENSEMBLE_KERNEL_CACHE=cache)
            if shared:
                environment["NUMBA_CACHE_DIR"] = str(Path(cache) / "numba")
            done = subprocess.run([sys.executable, "-c", COLD_COMPILE, str(path), method],
                                  env=environment, capture_output=True, text=True,
                                  check=True)
            times.append(float(done.stdout.split()[-1]))
    return min(times)


def report_groups(directory: Path, groups: list[int], n_members: int) -> None:
    """The G-group table: compiled and plain kernel per member, their ratio, and the cold
    compile times."""
    print(f"\n== G-group SEIR, dense contacts, {DAYS} days, step {STEP}, RK4, {n_members} "
          f"members; numba threads {numba.get_num_threads()} ==")
    print("   G  states  compiled us/member  plain us/member  ratio (plain/compiled)  "
          "cold compile rk4 / backward-euler")
    for n_groups in groups:
        case = Case(directory, f"age{n_groups}", age_scenario(n_members, "rk4", n_groups),
                    n_members)
        first_call(case, "rk4")
        compiled = case.backend_rate(integrate_fixed_compiled)
        plain = case.reference_rate()
        cold = [cold_compile_seconds(case.path, method)
                for method in ("rk4", "backward-euler")]
        print(f"{n_groups:4d}  {case.model.n_states:6d}  {case.steps / compiled * 1e6:18.1f}  "
              f"{case.steps / plain * 1e6:15.1f}  {compiled / plain:21.2f}  "
              f"{cold[0]:8.1f} s / {cold[1]:5.1f} s")
    print("targets: ratio >= 0.5 on 16 and 32 groups; cold compile <= 10 s explicit, "
          "<= 20 s implicit")
    first = [cold_compile_seconds(case.path, method, repeats=1, shared=True)
             for method in ("rk4", "backward-euler")]
    print(f"the first kernel after installing ({groups[-1]} groups), the functions every "
          f"kernel shares compiled too: {first[0]:.1f} s rk4, {first[1]:.1f} s backward-euler")


def report_implicit(case: Case) -> None:
    """Cost per step of the implicit methods relative to RK4, compiled backend."""
    print(f"\n== implicit methods, compiled, {case.model.n_states} states, "
          f"{case.n_members} members ==")
    rk4 = case.backend_rate(integrate_fixed_compiled, "rk4")
    for method in (name for name, method in METHODS.items() if method.implicit):
        first_call(case, method)
        rate = case.backend_rate(integrate_fixed_compiled, method)
        print(f"{method:15s} {rate:10.3e} member-steps/s, cost per step / RK4's: "
              f"{rk4 / rate:6.2f}")


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


def measure_run(command: list[str], directory: Path,
                environment: dict[str, str] | None = None) -> RunMeasure:
    """Run ``command`` in ``directory``, sampling its process tree."""
    lines: list[tuple[float, str]] = []
    began = time.monotonic()
    process = subprocess.Popen(command, cwd=directory, stdout=subprocess.DEVNULL,
                               stderr=subprocess.PIPE, text=True, env=environment)
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


def run_command(path: Path, output: Path, members: int | None = None) -> list[str]:
    command = [sys.executable, "-m", "ensemble", "run", str(path), "--force",
               "--backend", "compiled", "--output", str(output)]
    return command + (["--members", str(members)] if members is not None else [])


def print_run(title: str, runs: list[RunMeasure], reference_seconds: float | None,
              target: str) -> None:
    best = min(runs, key=lambda run: run.wall)
    print(f"\n== end to end: {title} ==")
    print(f"exit status {best.returncode}, wall {best.wall:.1f} s (fastest of "
          f"{', '.join(f'{run.wall:.1f}' for run in runs)} s), peak memory of the process "
          f"tree {max(run.watch.peak for run in runs) / 1e9:.2f} GB, CPU time of the tree "
          f"{sum(best.watch.cpu.values()):.1f} s on {psutil.cpu_count()} cores")
    print(f"chunks planned at {best.seen('chunks to compute')}, every chunk saved at "
          f"{best.seen('every chunk saved')}, result written at {best.wall:5.1f} s")
    if reference_seconds is not None:
        print(f"the hand-written kernel doing the same integrations: {reference_seconds:.2f} s")
        print(f"ratio run / hand-written kernel: {best.wall / reference_seconds:6.1f}   "
              f"({target})")
    else:
        print(target)


def report_age_runs(directory: Path, case: Case, reference: float, repeats: int = 3) -> None:
    """``ensemble run`` of 4,096 and of 16 members of the 16-group model (its kernels
    cached by a first run) against the plain kernel doing the same integrations."""
    path = directory / "age-run.toml"
    path.write_text(age_scenario(4096, "rk4"))
    output = directory / "age-run.nc"
    measure_run(run_command(path, output, 16), directory)  # compile into the cache
    runs = [measure_run(run_command(path, output), directory) for _ in range(repeats)]
    reference = max(reference, case.reference_rate())
    seconds = 4096 * case.steps * 3 / reference
    print_run("ensemble run, 4,096 members of the 16-group SEIR, keep_members = false, "
              "step check on (h and h/2)", runs, seconds, "target <= 3")
    runs = [measure_run(run_command(path, output, 16), directory) for _ in range(repeats)]
    print_run("ensemble run, 16 members of the same model, kernels cached", runs, None,
              "target: within 3 s")


def report_seir_run(directory: Path, n_members: int, case: Case, reference: float,
                    repeats: int = 3) -> None:
    """``ensemble run`` on ``n_members`` SEIR members against (d) doing the same steps;
    the reference rate is the faster of (d) measured before and right after the runs
    (the machine's speed drifts, and the faster reference gives the stricter ratio)."""
    path = directory / "run.toml"
    path.write_text(seir_scenario(n_members))
    runs = [measure_run(run_command(path, directory / "run.nc"), directory)
            for _ in range(repeats)]
    reference = max(reference, case.reference_rate())
    seconds = n_members * DAYS * STEPS_PER_REPORT * 3 / reference
    print_run(f"ensemble run, {n_members} SEIR members, keep_members = false, step check "
              "on (h and h/2)", runs, seconds, "no target; formerly <= 5")


def report_large(directory: Path, n_members: int, case: Case, reference: float) -> None:
    """``ensemble run`` of ``n_members`` members of the 16-group model, once, with the
    largest size its work directory reached, each figure also scaled linearly to a
    million members."""
    path = directory / "large.toml"
    path.write_text(age_scenario(n_members, "rk4"))
    work = directory / "large.nc.partial"
    largest = [0]
    done = threading.Event()

    def watch_work() -> None:
        while not done.is_set():
            if work.exists():
                size = sum(f.stat().st_size for f in work.rglob("*") if f.is_file())
                largest[0] = max(largest[0], size)
            done.wait(5.0)

    watcher = threading.Thread(target=watch_work)
    watcher.start()
    run = measure_run(run_command(path, directory / "large.nc"), directory)
    done.set()
    watcher.join()
    seconds = n_members * case.steps * 3 / reference
    print_run(f"ensemble run, {n_members} members of the 16-group SEIR, keep_members = "
              "false, step check on", [run], seconds, "target (a million): within 30 "
              "minutes and 4 GB")
    scale = 1_000_000 / n_members
    print(f"work directory at most {largest[0] / 1e9:.1f} GB; scaled to a million members: "
          f"{run.wall * scale / 60:.0f} min, work directory {largest[0] * scale / 1e9:.0f} GB "
          f"(the hand-written kernel alone: {seconds * scale / 60:.1f} min)")


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--members", type=int, default=20480, help="members of the SEIR")
    parser.add_argument("--age-members", type=int, default=4096,
                        help="members of the G-group measurements")
    parser.add_argument("--groups", type=int, nargs="+", default=[4, 8, 16, 32])
    parser.add_argument("--run-members", type=int, default=200_000)
    parser.add_argument("--skip-run", action="store_true", help="skip the end-to-end runs")
    parser.add_argument("--run-only", action="store_true", help="only the end-to-end runs")
    parser.add_argument("--large", type=int, default=0, metavar="N",
                        help="also run N members of the 16-group model (1000000 for the "
                             "target), with a linear extrapolation to a million")
    options = parser.parse_args()
    print(f"numba threads: {numba.get_num_threads()}, cores: {psutil.cpu_count()}")
    with tempfile.TemporaryDirectory(prefix="ensemble-benchmark-") as temporary:
        directory = Path(temporary)
        seir = Case(directory, "seir", seir_scenario(options.members), options.members)
        age = Case(directory, "age", age_scenario(options.age_members, "rk4"),
                   options.age_members)
        if not options.run_only:
            report_seir(seir, 20, seir.subset(min(options.members, 4096)))
            report_groups(directory, options.groups, options.age_members)
            report_implicit(age.subset(min(options.age_members, 512)))
        if not options.skip_run:
            age_reference = age.reference_rate()
            report_age_runs(directory, age, age_reference)
            report_seir_run(directory, options.run_members, seir, seir.reference_rate())
            if options.large:
                report_large(directory, options.large, age, age_reference)
    return 0


if __name__ == "__main__":
    sys.exit(main())
