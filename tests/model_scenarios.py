"""Small scenario files (illustrative, invented numbers) and helpers for the model tests."""

from __future__ import annotations

from pathlib import Path

import numpy as np

from ensemble.model import CompiledModel, compile_model
from ensemble.scenario.load import load_scenario
from ensemble.scenario.schema import Scenario

HEADER = """
[scenario]
name = "model-test"
days = 10
"""

SEIR = """
[model]
compartments = ["S", "E", "I", "R"]
population = 10000
initial = { S = "rest", I = 10 }

[[model.flows]]
name = "infection"
from = "S"
to = "E"
rate = "beta * S * I / N"

[[model.flows]]
from = "E"
to = "I"
rate = "E / latent_days"

[[model.flows]]
from = "I"
to = "R"
rate = "I / infectious_days"

[parameters]
R0 = { dist = "uniform", low = 1.2, high = 2.0 }
latent_days = 3.0
infectious_days = { dist = "gamma", mean = 5.0, sd = 1.0 }
beta = "R0 / infectious_days"
"""

AGE_SEIR = """
[model]
compartments = ["S", "E", "I", "R", "D"]
groups = ["child", "adult", "senior", "elder"]
population = [2000, 5000, 1500, 500]
initial = { S = "rest", I = [1, 2, 1, 0] }
exclude_from_N = ["D"]

[model.matrices]
contacts = [[8.0, 3.0, 1.0, 0.0],
            [3.0, 6.0, 2.0, 0.5],
            [1.0, 2.0, 3.0, 1.0],
            [0.0, 0.5, 1.0, 2.0]]

[[model.flows]]
name = "infection"
from = "S"
to = "E"
rate = "beta * susceptibility * S * (contacts @ (I / N))"

[[model.flows]]
from = "E"
to = "I"
rate = "E / latent_days"

[[model.flows]]
from = "I"
to = "R"
rate = "I * (1 - fatality) / infectious_days"

[[model.flows]]
from = "I"
to = "D"
rate = "I * fatality / infectious_days"

[parameters]
beta = { dist = "uniform", low = 0.02, high = 0.05 }
susceptibility = [0.6, 1.0, 1.0, 0.9]
fatality = { dist = "beta", mean = 0.01, sd = 0.004, per_group = true }
latent_days = 3.0
infectious_days = 5.0
"""

NONLINEAR = """
[model]
compartments = ["S", "I", "R"]
population = 1000
initial = { S = "rest", I = 5 }

[[model.flows]]
name = "infection"
from = "S"
to = "I"
rate = "beta * S ** 0.9 * I ** alpha / N + sqrt(S * I) * abs(I - R) / 1000 + exp(-I / 100) * log(1 + S)"

[[model.flows]]
name = "recovery"
from = "I"
to = "R"
rate = "min(I, capacity) * gamma + max(I - capacity, R / 10) * 0.01 + I ** (R / N) + 1.5 ** (I / 200)"

[[model.flows]]
name = "waning"
from = "R"
to = "S"
rate = "R * omega * (1 + sin(2 * pi * t / 365) * cos(R / 500) + 0.5 * sin(R / 300))"

[parameters]
beta = 0.4
alpha = 1.1
gamma = 0.2
capacity = 200
omega = 0.01
"""

VITAL = """
[model]
compartments = ["S", "E", "I", "R"]
population = 50000
initial = { S = "rest", I = 20 }

[[model.flows]]
name = "births"
to = "S"
rate = "birth_rate * N"

[[model.flows]]
name = "infection"
from = "S"
to = "E"
rate = "beta * seasonal * S * I / N"

[[model.flows]]
from = "E"
to = "I"
rate = "E / latent_days"

[[model.flows]]
from = "I"
to = "R"
rate = "I / infectious_days"

[[model.flows]]
from = "R"
to = "S"
rate = "R / immunity_days"

[[model.flows]]
name = "deaths_S"
from = "S"
rate = "death_rate * S"

[[model.flows]]
name = "deaths_E"
from = "E"
rate = "death_rate * E"

[[model.flows]]
name = "deaths_I"
from = "I"
rate = "(death_rate + disease_death) * I"

[[model.flows]]
name = "deaths_R"
from = "R"
rate = "death_rate * R"

[parameters]
beta = 0.5
amplitude = { dist = "uniform", low = 0.1, high = 0.3 }
seasonal = "1 + amplitude * cos(2 * pi * t / 365)"
latent_days = 2.0
infectious_days = 5.0
immunity_days = 300.0
birth_rate = 0.00004
death_rate = 0.00004
disease_death = 0.001
"""


def load(tmp_path: Path, body: str, file_name: str = "scenario.toml") -> Scenario:
    """The scenario of ``HEADER + body``, written to ``tmp_path`` and loaded."""
    path = tmp_path / file_name
    path.write_text(HEADER + body)
    return load_scenario(path)


def compiled(tmp_path: Path, body: str, variant: int = 0) -> CompiledModel:
    """The compiled model of ``HEADER + body`` for its ``variant``-th variant."""
    scenario = load(tmp_path, body)
    return compile_model(scenario, scenario.variants[variant])


def random_inputs(model: CompiledModel, members: int, seed: int = 1):
    """Positive random states (persons), parameters and schedule values for ``members``."""
    rng = np.random.default_rng(seed)
    population = np.repeat(model.population[None, :], len(model.compartments), axis=0)
    y = rng.uniform(0.05, 0.5, size=(model.n_states, members)) * population.reshape(-1, 1)
    p = rng.uniform(0.05, 1.0, size=(len(model.parameter_slots), members))
    s = rng.uniform(0.5, 1.5, size=(len(model.schedule_slots), members))
    return y, p, s
