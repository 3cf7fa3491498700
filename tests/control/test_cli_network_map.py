"""`stimsteer network --map`: network maps, map-constrained fits and conditions, run as a user would."""

import hashlib

import numpy as np
import pandas as pd
import pytest

from stimsteer.control.cli import CAUTION, main
from stimsteer.sysid import Session, save_session

NAMES = ("v1", "v2", "pfc", "amy")
W = np.array([[0, 2, 1, 0], [2, 0, 0, 1], [1, 0, 0, 3], [0, 1, 3, 0]], dtype=float)


@pytest.fixture
def map_file(tmp_path):
    path = tmp_path / "map.csv"
    rows = ["," + ",".join(NAMES)] + [f"{n}," + ",".join(str(x) for x in r) for n, r in zip(NAMES, W)]
    path.write_text("\n".join(rows) + "\n")
    return path


def test_a_map_gives_every_figure_with_the_node_figures(map_file, tmp_path, capsys):
    out = tmp_path / "net"
    assert main(["network", "--map", str(map_file), "--stimulated", "v1,amy", "--normalisation", "sigma",
                 "--target", "1,0,0,0.5", "--out", str(out)]) == 0
    printed = capsys.readouterr().out
    assert "network map: the states are the map's nodes" in printed and CAUTION in printed
    state = pd.read_csv(out / "state_controllability.csv")
    An = W / (1 + np.linalg.norm(W, 2))
    # Gu et al. (2015), Methods: modal controllability 1 - sum_k A_ik² for symmetric A (nodes v1 and amy)
    np.testing.assert_allclose(state["modal_controllability"], (1 - np.sum(An ** 2, axis=1))[[0, 3]], atol=1e-9)
    assert set(state["coordinates"]) == {"network map: the states are the map's nodes"}
    table = pd.read_csv(out / "controllability.csv").set_index("quantity")["value"]
    assert table["normalisation"].startswith("A / (1 + sigma_max(A))") and table["time"] == "discrete"
    for name in ("site_ranking.csv", "transition.csv", "site_sets.csv", "gramian_spectrum.png"):
        assert (out / name).stat().st_size > 0


def test_a_fitted_model_gets_state_figures_only_when_asked_and_labelled(tmp_path, rng, capsys):
    from stimsteer.sysid import StateSpaceModel, save_predictor

    A = rng.standard_normal((4, 4))
    A *= 0.8 / np.max(np.abs(np.linalg.eigvals(A)))
    path = tmp_path / "m.h5"
    save_predictor(StateSpaceModel(A=A, B=rng.standard_normal((4, 2)), C=rng.standard_normal((3, 4))), path,
                   provenance={"origin": "test"})
    assert main(["network", str(path), "--state-figures", "--out", str(tmp_path / "n")]) == 0
    state = pd.read_csv(tmp_path / "n" / "state_controllability.csv")
    assert state["coordinates"].str.contains("COORDINATE-DEPENDENT").all()


def test_a_continuous_map_with_the_karrer_normalisation(map_file, tmp_path, capsys):
    out = tmp_path / "net"
    assert main(["network", "--map", str(map_file), "--stimulated", "pfc", "--recorded", "v1,amy", "--time",
                 "continuous", "--normalisation", "eigenvalue", "--time-step", "0.2", "--out", str(out)]) == 0
    table = pd.read_csv(out / "controllability.csv").set_index("quantity")["value"]
    assert table["time"] == "continuous" and "lambda_max" in table["normalisation"]
    assert table["n_channels"] == "2"


def _hash(path):
    return hashlib.sha256(path.read_bytes()).hexdigest()


@pytest.mark.parametrize("body, extra, match", [
    ("a,b\n1,2\n3,4\n5,6\n", [], "must be square"),
    (",a,b\na,0,nan\nb,1,0\n", [], "holds nan at row a, column b"),
    (",a,b\na,0,-1\nb,-1,0\n", ["--normalisation", "eigenvalue"], "needs non-negative weights"),
    (",a,b\na,0,1\nb,1,0\n", ["--stimulated", "a,zz"], "unknown node 'zz' in the stimulated nodes"),
    (",a,b,c\na,0,1,0\nb,1,0,0\nc,0,0,0\n", ["--normalisation", "sigma"], r"node\(s\) c cannot be reached"),
    (",a,b\na,0,2\nb,2,0\n", [], "the map is unstable"),
    (",a,b\na,0,1\nb,1,0\n", ["--recorded", "q"], "unknown node 'q' in the recorded nodes"),
])
def test_bad_maps_exit_2_with_one_line_and_write_nothing(tmp_path, capsys, body, extra, match):
    path = tmp_path / "m.csv"
    path.write_text(body)
    before = _hash(path)
    args = ["network", "--map", str(path), "--out", str(tmp_path / "n")]
    args += extra if "--stimulated" in extra else ["--stimulated", "a", *extra]
    assert main(args) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "Traceback" not in err
    assert __import__("re").search(match, err), err
    assert not (tmp_path / "n").exists() and _hash(path) == before
    assert not list(tmp_path.glob(".n*"))  # no claim or temporary folder left


