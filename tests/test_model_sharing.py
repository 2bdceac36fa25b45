"""A lowered model pickled for every task of a run is one object in each process
(ensemble/model/sharing.py): the copies a process receives are the object it first
rebuilt, whose every field equals the sender's; a model with other numbers stays apart.
Reference: the fields of the model that was pickled (Python's pickle, which rebuilds
them, is the outside party)."""

from __future__ import annotations

import dataclasses
import pickle
import subprocess
import sys

import numpy as np

from ensemble.examples import seir_text
from ensemble.model import sharing
from ensemble.run.layout import lowered_models
from support import load_text


def _model(tmp_path, population: int):
    return lowered_models(load_text(tmp_path, seir_text(members=4, population=population)))[0]


def _assert_same_fields(left, right) -> None:
    for field in dataclasses.fields(left):
        a, b = getattr(left, field.name), getattr(right, field.name)
        if isinstance(a, np.ndarray):
            np.testing.assert_array_equal(a, b)
        else:
            assert a == b, field.name


def test_copies_received_are_one_object_equal_to_the_model_sent(tmp_path, monkeypatch):
    model = _model(tmp_path, 50000)
    payload = pickle.dumps(model)
    assert pickle.loads(payload) is model       # the sender holds it already
    monkeypatch.setattr(sharing, "_received", {})   # as in a process that never saw it
    monkeypatch.setattr(sharing, "_sent", {})
    first = pickle.loads(payload)
    assert first is not model
    _assert_same_fields(first, model)
    assert pickle.loads(payload) is first
    assert pickle.loads(pickle.dumps(first)) is first

    other = _model(tmp_path, 60000)
    received = pickle.loads(pickle.dumps(other))
    assert received is other and received is not first
    assert not np.array_equal(received.population, first.population)


def test_another_process_rebuilds_the_same_fields(tmp_path):
    model = _model(tmp_path, 50000)
    code = ("import pickle, sys; model = pickle.loads(sys.stdin.buffer.read()); "
            "sys.stdout.buffer.write(pickle.dumps("
            "[model.state_labels, model.rates, model.population.tolist()]))")
    done = subprocess.run([sys.executable, "-c", code], input=pickle.dumps(model),
                          capture_output=True, check=True)
    labels, rates, population = pickle.loads(done.stdout)
    assert labels == model.state_labels and rates == model.rates
    assert population == model.population.tolist()
