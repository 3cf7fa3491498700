"""`stimsteer inspect`: prints the session summary; bad files give one line on stderr and exit code 2."""

import hashlib

import numpy as np
import pytest

from stimsteer.control.cli import main
from stimsteer.sysid.io import save_session
from stimsteer.sysid.session import Session


@pytest.fixture
def session_file(tmp_path, rng):
    """An invented 2-input, 2-output session with two trials and a flat output, in our HDF5 layout."""
    y = rng.standard_normal((600, 2))
    y[:, 1] = 0.25
    s = Session(u=rng.standard_normal((600, 2)), y=y, sample_rate_hz=200.0, trials=[(0, 300), (300, 600)],
                input_names=["site_a", "site_b"], input_units=["uA", "uA"], output_names=["lfp", "ref"],
                output_units=["mV", "mV"])
    path = tmp_path / "session.h5"
    save_session(s, path)
    return path


def test_inspect_prints_the_summary(session_file, capsys):
    assert main(["inspect", str(session_file)]) == 0
    out, err = capsys.readouterr()
    assert err == ""
    assert "Session: 600 samples at 200 Hz = 3.000 s" in out
    assert "inputs (2): site_a [uA], site_b [uA]" in out
    assert "outputs (2): lfp [mV], ref [mV]" in out
    assert "trials: 2; length min 300 / median 300 / max 300 samples (1.500 / 1.500 / 1.500 s)" in out
    assert "output 'ref' is flat (constant 0.25 mV" in out


def test_inspect_reads_tables_too(tmp_path, capsys):
    path = tmp_path / "hand.csv"
    path.write_text("time [s] @ 10 Hz,trial,in:stim [uA],out:lfp [mV]\n0,0,0,1\n0.1,0,1,2\n0.2,1,0,3\n0.3,1,1,5\n")
    assert main(["inspect", str(path)]) == 0
    assert "trials: 2" in capsys.readouterr().out


@pytest.mark.parametrize("content, fragment", [
    (b"\x89HDF\r\n\x1a\n" + b"\x00" * 64, "cannot be read as HDF5"),
    (b"", "is empty (0 bytes)"),
    (b"a,b\n1,2\n", "is not a stimsteer session table"),
    (b"\x00\xff\x13junk" * 20, "is not a session file"),
])
def test_corrupt_file_gives_one_line_and_exit_code_2(tmp_path, capsys, content, fragment):
    path = tmp_path / "broken.h5"
    path.write_bytes(content)
    before = hashlib.sha256(content).hexdigest()
    assert main(["inspect", str(path)]) == 2
    out, err = capsys.readouterr()
    assert out == ""
    assert err.count("\n") == 1 and err.startswith("stimsteer inspect: error: ")
    assert fragment in err and "Traceback" not in err
    assert hashlib.sha256(path.read_bytes()).hexdigest() == before


def test_missing_file_gives_one_line_and_exit_code_2(tmp_path, capsys):
    assert main(["inspect", str(tmp_path / "nope.h5")]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "nope.h5" in err and "Traceback" not in err


def test_an_unexpected_failure_is_one_line_with_exit_1_and_debug_shows_the_traceback(monkeypatch, capsys):
    # a bug (not bad input) must still not dump a traceback on a user (common practice, no source)
    from stimsteer.control import cli
    from stimsteer.control.commands import inspect as inspect_command

    def broken(args):
        raise ZeroDivisionError("boom\nsecond line")

    monkeypatch.setitem(cli._SUBCOMMANDS, "inspect", (inspect_command.add_parser, broken))
    assert cli.main(["inspect", "whatever.h5"]) == 1
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "internal error (ZeroDivisionError: boom second line)" in err
    monkeypatch.setenv("STIMSTEER_DEBUG", "1")
    with pytest.raises(ZeroDivisionError):
        cli.main(["inspect", "whatever.h5"])
