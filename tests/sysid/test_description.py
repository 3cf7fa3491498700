"""The description file: its tables and keys, the README's example, clear errors."""

import re
from pathlib import Path

import pytest

from stimsteer.sysid.description import load_description, parse_description
from stimsteer.sysid.exceptions import InvalidParameterError

README = Path(__file__).resolve().parents[2] / "README.md"


def test_the_readme_description_example_is_a_valid_description(tmp_path):
    (block,) = re.findall(r"```toml\n(\[channels\].*?)```", README.read_text(encoding="utf-8"), flags=re.S)
    path = tmp_path / "d.toml"
    path.write_text(block, encoding="utf-8")
    d = load_description(path)
    assert d.channels["inputs"] == ["STIM1"] and d.biomarkers[0]["phase"] == "causal"
    assert d.folder == tmp_path and d.as_dict()["trials"]["before_s"] == 0.5


@pytest.mark.parametrize("data, pattern", [
    ({"channels": {"outputs": ["a"], "inputs": ["b"]}, "extras": {}}, r"unknown table\(s\) \['extras'\]"),
    ({"trials": {}}, r"\[channels\] is missing"),
    ({"channels": {"outputs": [], "inputs": ["b"]}}, r"outputs must be a list of channel names"),
    ({"channels": {"outputs": ["a"], "inputs": [1]}}, r"inputs must be a list of channel names"),
    ({"channels": {"outputs": ["a"], "inputs": ["b"]}, "trials": {"window": 1}}, r"unknown key\(s\) \['window'\]"),
    ({"channels": {"outputs": ["a"], "inputs": ["b"]}, "biomarkers": {"kind": "x"}}, r"array of tables"),
])
def test_description_errors(data, pattern):
    with pytest.raises(InvalidParameterError, match=pattern):
        parse_description(data)


def test_a_file_that_is_not_toml_names_the_problem(tmp_path):
    path = tmp_path / "d.toml"
    path.write_text("[channels\noutputs = 1\n")
    with pytest.raises(InvalidParameterError, match=r"is not a valid TOML description"):
        load_description(path)
