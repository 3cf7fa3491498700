"""Messages a user of the command line can act on (issue 12, items 7 and 9): the flags they typed, not the API's
parameter names; an unparsable scheduler address at once; records that name files that exist; channel names in any
script without matplotlib's glyph warnings."""

import json
import warnings

import numpy as np
import pytest

from stimsteer.control.cli import main
from stimsteer.control.demo import _record_final_paths
from stimsteer.control.evaluation.execute import check_scheduler_address
from stimsteer.control.figures._glyphs import GlyphSafeFigure, _charmap, _font_with, undrawable
from stimsteer.demo_data import demo_file
from stimsteer.sysid import InvalidParameterError, Session, save_session

LIMITS = str(demo_file("demo_limits.toml"))


def _one_line(capsys):
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1, err
    return err[0]


@pytest.mark.parametrize("extra, flag, api", [
    (["--rate-hz", "-5"], "--rate-hz must be positive", "sample_rate_hz"),
    (["--kind", "multilevel", "--levels", "1"], "--levels must be a whole number >= 2", "n_levels"),
    # the demo's amplitude window is 0..50 µA with a slew of 15 per step: spacing 50 / (levels - 1) <= 15 needs
    # levels >= 1 + 50 / 15, i.e. 5 (it was 8 for the signed -50..50 window of the old demo)
    (["--kind", "multilevel", "--levels", "2", "--rate-hz", "250"], "(--levels >= 5)", "n_levels"),
    (["--trial-s", "0"], "--trial-s must be positive", "trial_s"),
    (["--kind", "pulses", "--pulse-rate-hz", "900"], "give --pulse-rate-hz <= 500", "pulse_rate_hz"),
])
def test_schedule_messages_name_the_flags_not_the_api_parameters(extra, flag, api, tmp_path, capsys):
    out = tmp_path / "s.csv"
    assert main(["schedule", "--limits", LIMITS, "--inputs", "3", "--order", "30", *extra, "--out", str(out)]) == 2
    line = _one_line(capsys)
    assert flag in line and api not in line
    assert list(tmp_path.iterdir()) == []


@pytest.mark.parametrize("address, why", [("tcp://no such host:abc", "contains spaces"),
                                          ("tcp://host:abc", "the port 'abc' is not a number"),
                                          ("tcp://host:0", "between 1 and 65535"),
                                          ("htp://host:8786", "unknown protocol 'htp'"),
                                          ("host", "expected a host and a port")])
def test_an_unparsable_scheduler_address_is_refused_at_once_before_reading_anything(address, why, tmp_path, capsys,
                                                                                    monkeypatch):
    # no Dask client is ever made for it: a failed one waited ~20 s in its clean-up and printed a 10-line traceback
    distributed = pytest.importorskip("distributed")
    monkeypatch.setattr(distributed, "Client", lambda *a, **k: pytest.fail("a client was made for a bad address"))
    out = tmp_path / "report"
    assert main(["bench", str(tmp_path / "missing.h5"), "--out", str(out), "--scheduler", address]) == 2
    line = _one_line(capsys)
    assert f"--scheduler {address!r} is not a scheduler address: " in line and why in line
    assert "missing.h5" not in line  # refused before the session was read
    assert list(tmp_path.iterdir()) == []


def test_a_well_formed_scheduler_address_passes_the_check():
    assert check_scheduler_address("tcp://127.0.0.1:8786") == "tcp://127.0.0.1:8786"
    assert check_scheduler_address("127.0.0.1:8786") == "tcp://127.0.0.1:8786"
    assert check_scheduler_address("tls://[::1]:8786") == "tls://[::1]:8786"
    with pytest.raises(InvalidParameterError, match="tcp://HOST:PORT"):
        check_scheduler_address("tcp://")


def test_the_demos_records_name_the_final_folder_not_the_temporary_one(tmp_path):
    tmp, out = tmp_path / ".demo.x1y2", tmp_path / "demo"
    (tmp / "plan_direct").mkdir(parents=True)
    record = {"model_file": str(tmp / "models" / "direct_hankel.h5"), "limits_file": "/shipped/limits.toml",
              "nested": [{"path": str(tmp)}], "value": 1.5, "other": str(tmp) + "-not-inside"}
    (tmp / "plan_direct" / "plan.json").write_text(json.dumps(record, indent=2))
    _record_final_paths(tmp, out)
    fixed = json.loads((tmp / "plan_direct" / "plan.json").read_text())
    assert fixed == {**record, "model_file": str(out / "models" / "direct_hankel.h5"), "nested": [{"path": str(out)}]}


