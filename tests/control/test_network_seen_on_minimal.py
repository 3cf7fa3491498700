"""`stimsteer network`'s channel figures are computed on the minimal realisation: the same numbers as on the padded
model (they depend on the Markov parameters only: Kalman 1963, Ho & Kalman 1966), in fewer states."""

import numpy as np
import pandas as pd

from stimsteer.control.commands import _network_write as nw
from tests.sysid.test_network_minimal import _padded


def test_channel_figures_come_from_the_minimal_realisation_and_equal_the_padded_models(rng, tmp_path, monkeypatch):
    model, n_min = _padded(rng)  # 7 states, 3 of them minimal
    seen = []
    real = nw.output_controllability
    monkeypatch.setattr(nw, "output_controllability", lambda m, **k: seen.append(m.n_states) or real(m, **k))
    nw.write_network_outputs(model, tmp_path / "net", max_set_size=2)
    assert seen == [n_min]
    sites = pd.read_csv(tmp_path / "net" / "site_controllability.csv").set_index("site")
    full = nw.site_output_controllability(model)  # the same figure on all 7 states
    # the padded states are exactly unreachable or unseen, so the two differ by rounding of the balancing
    # transformation: 1e-9 is the author's margin
    for name, h2 in zip(full.site_names, full.h2_squared):
        np.testing.assert_allclose(sites.loc[name, "h2_squared_to_channels"], h2, rtol=1e-9)
    h = pd.read_csv(tmp_path / "net" / "impulse_responses.csv")
    steps = int(h["step"].max()) + 1
    expected = model.impulse_response(steps)  # (steps, channels, sites)
    got = h.pivot_table(index="step", columns=["channel", "site"], values="response")
    for (channel, site), column in got.items():
        i, j = model.output_names.index(channel), model.input_names.index(site)
        np.testing.assert_allclose(column.to_numpy(), expected[:, i, j], atol=1e-9)


def test_with_a_finite_gramian_horizon_the_channel_figures_come_from_the_model_itself(rng, tmp_path, monkeypatch):
    # the truncation bound the command prints is that of the infinite-horizon Gramians (Glover 1984)
    model, _n_min = _padded(rng)
    seen = []
    real = nw.output_controllability
    monkeypatch.setattr(nw, "output_controllability", lambda m, **k: seen.append(m.n_states) or real(m, **k))
    nw.write_network_outputs(model, tmp_path / "net", max_set_size=2, gramian_steps=30)
    assert seen == [model.n_states]
