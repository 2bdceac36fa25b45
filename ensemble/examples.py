"""Illustrative scenario texts with invented numbers, for notebooks, tests and scripts.

Every population, contact rate and parameter range below is made up: the texts show the
shape of a scenario file (the project's reference, ``ensemble/scenario/reference.md``) at
a chosen size, not any real epidemic.  Write one to a ``.toml`` file and load it with
:func:`ensemble.scenario.load.load_scenario`, or pass the file to ``ensemble run``.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

_SEIR_FLOWS = """\
[[model.flows]]
name = "infection"
from = "S"
to = "E"
rate = "{infection}"

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
"""

_DISTANCING = """
[[variants]]
name = "no-change"

[[variants]]
name = "distancing"
parameters = { contact_scale = { schedule = [[0, 1.0], [10, 0.6]], between = "step" } }
"""


def _toml_list(values: Sequence[object]) -> str:
    """``values`` as a one-line TOML array (strings quoted, floats by repr)."""
    return "[" + ", ".join(f'"{v}"' if isinstance(v, str) else repr(v) for v in values) + "]"


def seir_text(*, members: int = 40, days: int = 30, method: str = "rk4", step: float = 0.25,
              sampling: str = "latin-hypercube", population: int = 10000, seed: int = 11,
              distancing: bool = False, output: str = "result.nc", keep_members: bool = True,
              name: str = "example-seir",
              title: str = "Illustrative SEIR town, invented numbers") -> str:
    """An SEIR scenario (one population, invented numbers) as TOML text.

    R0, the latent and infectious periods and the number of first infectious persons are
    drawn per member; ``beta = R0 / infectious_days`` is the transmission rate of the
    classic SEIR model with mean infectious period D, R0 = beta D (Anderson & May 1991,
    Infectious Diseases of Humans, ch. 2 -- from memory).

    Parameters
    ----------
    members, days
        Ensemble size and horizon (days).
    method, step
        Fixed-step method of ``[solver]`` and its step (days).
    sampling
        Design method of ``[sampling]`` (``random``, ``latin-hypercube`` or ``sobol``).
    population, seed
        Total population and random seed of the design.
    distancing
        Add two variants: ``no-change`` and ``distancing`` (contacts cut to 60 % from
        day 10 by a step schedule of ``contact_scale``).
    output, keep_members
        Result path and whether it keeps every member's trajectories (``[output]
        keep_members``).
    name, title
        ``[scenario]`` name and title.
    """
    variants = _DISTANCING if distancing else ""
    return f"""\
[scenario]
name = "{name}"
title = "{title}"
days = {days}
members = {members}
seed = {seed}

[model]
compartments = ["S", "E", "I", "R"]
population = {population}
initial = {{ S = "rest", E = 10, I = "seed_infectious" }}

{_SEIR_FLOWS.format(infection="beta * contact_scale * S * I / N")}
[parameters]
R0 = {{ dist = "uniform", low = 1.3, high = 2.5 }}
latent_days = {{ dist = "gamma", mean = 3.0, sd = 0.8 }}
infectious_days = {{ dist = "lognormal", mean = 5.0, sd = 1.2 }}
seed_infectious = {{ dist = "uniform", low = 2, high = 20 }}
beta = "R0 / infectious_days"
contact_scale = 1.0

[sampling]
method = "{sampling}"
{variants}
[solver]
method = "{method}"
step = {step}

[output]
path = "{output}"
keep_members = {str(keep_members).lower()}
"""


def sir_text(*, members: int = 10, days: int = 100, population: float = 10000,
             infectious: float = 10, beta: float = 0.5, gamma: float = 0.25,
             method: str = "rk4", step: float = 0.25, report_every: float = 1,
             seed: int = 1, name: str = "example-sir") -> str:
    """A closed SIR scenario with fixed rates (invented numbers) as TOML text.

    S' = -beta S I / N, I' = beta S I / N - gamma I, R' = gamma I, so R0 = beta / gamma
    (Kermack & McKendrick 1927, Proc. R. Soc. A 115:700-721); the flows are named
    ``infection`` and ``recovery``.

    Parameters
    ----------
    members, days, method, step, seed, name
        As in :func:`seir_text`.
    population, infectious
        Total population and infectious persons at the start (the rest susceptible).
    beta, gamma
        Transmission and recovery rates, per day.
    report_every
        Days between reported times.
    """
    return f"""\
[scenario]
name = "{name}"
title = "Illustrative closed SIR, invented numbers"
days = {days}
members = {members}
seed = {seed}

[model]
compartments = ["S", "I", "R"]
population = {population}
initial = {{ S = "rest", I = {infectious} }}

[[model.flows]]
name = "infection"
from = "S"
to = "I"
rate = "beta * S * I / N"

[[model.flows]]
name = "recovery"
from = "I"
to = "R"
rate = "gamma * I"

[parameters]
beta = {beta}
gamma = {gamma}

[solver]
method = "{method}"
step = {step}
report_every = {report_every}
"""


def age_seir_text(groups: Sequence[str], population: Sequence[float], contacts: np.ndarray,
                  *, members: int = 100, days: int = 10, method: str = "rk4",
                  step: float = 0.25, seed: int = 1, name: str = "example-age-seir") -> str:
    """An age-structured SEIR scenario (invented numbers) as TOML text.

    Group g is infected at ``beta * S_g * sum_h contacts[g, h] I_h / N_h`` (the
    who-acquires-infection-from-whom form of Anderson & May 1991, ch. 9 -- from memory),
    with one infectious person per group at the start and ``beta`` drawn per member.

    Parameters
    ----------
    groups, population
        Group names and their populations.
    contacts
        (G, G) contacts per day of a person of group g with group h.
    members, days, method, step, seed, name
        As in :func:`seir_text`.
    """
    rows = ",\n            ".join(_toml_list([float(v) for v in row]) for row in contacts)
    return f"""\
[scenario]
name = "{name}"
title = "Illustrative {len(groups)}-group SEIR, invented numbers"
days = {days}
members = {members}
seed = {seed}

[model]
compartments = ["S", "E", "I", "R"]
groups = {_toml_list(list(groups))}
population = {_toml_list(list(population))}
initial = {{ S = "rest", I = {_toml_list([1] * len(groups))} }}

[model.matrices]
contacts = [{rows}]

{_SEIR_FLOWS.format(infection="beta * S * (contacts @ (I / N))")}
[parameters]
beta = {{ dist = "uniform", low = 0.01, high = 0.03 }}
latent_days = 3.0
infectious_days = 5.0

[solver]
method = "{method}"
step = {step}
"""