# ------------------------------------------------------------------------------------------ names in any script
CJK = ("通道1", "通道2")  # "channel 1", "channel 2": characters DejaVu Sans, matplotlib's default font, lacks


def _figure(label):
    fig = GlyphSafeFigure(layout="constrained")
    ax = fig.add_subplot()
    ax.plot([0.0, 1.0])
    ax.set_ylabel(f"{label} [µV]")
    return fig


def test_names_no_installed_font_has_are_drawn_without_warnings_and_said_in_a_caption(tmp_path):
    if not undrawable(CJK):
        pytest.skip("an installed font has these characters: the fallback test below covers this machine")
    fig = _figure(CJK[0])
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # a glyph warning fails the test
        fig.savefig(tmp_path / "f.png")
        fig.savefig(tmp_path / "g.png")  # saved twice: one caption
    captions = [t.get_text() for t in fig.texts]
    assert len(captions) == 1 and "U+901A, U+9053" in captions[0] and "could not" not in captions[0]
    assert "no installed font has" in captions[0]


def test_a_name_an_installed_font_has_is_drawn_with_that_font():
    # find a character the default font lacks and another installed font has (STIX ships with matplotlib)
    from matplotlib import font_manager
    default = _charmap(font_manager.findfont(font_manager.FontProperties()))
    candidates = [chr(c) for c in range(0x2100, 0x2BFF) if c not in default and _font_with(frozenset([chr(c)]))]
    if not candidates:
        pytest.skip("no installed font has a character the default font lacks")
    fig = _figure(f"x{candidates[0]}")
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        fig.savefig(__import__("io").BytesIO(), format="png")
    label = fig.axes[0].yaxis.label
    assert _font_with(frozenset([candidates[0]])) in label.get_fontfamily() and not fig.texts


@pytest.fixture(scope="module")
def cjk_model(tmp_path_factory, seed):
    """A session whose channels are named in Chinese, and an ARX model fitted on it through the command line."""
    rng = np.random.default_rng(seed)
    n_trials, n = 8, 300
    u = rng.normal(size=(n_trials * n, 1))
    y = np.zeros((n_trials * n, 2))
    for k in range(1, y.shape[0]):  # a stable first-order response (known by construction)
        y[k] = 0.8 * y[k - 1] + np.array([1.0, -0.5]) * u[k - 1, 0] + 0.01 * rng.normal(size=2)
    trials = np.array([(i * n, (i + 1) * n) for i in range(n_trials)])
    where = tmp_path_factory.mktemp("cjk")
    session = Session(u=u, y=y, sample_rate_hz=250.0, trials=trials, input_names=("刺激",), output_names=CJK,
                      input_units=("uA",), output_units=("uV", "uV"))
    save_session(session, where / "s.h5")
    assert main(["fit", str(where / "s.h5"), "--route", "indirect", "--method", "arx", "--past-steps", "2",
                 "--horizon-steps", "5", "--out", str(where / "m.h5")]) == 0
    (where / "p.csv").write_text("time [s] @ 250 Hz,in:刺激 [uA]\n" + "".join(f"{k / 250:g},{k % 7}\n"
                                                                              for k in range(50)))
    return where


def test_predict_with_chinese_channel_names_prints_no_glyph_warning(cjk_model, tmp_path, capsys):
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        assert main(["predict", str(cjk_model / "m.h5"), "--pattern", str(cjk_model / "p.csv"),
                     "--out", str(tmp_path / "p")]) == 0
    assert not [w for w in caught if "Glyph" in str(w.message)]
    assert "Glyph" not in capsys.readouterr().err
    assert (tmp_path / "p" / "prediction.png").stat().st_size > 0


def test_a_missing_file_is_named_with_the_argument_that_gave_it(tmp_path, capsys):
    missing = tmp_path / "no_such_limits.toml"
    code = main(["schedule", "--limits", str(missing), "--inputs", "3", "--past-steps", "10", "--horizon-steps", "20",
                 "--states", "12", "--rate-hz", "250", "--trials", "4", "--trial-s", "1", "--rest-s", "0.5",
                 "--out", str(tmp_path / "s.csv")])
    assert code == 2
    line = _one_line(capsys)
    assert f"{missing} (the limits argument); check the path" in line
