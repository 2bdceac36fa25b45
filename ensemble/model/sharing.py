"""One copy of a lowered model per process, however many tasks carry it.

A run sends its model with every chunk's task, and the task system pickles the arguments
of each task apart (even to a worker thread of the same process).  Pickled field by field,
a 16-group model costs the driver about 25-50 ms of the interpreter lock per task, and
every copy that arrives is a new object, so that each chunk builds again what is built
once per model (the kernel's text, the next-generation machinery).

Pickled through :func:`reduce_shared` instead, a model is serialised once per process
into a payload named by its SHA-256 (FIPS 180-4); each task then carries that payload,
and the receiving process rebuilds the model from the first copy it gets and hands out
that same object for every later copy with the same digest.  A model is immutable, so
sharing the object changes nothing but the time.
"""

from __future__ import annotations

import dataclasses
import hashlib
import pickle
import threading
from typing import Any

RECENT_MODELS = 16
"""Models whose payload (sending) or object (receiving) a process keeps."""

_lock = threading.Lock()
_sent: dict[int, tuple[Any, str, bytes]] = {}
"""id(model) -> (model, digest, payload) of the models this process pickled."""
_received: dict[str, Any] = {}
"""digest -> model of the models this process rebuilt or pickled."""


def reduce_shared(model: Any) -> tuple:
    """``__reduce__`` of a frozen dataclass ``model``: rebuilt by :func:`shared_model`
    from its fields pickled once per process."""
    with _lock:
        known = _sent.get(id(model))
        if known is None or known[0] is not model:
            fields = tuple(getattr(model, field.name) for field in dataclasses.fields(model))
            payload = pickle.dumps((type(model), fields), protocol=pickle.HIGHEST_PROTOCOL)
            known = (model, hashlib.sha256(payload).hexdigest(), payload)
            _remember(_sent, id(model), known)
            _remember(_received, known[1], model)
    return shared_model, known[1:]


def shared_model(digest: str, payload: bytes) -> Any:
    """The model of ``payload`` (named by its ``digest``): the object this process already
    holds for that digest, else the one rebuilt from the payload."""
    with _lock:
        model = _received.get(digest)
    if model is not None:
        return model
    kind, fields = pickle.loads(payload)
    built = kind(*fields)
    with _lock:
        model = _received.get(digest)
        if model is None:       # not rebuilt by another thread meanwhile
            model = built
            _remember(_received, digest, model)
        _remember(_sent, id(model), (model, digest, payload))
    return model


def _remember(table: dict, key: object, value: object) -> None:
    """Store ``value`` under ``key``, emptying ``table`` first when it is full."""
    if key not in table and len(table) >= RECENT_MODELS:
        table.clear()
    table[key] = value