def test_map_options_need_a_map_and_a_map_needs_sites(map_file, tmp_path, capsys):
    assert main(["network", "--map", str(map_file), "--out", str(tmp_path / "n")]) == 2
    assert "--map needs --stimulated" in capsys.readouterr().err
    assert main(["network", "--out", str(tmp_path / "n")]) == 2
    assert "either a model file or --map" in capsys.readouterr().err


def _session_file(tmp_path, rng, conditions=True):
    A = W / (1 + np.linalg.norm(W, 2))
    B = np.eye(4)[:, [0, 3]]
    us, ys, trials = [], [], []
    for t in range(8):
        Ak = A if t % 2 == 0 else 0.5 * A
        u = rng.standard_normal((60, 2))
        x, y = np.zeros(4), np.empty((60, 4))
        for k in range(60):
            y[k] = x
            x = Ak @ x + B @ u[k]
        us.append(u), ys.append(y), trials.append((60 * t, 60 * t + 60))
    meta = {"trial_conditions": ["rest", "task"] * 4} if conditions else {}
    session = Session(u=np.vstack(us), y=np.vstack(ys), sample_rate_hz=100.0, trials=trials,
                      input_names=("stimA", "stimB"), output_names=NAMES, metadata=meta)
    path = tmp_path / "s.h5"
    save_session(session, path)
    return path


def test_a_map_and_a_session_give_fitted_weights_scores_and_conditions(map_file, tmp_path, rng, capsys):
    session = _session_file(tmp_path, rng)
    out = tmp_path / "fit"
    assert main(["network", "--map", str(map_file), "--stimulated", "v1,amy", "--session", str(session),
                 "--bootstrap", "20", "--out", str(out)]) == 0
    edges = pd.read_csv(out / "map_fit_edges.csv")
    assert len(edges) == int((W != 0).sum()) + 4  # the map's connections and the self-connections
    scores = pd.read_csv(out / "map_fit_scores.csv")
    assert list(scores["fit"]) == ["map-constrained", "unconstrained (same order)"]
    cond = pd.read_csv(out / "conditions.csv")
    assert {"rest", "task", "task - rest"} <= set(cond["condition"])
    assert (cond["ci_low"] <= cond["ci_high"]).all()
    # from metadata or from the command line: the same table
    out2 = tmp_path / "fit2"
    assert main(["network", "--map", str(map_file), "--stimulated", "v1,amy", "--session", str(session),
                 "--bootstrap", "20", "--conditions", ",".join(["rest", "task"] * 4), "--out", str(out2)]) == 0
    pd.testing.assert_frame_equal(cond, pd.read_csv(out2 / "conditions.csv"))


def test_conditions_with_a_wrong_count_are_refused(map_file, tmp_path, rng, capsys):
    session = _session_file(tmp_path, rng, conditions=False)
    assert main(["network", "--map", str(map_file), "--stimulated", "v1,amy", "--session", str(session),
                 "--conditions", "a,b,a", "--out", str(tmp_path / "n")]) == 2
    assert "the session has 8 trials and 3 labels were given" in capsys.readouterr().err
    assert not (tmp_path / "n").exists()


def test_a_directed_chain_map_is_defective_and_keeps_its_other_figures(tmp_path, capsys):
    # A directed chain a -> b -> c with equal self-weights is one Jordan block (defective; from memory, any
    # textbook on the Jordan form): modal controllability is undefined, so its column is empty with a warning line,
    # and every other figure is written.
    path = tmp_path / "chain.csv"
    path.write_text(",a,b,c\na,0.5,0,0\nb,0.3,0.5,0\nc,0,0.3,0.5\n")
    assert main(["network", "--map", str(path), "--stimulated", "a", "--out", str(tmp_path / "n")]) == 0
    printed = capsys.readouterr().out
    assert "warning: A is defective" in printed and "Modal controllability is left empty" in printed
    state = pd.read_csv(tmp_path / "n" / "state_controllability.csv")
    assert state["modal_controllability"].isna().all() and state["average_controllability"].gt(0).all()


@pytest.mark.parametrize("extra, match", [
    (["--recorded", "v1"], "--recorded does not apply with --session"),
    (["--time", "continuous"], "--time continuous does not apply with --session"),
    (["--normalisation", "sigma"], "--normalisation does not apply with --session"),
])
def test_map_conventions_that_a_session_fit_cannot_use_are_refused(map_file, tmp_path, rng, capsys, extra, match):
    session = _session_file(tmp_path, rng, conditions=False)
    assert main(["network", "--map", str(map_file), "--stimulated", "v1,amy", "--session", str(session), *extra,
                 "--out", str(tmp_path / "n")]) == 2
    assert match in capsys.readouterr().err and not (tmp_path / "n").exists()
