"""Parameters that are the same for every member are stored once per variant.

Reference: the project's reference (``ensemble/scenario/reference.md``, result file,
``param_<name>``): a parameter given as a number (or a number per group) in every
variant, or derived from such parameters alone, has no member dimension; a drawn
parameter, or one derived from a drawn one, keeps a value per member.  The expected
values are the scenario's own numbers and their arithmetic, computed here by hand.
"""

from __future__ import annotations

import numpy as np
import pytest

from ensemble import api
from ensemble.examples import sir_text
from support import load_text

EXTRA = """\
ratio = "beta / gamma"
drawn_scale = { dist = "uniform", low = 0.5, high = 1.5 }
scaled = "drawn_scale * gamma"
"""


@pytest.fixture(scope="module")
def dataset(tmp_path_factory):
    text = sir_text(members=6, days=5, beta=0.5, gamma=0.25)
    text = text.replace("gamma = 0.25\n", "gamma = 0.25\n" + EXTRA)
    text += '\n[[variants]]\nname = "usual"\n\n[[variants]]\nname = "slower"\n' \
            'parameters = { gamma = 0.2 }\n'
    scenario = load_text(tmp_path_factory.mktemp("constants"), text)
    return api.simulate(scenario, backend="numpy")


def test_given_and_derived_constants_have_no_member_dimension(dataset):
    for name, expected in [("beta", [0.5, 0.5]), ("gamma", [0.25, 0.2]),
                           ("ratio", [0.5 / 0.25, 0.5 / 0.2])]:
        variable = dataset[f"param_{name}"]
        assert variable.dims == ("variant",), name
        np.testing.assert_allclose(variable.values, expected, rtol=1e-15, err_msg=name)


def test_drawn_parameters_and_what_they_give_stay_per_member(dataset):
    drawn = dataset["param_drawn_scale"]
    scaled = dataset["param_scaled"]
    assert drawn.dims == scaled.dims == ("variant", "member")
    assert np.unique(drawn.values[0]).size == 6         # a draw per member
    np.testing.assert_allclose(scaled.values,
                               drawn.values * np.array([[0.25], [0.2]]), rtol=1e-15)
