"""The illustrative scenario texts of :mod:`ensemble.examples` load and mean what they say."""

from __future__ import annotations

import numpy as np
import pytest

from ensemble.examples import age_seir_text, seir_text
from ensemble.model import RateFunctions, lower_model
from support import load_text, random_inputs


@pytest.mark.parametrize("sampling", ["random", "latin-hypercube", "sobol"])
def test_seir_text_carries_its_settings(tmp_path, sampling):
    """Every argument of seir_text reaches the loaded scenario."""
    scenario = load_text(tmp_path, seir_text(members=7, days=12, method="heun", step=0.5,
                                             sampling=sampling, keep_members=False,
                                             output="town.nc", distancing=True))
    assert (scenario.member_count, scenario.days, scenario.solver.method) == (7, 12, "heun")
    assert float(scenario.solver.step) == 0.5
    assert scenario.sampling == sampling
    assert (scenario.output.path, scenario.output.keep_members) == ("town.nc", False)
    assert [variant.name for variant in scenario.variants] == ["no-change", "distancing"]
    assert len(load_text(tmp_path, seir_text()).variants) == 1


def test_age_seir_infection_is_the_contact_matrix_form(tmp_path):
    """Infection in group g is beta S_g sum_h C_gh I_h / N_h (Anderson & May 1991, ch. 9,
    from memory), computed here with numpy from random states; the matrix is read back
    exactly (repr of a float round-trips, Python language reference)."""
    rng = np.random.default_rng(3)
    contacts = rng.uniform(0.1, 3.0, size=(3, 3))
    scenario = load_text(tmp_path, age_seir_text(["young", "adult", "old"],
                                                 [1000, 2500, 800], contacts))
    np.testing.assert_array_equal(np.array(scenario.model.matrices["contacts"]), contacts)
    model = lower_model(scenario, scenario.variants[0])
    y, p, s = random_inputs(model, members=5)
    out = np.empty((model.n_flow_elements, 5))
    RateFunctions(model).rates(0.0, y, p, s, out)
    S, E, I, R = y.reshape(4, 3, 5)
    beta = p[model.parameter_slots.index("beta")]
    expected = beta * S * np.einsum("gh,hm->gm", contacts, I / (S + E + I + R))
    np.testing.assert_allclose(out[:3], expected, rtol=1e-12)
