"""Network maps as input: reading, conventions, normalisations and the bad inputs of issue 15."""

import numpy as np
import pytest
import scipy.linalg as sla

from stimsteer.sysid import InvalidParameterError, UnstableModelError
from stimsteer.sysid.exceptions import FileFormatError
from stimsteer.sysid.network import site_controllability
from stimsteer.sysid.network.maps import NetworkMap, map_model, read_network_map

NAMES = ("v1", "v2", "pfc", "amy")
W = np.array([[0, 2, 1, 0], [2, 0, 0, 1], [1, 0, 0, 3], [0, 1, 3, 0]], dtype=float)


def _csv(path, names=NAMES, W=W, labelled=True):
    lines = [("," if labelled else "") + ",".join(names)]
    for n, row in zip(names, W):
        lines.append((f"{n}," if labelled else "") + ",".join(repr(float(x)) for x in row))
    path.write_text("\n".join(lines) + "\n")
    return path


@pytest.mark.parametrize("labelled", [True, False])
def test_a_csv_map_is_read_with_its_node_names(tmp_path, labelled):
    net = read_network_map(_csv(tmp_path / "m.csv", labelled=labelled))
    assert net.node_names == NAMES
    np.testing.assert_array_equal(net.weights, W)


def test_a_npy_map_takes_names_given_separately(tmp_path):
    np.save(tmp_path / "m.npy", W)
    assert read_network_map(tmp_path / "m.npy", NAMES).node_names == NAMES
    assert read_network_map(tmp_path / "m.npy").node_names == ("node0", "node1", "node2", "node3")


def test_the_map_file_is_not_modified(tmp_path):
    path = _csv(tmp_path / "m.csv")
    before = path.read_bytes()
    map_model(read_network_map(path), stimulated=["v1"], normalisation="sigma")
    assert path.read_bytes() == before


def test_discrete_sigma_normalisation_is_the_gu_scaling():
    # Gu et al. (2015), Nat. Commun. 6:8414, Methods: A / (1 + sigma_max(A)).
    model = map_model(NetworkMap(NAMES, W), stimulated=["v1", "amy"], normalisation="sigma")
    np.testing.assert_allclose(model.A, W / (1 + np.linalg.norm(W, 2)), rtol=1e-15)
    assert model.input_names == ("v1", "amy") and model.output_names == NAMES
    np.testing.assert_array_equal(model.B, np.eye(4)[:, [0, 3]])


def test_continuous_eigenvalue_normalisation_is_sampled_with_a_zero_order_hold():
    # Karrer et al. (2020), J. Neural Eng. 17:026031: A / (c + lambda_max(A)) - I in continuous time.
    # Zero-order hold (Franklin, Powell, Workman 1998, Digital Control of Dynamic Systems, Sec. 4.3):
    # A_d = expm(A dt), B_d = A^-1 (A_d - I) B for invertible A.
    model = map_model(NetworkMap(NAMES, W), stimulated=["pfc"], time="continuous", normalisation="eigenvalue",
                      time_step=0.5)
    Ac = W / (1 + np.max(np.linalg.eigvalsh(W))) - np.eye(4)
    Ad = sla.expm(0.5 * Ac)
    np.testing.assert_allclose(model.A, Ad, atol=1e-13)
    np.testing.assert_allclose(model.B, np.linalg.solve(Ac, (Ad - np.eye(4)) @ np.eye(4)[:, [2]]), atol=1e-12)
    assert "lambda_max" in model.info["network_map"]["normalisation"]


def test_a_map_model_gives_state_figures_on_its_nodes():
    model = map_model(NetworkMap(NAMES, W), stimulated=list(NAMES), normalisation="sigma")
    An = W / (1 + np.linalg.norm(W, 2))
    np.testing.assert_allclose(site_controllability(model).modal, 1 - np.sum(An ** 2, axis=1), atol=1e-12)


@pytest.mark.parametrize("weights, match", [
    (np.ones((3, 4)), "must be a square matrix"),
    (np.array([[0.0, np.nan], [1.0, 0.0]]), "holds nan at row a, column b"),
])
def test_bad_maps_are_refused(weights, match):
    with pytest.raises(InvalidParameterError, match=match):
        NetworkMap(("a", "b") if weights.shape[0] == 2 else ("a", "b", "c"), weights)


def test_a_non_square_csv_map_is_refused(tmp_path):
    (tmp_path / "m.csv").write_text("a,b\n1,2\n3,4\n5,6\n")
    with pytest.raises(InvalidParameterError, match="must be square"):
        read_network_map(tmp_path / "m.csv")


def test_negative_weights_are_refused_by_the_eigenvalue_normalisation_only():
    Ws = W.copy()
    Ws[0, 1] = Ws[1, 0] = -2.0
    with pytest.raises(InvalidParameterError, match="needs non-negative weights.*2 negative weights"):
        map_model(NetworkMap(NAMES, Ws), stimulated=["v1"], normalisation="eigenvalue")
    assert map_model(NetworkMap(NAMES, Ws), stimulated=["v1"], normalisation="sigma").is_stable


def test_unknown_node_names_are_named():
    with pytest.raises(InvalidParameterError, match="unknown node 'v3' in the stimulated nodes.*v1, v2, pfc, amy"):
        map_model(NetworkMap(NAMES, W), stimulated=["v3"], normalisation="sigma")
    with pytest.raises(InvalidParameterError, match="unknown node 'x' in the recorded nodes"):
        map_model(NetworkMap(NAMES, W), stimulated=["v1"], recorded=["x"], normalisation="sigma")


def test_a_node_no_site_can_reach_is_named():
    Wd = W.copy()
    Wd[:, 3] = Wd[3, :] = 0.0  # amy disconnected
    with pytest.raises(InvalidParameterError, match=r"node\(s\) amy cannot be reached from any stimulated node"):
        map_model(NetworkMap(NAMES, Wd), stimulated=["v1"], normalisation="sigma")
    # directed edges: from a only b is reached
    Wdir = np.zeros((3, 3))
    Wdir[1, 0] = 0.5  # a -> b
    Wdir[0, 2] = 0.5  # c -> a, not the other way
    with pytest.raises(InvalidParameterError, match=r"node\(s\) c cannot be reached"):
        map_model(NetworkMap(("a", "b", "c"), Wdir), stimulated=["a"])


def test_an_unstable_map_without_normalisation_is_refused():
    with pytest.raises(UnstableModelError, match="unstable.*Normalise it"):
        map_model(NetworkMap(NAMES, W), stimulated=["v1"])
    with pytest.raises(UnstableModelError, match="continuous-time map is not stable"):
        map_model(NetworkMap(NAMES, W), stimulated=["v1"], time="continuous")


def test_bad_conventions_are_refused():
    with pytest.raises(InvalidParameterError, match="time must be one of"):
        map_model(NetworkMap(NAMES, W), stimulated=["v1"], time="weekly")
    with pytest.raises(InvalidParameterError, match="time_step must be a finite number > 0"):
        map_model(NetworkMap(NAMES, W), stimulated=["v1"], time="continuous", time_step=0)


def test_a_missing_map_file_is_named(tmp_path):
    with pytest.raises(FileFormatError, match="does not exist"):
        read_network_map(tmp_path / "none.csv")
