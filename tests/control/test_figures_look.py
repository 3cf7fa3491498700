"""A look of our own (issue 18, item 9): response maps instead of an impulse-panel grid, allowed regions as shaded
bands instead of dotted limit lines, order choice as held-out error against order beside the singular values."""

import numpy as np
import pytest
import scipy.signal
from matplotlib.collections import QuadMesh
from matplotlib.patches import StepPatch

from stimsteer.control.cli import main
from stimsteer.control.figures.fit import order_choice_figure
from stimsteer.control.figures.network import impulse_response_figure, ranking_figure
from stimsteer.control.plants import LinearNetworkPlant, record_session
from stimsteer.sysid import InvalidParameterError, StateSpaceModel
from stimsteer.sysid.io import save_session
from stimsteer.sysid.network import impulse_responses


@pytest.fixture(scope="module")
def model():
    rng = np.random.default_rng(20261203)
    A = rng.standard_normal((4, 4))
    A *= 0.8 / np.max(np.abs(np.linalg.eigvals(A)))
    return StateSpaceModel(A=A, B=rng.standard_normal((4, 3)), C=rng.standard_normal((5, 4)), sample_rate_hz=250.0,
                           input_names=("s_a", "s_b", "s_c"), output_names=tuple(f"ch_{i}" for i in range(5)))


def test_response_maps_draw_one_channel_by_time_image_per_site_with_a_unit_colour_bar(model):
    h = impulse_responses(model, 30)
    # outside check: SciPy's dimpulse of the same (A, B, C, D) gives the responses the maps draw (SciPy,
    # scipy.signal.dimpulse)
    for j in range(3):
        _t, (ref,) = scipy.signal.dimpulse((model.A, model.B[:, [j]], model.C, np.zeros((5, 1)), 1.0), n=30)
        np.testing.assert_allclose(h[:, :, j], ref, atol=1e-12)
    fig = impulse_response_figure(h, model, (("uA",) * 3, ("uV",) * 5))
    maps = [ax for ax in fig.axes if ax.get_title().startswith("stimulating")]
    meshes = [c for ax in maps for c in ax.collections if isinstance(c, QuadMesh)]
    assert len(meshes) == 3  # one image per site, not 15 panels
    for j, mesh in enumerate(meshes):
        np.testing.assert_allclose(np.asarray(mesh.get_array()).reshape(5, 30), h[:, :, j].T)
    labels = [ax.get_ylabel() for ax in fig.axes]
    assert any("µV per µA" in lb for lb in labels)  # the colour bar's unit: a response per unit of stimulation
    assert all("[s]" in ax.get_xlabel() for ax in fig.axes if ax.collections and ax.get_xlabel())


def test_ranking_bars_use_a_plain_axis_unless_the_values_span_orders_of_magnitude():
    assert ranking_figure(["a", "b", "c"], np.array([3.0, 2.0, 1.5]), "t", "x").axes[0].get_xscale() == "linear"
    assert ranking_figure(["a", "b"], np.array([1e4, 1.0]), "t", "x").axes[0].get_xscale() == "log"


