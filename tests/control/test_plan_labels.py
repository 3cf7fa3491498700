"""End labels of the plan figure's output traces do not overlap (the last session's note: rec_04 over rec_06, rec_07
over rec_03 in the demo's plan), and the spreading is the least-squares placement it claims to be."""

import numpy as np
import pytest
from matplotlib.backends.backend_agg import FigureCanvasAgg
from sklearn.isotonic import IsotonicRegression

from stimsteer.control.cli import main
from stimsteer.control.figures._labels import spread
from stimsteer.sysid import StateSpaceModel
from stimsteer.sysid.storage import save_predictor


@pytest.mark.parametrize("seed", range(5))
def test_spread_is_the_isotonic_regression_of_the_shifted_ends(seed):
    # Reference: scikit-learn's IsotonicRegression (Pedregosa et al. 2011, "Scikit-learn: machine learning in
    # Python", JMLR 12:2825) on z_i = y_(i) - i * gap gives the least-squares non-decreasing fit; the labels are
    # that fit plus i * gap (Barlow et al. 1972, ch. 1).
    rng = np.random.default_rng(seed)
    y = rng.normal(size=12) * 3.0
    gap = 1.3
    got = spread(y, gap)
    order = np.argsort(y, kind="stable")
    steps = gap * np.arange(y.size)
    reference = IsotonicRegression().fit_transform(np.arange(y.size), y[order] - steps) + steps
    np.testing.assert_allclose(got[order], reference, rtol=0, atol=1e-12)
    assert np.all(np.diff(got[order]) >= gap - 1e-12)


def test_spread_leaves_labels_that_are_far_apart_where_they_are_and_keeps_them_in_the_room():
    np.testing.assert_array_equal(spread([0.0, 5.0, -7.0], 1.0), [0.0, 5.0, -7.0])
    at = spread([9.9, 10.0, 10.0], 1.0, lo=0.0, hi=10.0)
    assert at.max() <= 10.0 + 1e-12 and np.all(np.diff(np.sort(at)) >= 1.0 - 1e-12)


def test_the_plan_figures_end_labels_do_not_overlap_when_traces_end_together(tmp_path, saved_figures):
    # three outputs that read nearly the same state: driven to the same target, their traces end together
    C = np.array([[1.0, 0.0], [1.0, 1e-3], [1.0, -1e-3]])
    m = StateSpaceModel(A=np.diag([0.5, 0.7]), B=np.eye(2), C=C, sample_rate_hz=100.0, input_names=("s0", "s1"),
                        output_names=("y0", "y1", "y2"), past_steps=2)
    save_predictor(m, tmp_path / "m.h5", provenance={})
    (tmp_path / "l.toml").write_text("[inputs.s0]\namplitude_min_ua = -5.0\namplitude_max_ua = 5.0\n"
                                     "[inputs.s1]\namplitude_min_ua = -5.0\namplitude_max_ua = 5.0\n")
    assert main(["plan", str(tmp_path / "m.h5"), "--target", "y0=1,y1=1,y2=1", "--limits", str(tmp_path / "l.toml"),
                 "--horizon-steps", "8", "--out", str(tmp_path / "p")]) == 0
    fig = saved_figures[-1]
    canvas = FigureCanvasAgg(fig)  # matplotlib's own canvas: the layout and text boxes as any viewer draws them
    canvas.draw()
    renderer = canvas.get_renderer()
    labels = [t for ax in fig.axes for t in ax.texts if t.get_text().startswith(("y0 (", "y1 (", "y2 ("))]
    assert len(labels) == 3
    boxes = [t.get_window_extent(renderer) for t in labels]
    ends = sorted(b.y0 for b in boxes)
    assert ends[-1] - ends[0] > 0  # they were moved apart: without it all three sit at the same height
    for i in range(3):
        for j in range(i + 1, 3):
            assert not boxes[i].overlaps(boxes[j]), (labels[i].get_text(), labels[j].get_text())
