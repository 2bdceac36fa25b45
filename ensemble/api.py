"""The Python API that notebooks and the command line call.

    >>> import ensemble
    >>> scenario = ensemble.load_scenario("scenarios/seir-demo.toml")   # doctest: +SKIP
    >>> path = ensemble.run(scenario)                                  # doctest: +SKIP
    >>> ds = ensemble.open_result(path)                                # doctest: +SKIP
"""

from __future__ import annotations