def test_the_plan_figure_shades_allowed_regions_instead_of_dotted_limit_lines(tmp_path, saved_figures):
    A = np.diag([0.5, 0.7])
    m = StateSpaceModel(A=A, B=np.eye(2), C=np.eye(2), sample_rate_hz=100.0, input_names=("s0", "s1"),
                        output_names=("y0", "y1"), past_steps=2)
    from stimsteer.sysid.storage import save_predictor

    save_predictor(m, tmp_path / "m.h5", provenance={})
    (tmp_path / "l.toml").write_text("[inputs.s0]\namplitude_min_ua = -1.0\namplitude_max_ua = 2.0\n"
                                     "[inputs.s1]\namplitude_min_ua = -1.0\namplitude_max_ua = 1.0\n"
                                     "[outputs.y1]\nmax = 0.5\n")
    assert main(["plan", str(tmp_path / "m.h5"), "--target", "y0=1", "--limits", str(tmp_path / "l.toml"),
                 "--horizon-steps", "6", "--out", str(tmp_path / "p")]) == 0
    fig = saved_figures[-1]
    strips = [ax for ax in fig.axes if ax.get_ylabel().endswith("[µA]")]
    assert len(strips) == 2
    for ax, (lo, hi) in zip(strips, ((-1.0, 2.0), (-1.0, 1.0))):
        band = [p for p in ax.patches if isinstance(p, StepPatch) and p.get_fill()]
        assert len(band) == 1
        values, _edges, baseline = band[0].get_data()
        np.testing.assert_allclose(values, hi)
        np.testing.assert_allclose(baseline, lo)
    assert not [ln for ax in fig.axes for ln in ax.get_lines() if ln.get_linestyle() == ":"]


@pytest.fixture(scope="module")
def session_file(tmp_path_factory):
    rng = np.random.default_rng(20261204)
    A = rng.standard_normal((3, 3))
    A *= 0.7 / np.max(np.abs(np.linalg.eigvals(A)))
    plant = LinearNetworkPlant(A, rng.standard_normal((3, 2)), rng.standard_normal((2, 3)), process_noise_std=0.01,
                               measurement_noise_std=0.02, sample_rate_hz=100.0, seed=4)
    session = record_session(plant, rng.uniform(-1, 1, (1200, 2)), trials=[(i * 200, (i + 1) * 200) for i in range(6)])
    path = tmp_path_factory.mktemp("order") / "s.h5"
    save_session(session, path)
    return path


def test_fit_writes_the_order_choice_as_error_against_order_beside_the_singular_values(session_file, tmp_path):
    from stimsteer.sysid import load_predictor

    assert main(["fit", str(session_file), "--route", "indirect", "--method", "subspace", "--out",
                 str(tmp_path / "m.h5"), "--past-steps", "5", "--horizon-steps", "5", "--order-figure",
                 str(tmp_path / "order.png")]) == 0
    assert (tmp_path / "order.png").read_bytes().startswith(b"\x89PNG")
    table = load_predictor(tmp_path / "m.h5")[0].order_table_
    fig = order_choice_figure(table, "indirect route, subspace")
    left, right = fig.axes
    np.testing.assert_allclose(left.get_lines()[0].get_ydata(), table.sort_values("order")["heldout_error"])
    np.testing.assert_allclose(right.get_lines()[0].get_ydata(), table.sort_values("order")["singular_value"])
    assert right.get_yscale() == "linear" and "order" in fig._suptitle.get_text()


def test_an_order_figure_for_a_method_without_an_order_is_refused_and_nothing_is_written(session_file, tmp_path,
                                                                                         capsys):
    assert main(["fit", str(session_file), "--route", "indirect", "--method", "arx", "--out", str(tmp_path / "m.h5"),
                 "--past-steps", "3", "--order-figure", str(tmp_path / "order.png")]) == 2
    assert "--order-figure" in capsys.readouterr().err
    assert not (tmp_path / "m.h5").exists() and not (tmp_path / "order.png").exists()
    with pytest.raises(InvalidParameterError, match="chose no model order"):
        order_choice_figure(__import__("pandas").DataFrame({"alpha": [1.0]}))


