"""Parameter design: uniform draws, distributions, derived values, initial states.

The distribution families themselves are :mod:`ensemble.distributions`.

- :mod:`~ensemble.sampling.uniform`: one uniform column per uncertain parameter element
  (random, Latin hypercube, Sobol'), independent of chunking;
- :mod:`~ensemble.sampling.design`: :class:`Design` and :func:`make_design` (derived
  values and initial states through the model's values constant in time).
"""

from ensemble.sampling.design import Design, make_design

__all__ = ["Design", "make_design"]