def test_the_largest_gap_note_stays_inside_its_panel_below_the_title():
    # layout check (common practice, no source): a label must not cover the panel title; the singular values here
    # (chosen) put the largest gap after order 1, at the top of the panel, where the note once ran into the title
    import pandas as pd

    table = pd.DataFrame({"order": np.arange(1, 11), "singular_value": [6.9, 1.8, 1.6, 1.5, 1.0, 0.8, 0.8, 0.7, 0.5,
                                                                         0.45],
                          "heldout_error": np.linspace(0.5, 0.1, 10), "stable": True,
                          "selected": np.arange(1, 11) == 9})
    fig = order_choice_figure(table, "indirect route, subspace")
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    canvas = FigureCanvasAgg(fig)
    canvas.draw()
    renderer = canvas.get_renderer()
    right = fig.axes[1]
    note = [t for t in right.texts if "largest gap" in t.get_text()]
    assert len(note) == 1
    box, title, panel = (note[0].get_window_extent(renderer), right.title.get_window_extent(renderer),
                         right.get_window_extent(renderer))
    assert not box.overlaps(title)
    assert panel.x0 <= box.x0 and box.x1 <= panel.x1 and panel.y0 <= box.y0 and box.y1 <= panel.y1


def test_a_quick_response_with_a_long_quiet_tail_is_drawn_on_a_time_axis_that_shows_it(model):
    # a fast pair of modes and a slow one of tiny gain (a fitted model at 1 kHz: 99% of the energy in 25 ms of a 4 s
    # window): the maps keep the first samples on a linear axis, the tail on a logarithmic one, and take the colour
    # scale from where the energy is; responses spread over the window keep the plain axis (common practice, no
    # source: a log time axis for multi-scale responses)
    from stimsteer.control.figures import network as figs

    A = np.diag([0.8, -0.7, 0.999])
    fast = StateSpaceModel(A=A, B=np.array([[1.0], [1.0], [0.01]]), C=np.ones((2, 3)), sample_rate_hz=1000.0,
                           input_names=("s",), output_names=("a", "b"))
    h = impulse_responses(fast, 2000)
    energy = np.cumsum(np.sum(h * h, axis=(1, 2)))
    k = int(np.searchsorted(energy, 0.99 * energy[-1])) + 1  # the reference: 99% of the energy by sample k
    assert k < 0.1 * 2000
    fig = impulse_response_figure(h, fast)
    ax = [a for a in fig.axes if a.get_title().startswith("stimulating")][0]
    assert ax.get_xscale() == "symlog" and ax.get_xlim() == pytest.approx((0.0, 2.0))
    assert figs._early_span(h, 1000.0) == pytest.approx(k / 1000.0)
    scale = float(np.percentile(np.abs(h[:k]), 99.5))
    assert ax.collections[0].get_clim() == pytest.approx((-scale, scale))
    assert f"time linear to {k / 1000.0:.3g} s" in fig._suptitle.get_text()
    slow = impulse_responses(model, 30)  # decays over the whole window: a plain axis
    plain = impulse_response_figure(slow, model)
    assert all(a.get_xscale() == "linear" for a in plain.axes if a.get_title().startswith("stimulating"))


def test_the_site_ranking_names_the_squared_norms_unit_when_the_model_has_one():
    # a squared H2 norm is (output unit)² per (input unit)² per sample (common practice, no source: units of a
    # sum of squared impulse-response samples); mixed units keep the generic wording
    from stimsteer.control.figures.network import squared_response_unit

    assert squared_response_unit((("uA", "uA"), ("uV",) * 3)) == "µV² per µA² per sample"
    assert squared_response_unit((("uA", "mA"), ("uV",) * 3)) == "output units² per input unit² per sample"
    assert squared_response_unit(None) == "output units² per input unit² per sample"


@pytest.mark.parametrize("n_sites", [1, 2, 3, 4])
def test_the_first_channel_is_on_top_whatever_the_number_of_sites(n_sites):
    # the maps share their channel axis: inverting it once per site turned it back for every even count (seen with
    # two sites: the first channel at the bottom)
    mod = StateSpaceModel(A=np.diag([0.5, 0.6]), B=np.ones((2, n_sites)), C=np.eye(2), sample_rate_hz=100.0)
    fig = impulse_response_figure(impulse_responses(mod, 30), mod)
    for ax in (a for a in fig.axes if a.get_title().startswith("stimulating")):
        assert ax.get_ylim() == (2.0, 0.0)
