"""A catalogue of bad inputs to every `stimsteer` command, each run as a real command (issue 12).

Every case asserts what a user and a script rely on: exit code 2 (bad input), exactly one line on stderr, no
traceback anywhere, every input file unchanged (sha256 before and after), and nothing partial (no output, no hidden
`.<name>.*` leftovers beside it). A case may also name phrases the line must hold (the flag or file to fix).

A case that fails on the code of its day carries ``case(..., xfail="<the measured defect>")`` (strict: a fix shows
up as an XPASS, and the marker must then come off). None is marked today.
"""

from __future__ import annotations

import importlib.util
import sys
from pathlib import Path

import numpy as np
import pytest


def _helpers():
    """tests/cli/conftest.py as a plain module (the import mode is importlib: a conftest is not on sys.path)."""
    name = "_stimsteer_cli_test_helpers"
    if name not in sys.modules:
        spec = importlib.util.spec_from_file_location(name, Path(__file__).with_name("conftest.py"))
        sys.modules[name] = importlib.util.module_from_spec(spec)
        spec.loader.exec_module(sys.modules[name])
    return sys.modules[name]


assert_one_clean_error_line, leftovers, run_cli, small_session, tree_hash = (
    getattr(_helpers(), n) for n in ("assert_one_clean_error_line", "leftovers", "run_cli", "small_session",
                                     "tree_hash"))

CASES = []


def case(name, *, phrases=(), absent=(), xfail=None, existing_out=False, max_seconds=None, timeout=120):
    """Register ``build(f, d, tmp) -> (argv, out)`` as a catalogue case.

    ``f``: the module's shipped inputs; ``d``: a folder for this case's own input files; ``tmp``: where the
    output goes. ``phrases`` must be in the error line, ``absent`` must not. ``existing_out``: the output already
    exists and must stay as it is (it is hashed as an input).
    """
    def register(build):
        marks = [pytest.mark.xfail(reason=f"issue 12: {xfail}", strict=True)] if xfail else []
        CASES.append(pytest.param(build, (tuple(phrases), tuple(absent)), existing_out, max_seconds, timeout, id=name,
                                  marks=marks))
        return build
    return register


# ---------------------------------------------------------------------------------------------------- inputs
def _write(path, content):
    if isinstance(content, bytes):
        path.write_bytes(content)
    else:
        path.write_text(content)
    return path


JUNK = bytes(np.random.default_rng(12).integers(0, 256, 4096, dtype=np.uint8))

_CSV_HEADER = "time [s] @ 100 Hz,trial,valid,in:stim_a [uA],in:stim_b [uA],in:stim_c [uA],out:ch_1 [uV],out:ch_2 [uV]"


def _csv_session(d, *, header=_CSV_HEADER, times=None, rows=40, name="session.csv"):
    """A small session table; ``times`` replaces the time column (strings) to break it."""
    rng = np.random.default_rng(3)
    t = [f"{k / 100.0:g}" for k in range(rows)] if times is None else times
    lines = [header]
    for k in range(rows):
        vals = ",".join(f"{v:.4f}" for v in rng.uniform(-1, 1, 5))
        lines.append(f"{t[k]},{k // 20},1,{vals}")
    return _write(d / name, "\n".join(lines) + "\n")


def _huge_session(d, name="huge.h5"):
    """The small session with values of 1e200 to 1e300 (inputs and outputs): sums of squares overflow."""
    from stimsteer.sysid import Session, save_session

    s, _plant = small_session(seed=5)
    rng = np.random.default_rng(5)
    u_scale, y_scale = 10.0 ** rng.uniform(200, 300, s.u.shape[1]), 10.0 ** rng.uniform(200, 300, s.y.shape[1])
    huge = Session(u=s.u * u_scale, y=s.y * y_scale, sample_rate_hz=s.sample_rate_hz, trials=s.trials,
                   input_names=s.input_names, output_names=s.output_names, input_units=s.input_units,
                   output_units=s.output_units)
    return save_session(huge, d / name)


_INPUT = """
[inputs.{name}]
amplitude_min_ua = {lo}
amplitude_max_ua = {hi}
slew_max_ua = 15.0
{extra}
"""


def _limits(d, *, head="", inputs=None, tail="", name="limits.toml"):
    """A limits file for the demo's three inputs; ``inputs`` maps an input name to (lo, hi, extra lines)."""
    spec = {"stim_a": (-50.0, 50.0, ""), "stim_b": (-50.0, 50.0, ""), "stim_c": (-50.0, 50.0, "")}
    spec.update(inputs or {})
    body = "".join(_INPUT.format(name=k, lo=lo, hi=hi, extra=extra) for k, (lo, hi, extra) in spec.items())
    return _write(d / name, head + body + tail)


def _pattern(d, header="time [s],in:stim_a [uA],in:stim_b [uA],in:stim_c [uA]", rows=None, name="pattern.csv"):
    rows = rows or ["0,1,0,0", "0.004,0,0,0", "0.008,0,0,0", "0.012,0,0,0"]
    return _write(d / name, header + "\n" + "\n".join(rows) + "\n")


# ---------------------------------------------------------------------------------------------------- inspect
@case("inspect-missing-file", phrases=["nope.h5"])
def _(f, d, tmp):
    return ["inspect", d / "nope.h5"], None


@case("inspect-empty-file", phrases=["empty"])
def _(f, d, tmp):
    return ["inspect", _write(d / "empty.h5", b"")], None


@case("inspect-binary-junk")
def _(f, d, tmp):
    return ["inspect", _write(d / "junk.h5", JUNK)], None


@case("inspect-model-given-as-session", phrases=["arx.h5"])
def _(f, d, tmp):
    return ["inspect", f["arx"]], None


@case("inspect-limits-given-as-session", phrases=["demo_limits.toml"])
def _(f, d, tmp):
    return ["inspect", f["limits"]], None


@case("inspect-folder-given-as-session")
def _(f, d, tmp):
    return ["inspect", d], None


@case("inspect-csv-misspelt-header", phrases=["tme"])
def _(f, d, tmp):
    return ["inspect", _csv_session(d, header=_CSV_HEADER.replace("time [s]", "tme [s]"))], None


@case("inspect-csv-nan-time")
def _(f, d, tmp):
    times = [f"{k / 100.0:g}" for k in range(40)]
    times[7] = "nan"
    return ["inspect", _csv_session(d, times=times)], None


@case("inspect-csv-unsorted-time")
def _(f, d, tmp):
    times = [f"{k / 100.0:g}" for k in range(40)]
    times[5], times[6] = times[6], times[5]
    return ["inspect", _csv_session(d, times=times)], None


@case("inspect-csv-channel-without-unit", phrases=["stim_b"])
def _(f, d, tmp):
    return ["inspect", _csv_session(d, header=_CSV_HEADER.replace("in:stim_b [uA]", "in:stim_b"))], None


@case("inspect-csv-empty-unit", phrases=["ch_2"])
def _(f, d, tmp):
    return ["inspect", _csv_session(d, header=_CSV_HEADER.replace("out:ch_2 [uV]", "out:ch_2 []"))], None


@case("inspect-csv-time-not-in-seconds", phrases=["time"])
def _(f, d, tmp):
    return ["inspect", _csv_session(d, header=_CSV_HEADER.replace("time [s] @ 100 Hz", "time [min]"))], None


@case("inspect-csv-unknown-column", phrases=["stim_x"])
def _(f, d, tmp):
    return ["inspect", _csv_session(d, header=_CSV_HEADER.replace("in:stim_c [uA]", "stim_x [uA]"))], None


@case("inspect-zero-past-window", phrases=["--past-steps"])
def _(f, d, tmp):
    return ["inspect", f["small"], "--past-steps", "0"], None


@case("inspect-negative-horizon", phrases=["--horizon-steps"])
def _(f, d, tmp):
    return ["inspect", f["small"], "--horizon-steps", "-4"], None


@case("inspect-non-integer-window", phrases=["--past-steps"])
def _(f, d, tmp):
    return ["inspect", f["small"], "--past-steps", "2.5"], None


@case("inspect-values-of-1e200-1e300", phrases=["Rescale"])
def _(f, d, tmp):
    return ["inspect", _huge_session(d)], None


# ---------------------------------------------------------------------------------------------------- fit
def _fit(session, out, *extra, route="indirect", method="arx"):
    return ["fit", session, "--route", route, "--method", method, "--past-steps", "4", "--horizon-steps", "10",
            "--out", out, *extra]


@case("fit-missing-session", phrases=["nope.h5"])
def _(f, d, tmp):
    return _fit(d / "nope.h5", tmp / "m.h5"), tmp / "m.h5"


@case("fit-model-given-as-session", phrases=["lsq.h5"])
def _(f, d, tmp):
    return _fit(f["lsq"], tmp / "m.h5"), tmp / "m.h5"


@case("fit-plant-given-as-session", phrases=["demo_plant.h5"])
def _(f, d, tmp):
    return _fit(f["plant"], tmp / "m.h5"), tmp / "m.h5"


@case("fit-empty-session", phrases=["empty"])
def _(f, d, tmp):
    return _fit(_write(d / "empty.csv", ""), tmp / "m.h5"), tmp / "m.h5"


@case("fit-binary-junk-session")
def _(f, d, tmp):
    return _fit(_write(d / "junk.parquet", JUNK), tmp / "m.h5"), tmp / "m.h5"


@case("fit-csv-nan-time")
def _(f, d, tmp):
    times = [f"{k / 100.0:g}" for k in range(40)]
    times[30] = "nan"
    return _fit(_csv_session(d, times=times), tmp / "m.h5"), tmp / "m.h5"


@case("fit-unknown-method", phrases=["--method"])
def _(f, d, tmp):
    return _fit(f["small"], tmp / "m.h5", method="kalman"), tmp / "m.h5"


@case("fit-method-of-the-other-route", phrases=["lsq"])
def _(f, d, tmp):
    return _fit(f["small"], tmp / "m.h5", route="indirect", method="lsq"), tmp / "m.h5"


@case("fit-zero-horizon", phrases=["--horizon-steps"])
def _(f, d, tmp):
    return _fit(f["small"], tmp / "m.h5", "--horizon-steps", "0", route="direct", method="lsq"), tmp / "m.h5"


@case("fit-negative-past-window", phrases=["--past-steps"])
def _(f, d, tmp):
    return _fit(f["small"], tmp / "m.h5", "--past-steps", "-2"), tmp / "m.h5"


@case("fit-non-integer-horizon", phrases=["--horizon-steps"])
def _(f, d, tmp):
    return _fit(f["small"], tmp / "m.h5", "--horizon-steps", "7.5"), tmp / "m.h5"


@case("fit-window-longer-than-trials", phrases=["--past-steps"])
def _(f, d, tmp):
    return _fit(f["small"], tmp / "m.h5", "--past-steps", "500"), tmp / "m.h5"


for _value in ("0", "1.5", "half"):
    case(f"fit-test-fraction-{_value}", phrases=["--test-fraction"])(
        lambda f, d, tmp, v=_value: (_fit(f["small"], tmp / "m.h5", "--test-fraction", v), tmp / "m.h5"))


@case("fit-negative-seed", phrases=["--seed"])
def _(f, d, tmp):
    return _fit(f["small"], tmp / "m.h5", "--seed", "-1"), tmp / "m.h5"


@case("fit-centre-outputs-with-arx", phrases=["--centre-outputs"])
def _(f, d, tmp):
    return _fit(f["small"], tmp / "m.h5", "--centre-outputs"), tmp / "m.h5"


@case("fit-existing-model-without-force", phrases=["--force"], existing_out=True)
def _(f, d, tmp):
    out = _write(tmp / "m.h5", b"an earlier model, to be kept")
    return _fit(f["small"], out), out


@case("fit-values-of-1e200-1e300", phrases=["Rescale"])
def _(f, d, tmp):
    return _fit(_huge_session(d), tmp / "m.h5"), tmp / "m.h5"


# ---------------------------------------------------------------------------------------------------- predict
def _predict(model, pattern, out, *extra):
    return ["predict", model, "--pattern", pattern, "--out", out, *extra]


@case("predict-missing-model", phrases=["nope.h5"])
def _(f, d, tmp):
    return _predict(d / "nope.h5", _pattern(d), tmp / "pred"), tmp / "pred"


@case("predict-session-csv-given-as-model", phrases=["session.csv"])
def _(f, d, tmp):
    return _predict(_csv_session(d), _pattern(d), tmp / "pred"), tmp / "pred"


@case("predict-session-h5-given-as-model", phrases=["demo_session.h5"])
def _(f, d, tmp):
    return _predict(f["session"], _pattern(d), tmp / "pred"), tmp / "pred"


@case("predict-empty-model", phrases=["empty"])
def _(f, d, tmp):
    return _predict(_write(d / "empty.h5", b""), _pattern(d), tmp / "pred"), tmp / "pred"


@case("predict-missing-pattern", phrases=["nope.csv"])
def _(f, d, tmp):
    return _predict(f["arx"], d / "nope.csv", tmp / "pred"), tmp / "pred"


@case("predict-pattern-for-other-inputs", phrases=["stim_x"])
def _(f, d, tmp):
    return _predict(f["arx"], _pattern(d, header="time [s],in:stim_a [uA],in:stim_x [uA],in:stim_c [uA]"),
                    tmp / "pred"), tmp / "pred"


@case("predict-pattern-with-nan")
def _(f, d, tmp):
    return _predict(f["arx"], _pattern(d, rows=["0,1,0,0", "0.004,nan,0,0", "0.008,0,0,0"]), tmp / "pred"), \
        tmp / "pred"


@case("predict-binary-junk-pattern")
def _(f, d, tmp):
    return _predict(f["arx"], _write(d / "pattern.csv", JUNK), tmp / "pred"), tmp / "pred"


@case("predict-from-trial-without-index", phrases=["--from-trial"])
def _(f, d, tmp):
    return _predict(f["arx"], _pattern(d), tmp / "pred", "--from-trial", f["session"]), tmp / "pred"


@case("predict-from-trial-out-of-range", phrases=["999"])
def _(f, d, tmp):
    return _predict(f["arx"], _pattern(d), tmp / "pred", "--from-trial", f"{f['session']}:999"), tmp / "pred"


@case("predict-existing-folder-without-force", phrases=["--force"], existing_out=True)
def _(f, d, tmp):
    out = tmp / "pred"
    out.mkdir()
    _write(out / "prediction.csv", "an earlier prediction\n")
    return _predict(f["arx"], _pattern(d), out), out


# ---------------------------------------------------------------------------------------------------- network
def _network(model, out, *extra):
    return ["network", model, "--out", out, *extra]


@case("network-missing-model", phrases=["nope.h5"])
def _(f, d, tmp):
    return _network(d / "nope.h5", tmp / "net"), tmp / "net"


@case("network-session-given-as-model", phrases=["demo_session.h5"])
def _(f, d, tmp):
    return _network(f["session"], tmp / "net"), tmp / "net"


@case("network-limits-given-as-model", phrases=["demo_limits.toml"])
def _(f, d, tmp):
    return _network(f["limits"], tmp / "net"), tmp / "net"


@case("network-direct-predictor", phrases=["lsq.h5"])
def _(f, d, tmp):
    return _network(f["lsq"], tmp / "net"), tmp / "net"


@case("network-target-with-nan", phrases=["nan"], absent=["got 8."])
def _(f, d, tmp):
    return _network(f["arx"], tmp / "net", "--target", "1,nan,0,0,0,0,0,0"), tmp / "net"


@case("network-target-of-wrong-length", phrases=["8"])
def _(f, d, tmp):
    return _network(f["arx"], tmp / "net", "--target", "1,0,2"), tmp / "net"


@case("network-target-not-numbers")
def _(f, d, tmp):
    return _network(f["arx"], tmp / "net", "--target", "high,low"), tmp / "net"


@case("network-target-file-with-unknown-channels", phrases=["rec_99"])
def _(f, d, tmp):
    names = ",".join(f"rec_{k:02d}" for k in range(92, 100))
    return _network(f["arx"], tmp / "net", "--target", _write(d / "t.csv", names + "\n" + ",".join("1" * 8) + "\n")), \
        tmp / "net"


@case("network-start-without-target", phrases=["--target"])
def _(f, d, tmp):
    return _network(f["arx"], tmp / "net", "--start", "0,0,0,0,0,0,0,0"), tmp / "net"


@case("network-zero-horizon", phrases=["--horizon-steps"])
def _(f, d, tmp):
    return _network(f["arx"], tmp / "net", "--target", "1,0,0,0,0,0,0,0", "--horizon-steps", "0"), tmp / "net"


@case("network-set-size-out-of-choices", phrases=["--max-set-size"])
def _(f, d, tmp):
    return _network(f["arx"], tmp / "net", "--max-set-size", "4"), tmp / "net"


@case("network-out-is-a-file", phrases=["net"], existing_out=True)
def _(f, d, tmp):
    return _network(f["arx"], _write(tmp / "net", "a file, not a folder\n")), tmp / "net"


# ---------------------------------------------------------------------------------------------------- schedule
def _schedule(limits, out, *extra, inputs="3"):
    return ["schedule", "--limits", limits, "--inputs", inputs, "--order", "20", "--trials", "4", "--trial-s", "2",
            "--rest-s", "0.5", "--rate-hz", "250", "--out", out, *extra]


_BAD_LIMITS = {
    "min-above-max": dict(inputs={"stim_b": (20.0, 10.0, "")}),
    "zero-outside-bounds": dict(inputs={"stim_a": (5.0, 30.0, "")}),
    "shannon-k-at-damage-threshold": dict(head="[charge_density]\npulse_width_us = 100.0\n"
                                               "electrode_area_cm2 = 0.001\nshannon_k = 1.85\n"),
    "shannon-k-above-damage-threshold": dict(head="[charge_density]\npulse_width_us = 100.0\n"
                                                  "electrode_area_cm2 = 0.001\nshannon_k = 2.5\n"),
    "pulse-width-without-area": dict(head="[charge_density]\npulse_width_us = 100.0\n"),
    "pulse-width-of-one-input-only": dict(inputs={"stim_c": (-50.0, 50.0, "pulse_width_us = 500.0")}),
    "negative-electrode-area": dict(head="[charge_density]\npulse_width_us = 100.0\nelectrode_area_cm2 = -0.001\n"),
    "unknown-input-key": dict(inputs={"stim_a": (-50.0, 50.0, "amplitude_peak_ua = 10.0")}),
    "unknown-table": dict(head="[safety]\nmargin = 2\n"),
    "zero-energy-budget": dict(head="[energy]\nbudget_ua2 = 0.0\n"),
    "zero-slew": dict(),  # the first input's slew set to 0 by _bad_limits
    "output-min-above-max": dict(tail="\n[outputs.rec_02]\nmin = 40.0\nmax = -40.0\n"),
    "output-min-equal-max": dict(tail="\n[outputs.rec_02]\nmin = 5.0\nmax = 5.0\n"),
    "bound-not-a-number": dict(inputs={"stim_a": ("'lots'", 50.0, "")}),
    "nan-bound": dict(inputs={"stim_a": ("nan", 50.0, "")}),
}
_BAD_LIMIT_PHRASES = {
    "min-above-max": ["stim_b"], "zero-outside-bounds": ["stim_a"], "shannon-k-at-damage-threshold": ["1.85"],
    "shannon-k-above-damage-threshold": ["shannon_k"], "pulse-width-without-area": ["electrode_area"],
    "pulse-width-of-one-input-only": ["pulse_width_us"],
    "negative-electrode-area": ["electrode_area_cm2"], "unknown-input-key": ["amplitude_peak_ua"],
    "unknown-table": ["safety"], "zero-energy-budget": ["budget"],
    "zero-slew": ["slew"], "output-min-above-max": ["min"], "output-min-equal-max": ["min"],
    "bound-not-a-number": ["amplitude_min_ua"], "nan-bound": ["amplitude_min_ua"],
}


def _bad_limits(d, kind):
    path = _limits(d, **_BAD_LIMITS[kind])
    if kind == "zero-slew":
        path.write_text(path.read_text().replace("slew_max_ua = 15.0", "slew_max_ua = 0.0", 1))
    return path


for _kind in _BAD_LIMITS:
    case(f"schedule-limits-{_kind}", phrases=_BAD_LIMIT_PHRASES[_kind])(
        lambda f, d, tmp, k=_kind: (_schedule(_bad_limits(d, k), tmp / "s.csv"), tmp / "s.csv"))


@case("schedule-missing-limits", phrases=["nope.toml"])
def _(f, d, tmp):
    return _schedule(d / "nope.toml", tmp / "s.csv"), tmp / "s.csv"


@case("schedule-binary-limits", phrases=["TOML"])
def _(f, d, tmp):
    return _schedule(_write(d / "limits.toml", JUNK), tmp / "s.csv"), tmp / "s.csv"


@case("schedule-empty-limits")
def _(f, d, tmp):
    return _schedule(_write(d / "limits.toml", ""), tmp / "s.csv"), tmp / "s.csv"


@case("schedule-session-given-as-limits", phrases=["demo_session.h5"])
def _(f, d, tmp):
    return _schedule(f["session"], tmp / "s.csv"), tmp / "s.csv"


@case("schedule-input-count-mismatch", phrases=["--inputs"])
def _(f, d, tmp):
    return _schedule(f["limits"], tmp / "s.csv", inputs="2"), tmp / "s.csv"


@case("schedule-zero-rate", phrases=["--rate-hz"])
def _(f, d, tmp):
    return _schedule(f["limits"], tmp / "s.csv", "--rate-hz", "0"), tmp / "s.csv"


@case("schedule-one-level", phrases=["--levels"])
def _(f, d, tmp):
    return _schedule(f["limits"], tmp / "s.csv", "--kind", "multilevel", "--levels", "1"), tmp / "s.csv"


@case("schedule-unknown-kind", phrases=["--kind"])
def _(f, d, tmp):
    return _schedule(f["limits"], tmp / "s.csv", "--kind", "chirp"), tmp / "s.csv"


@case("schedule-zero-order", phrases=["order"])
def _(f, d, tmp):
    return _schedule(f["limits"], tmp / "s.csv", "--order", "0"), tmp / "s.csv"


@case("schedule-without-order-or-windows", phrases=["--order"])
def _(f, d, tmp):
    argv = _schedule(f["limits"], tmp / "s.csv")
    i = argv.index("--order")
    return argv[:i] + argv[i + 2:], tmp / "s.csv"


@case("schedule-zero-trials", phrases=["trials"])
def _(f, d, tmp):
    return _schedule(f["limits"], tmp / "s.csv", "--trials", "0"), tmp / "s.csv"


@case("schedule-negative-trial-length", phrases=["trial"])
def _(f, d, tmp):
    return _schedule(f["limits"], tmp / "s.csv", "--trial-s", "-1"), tmp / "s.csv"


@case("schedule-existing-file-without-force", phrases=["--force"], existing_out=True)
def _(f, d, tmp):
    out = _write(tmp / "s.csv", "an earlier schedule\n")
    return _schedule(f["limits"], out), out


# ---------------------------------------------------------------------------------------------------- plan
def _plan(model, limits, out, *extra, target="rec_01=20"):
    return ["plan", model, "--target", target, "--limits", limits, "--out", out, "--horizon-steps", "10", *extra]


@case("plan-missing-model", phrases=["nope.h5"])
def _(f, d, tmp):
    return _plan(d / "nope.h5", f["limits"], tmp / "plan"), tmp / "plan"


@case("plan-session-csv-given-as-model", phrases=["session.csv"])
def _(f, d, tmp):
    return _plan(_csv_session(d), f["limits"], tmp / "plan"), tmp / "plan"


@case("plan-limits-given-as-model", phrases=["demo_limits.toml"])
def _(f, d, tmp):
    return _plan(f["limits"], f["limits"], tmp / "plan"), tmp / "plan"


@case("plan-model-given-as-limits", phrases=["arx.h5"])
def _(f, d, tmp):
    return _plan(f["arx"], f["arx"], tmp / "plan"), tmp / "plan"


@case("plan-missing-limits", phrases=["nope.toml"])
def _(f, d, tmp):
    return _plan(f["arx"], d / "nope.toml", tmp / "plan"), tmp / "plan"


@case("plan-limits-for-unknown-input", phrases=["stim_x"])
def _(f, d, tmp):
    return _plan(f["arx"], _limits(d, inputs={"stim_x": (-5.0, 5.0, "")}), tmp / "plan"), tmp / "plan"


@case("plan-limits-min-above-max-direct", phrases=["stim_b"])
def _(f, d, tmp):
    return _plan(f["lsq"], _bad_limits(d, "min-above-max"), tmp / "plan"), tmp / "plan"


@case("plan-limits-output-for-unknown-channel", phrases=["rec_99"])
def _(f, d, tmp):
    return _plan(f["arx"], _limits(d, tail="\n[outputs.rec_99]\nmax = 4.0\n"), tmp / "plan"), tmp / "plan"


for _name, _target, _phrases in (
    ("unknown-output", "rec_99=1", ["rec_99"]),
    ("no-value", "rec_01", []),
    ("value-not-a-number", "rec_01=high", []),
    ("nan-value", "rec_01=nan", []),
    ("empty", "", []),
    ("missing-table-file", "nope_target.csv", ["nope_target.csv"]),
    ("duplicate-output", "rec_01=1,rec_01=2", ["rec_01"]),
):
    case(f"plan-target-{_name}", phrases=_phrases)(
        lambda f, d, tmp, t=_target: (_plan(f["arx"], f["limits"], tmp / "plan", target=t), tmp / "plan"))


@case("plan-target-table-with-nan")
def _(f, d, tmp):
    table = _write(d / "target.csv", "rec_01\n" + "\n".join(["1"] * 5 + ["nan"] + ["1"] * 4) + "\n")
    return _plan(f["arx"], f["limits"], tmp / "plan", target=str(table)), tmp / "plan"


@case("plan-zero-horizon", phrases=["horizon"])
def _(f, d, tmp):
    return _plan(f["arx"], f["limits"], tmp / "plan", "--horizon-steps", "0"), tmp / "plan"


@case("plan-negative-output-weight", phrases=["weight"])
def _(f, d, tmp):
    return _plan(f["arx"], f["limits"], tmp / "plan", "--output-weight", "-1"), tmp / "plan"


@case("plan-nan-input-weight", phrases=["weight"])
def _(f, d, tmp):
    return _plan(f["arx"], f["limits"], tmp / "plan", "--input-weight", "nan"), tmp / "plan"


@case("plan-from-trial-of-missing-session", phrases=["nope.h5"])
def _(f, d, tmp):
    return _plan(f["arx"], f["limits"], tmp / "plan", "--from-trial", f"{d / 'nope.h5'}:0"), tmp / "plan"


@case("plan-existing-folder-without-force", phrases=["--force"], existing_out=True)
def _(f, d, tmp):
    out = tmp / "plan"
    out.mkdir()
    _write(out / "plan.json", "{}\n")
    return _plan(f["arx"], f["limits"], out), out


# ---------------------------------------------------------------------------------------------------- bench
def _bench(session, out, *extra):
    return ["bench", session, "--out", out, "--quick", "--workers", "1", *extra]


@case("bench-missing-session", phrases=["nope.h5"])
def _(f, d, tmp):
    return _bench(d / "nope.h5", tmp / "report"), tmp / "report"


@case("bench-model-given-as-session", phrases=["arx.h5"])
def _(f, d, tmp):
    return _bench(f["arx"], tmp / "report"), tmp / "report"


@case("bench-zero-workers", phrases=["--workers"])
def _(f, d, tmp):
    return _bench(f["small"], tmp / "report", "--workers", "0"), tmp / "report"


@case("bench-negative-seed", phrases=["seed"])
def _(f, d, tmp):
    return _bench(f["small"], tmp / "report", "--seed", "-3"), tmp / "report"


@case("bench-missing-plant", phrases=["nope_plant.h5"])
def _(f, d, tmp):
    return _bench(f["small"], tmp / "report", "--plant", d / "nope_plant.h5"), tmp / "report"


@case("bench-session-given-as-plant", phrases=["small.h5"])
def _(f, d, tmp):
    return _bench(f["small"], tmp / "report", "--plant", f["small"]), tmp / "report"


@case("bench-limits-for-unknown-input", phrases=["stim_x"])
def _(f, d, tmp):
    limits = _limits(d, inputs={"stim_x": (-5.0, 5.0, "")})
    return _bench(f["small"], tmp / "report", "--plant", f["small_plant"], "--limits", limits), tmp / "report"


@case("bench-too-few-trials", phrases=["trials"])
def _(f, d, tmp):
    from stimsteer.sysid import save_session

    s, _plant = small_session(n_trials=2)
    return _bench(save_session(s, d / "two.h5"), tmp / "report"), tmp / "report"


@case("bench-unparsable-scheduler-address", phrases=["scheduler"], max_seconds=10.0, timeout=90)
def _(f, d, tmp):
    return _bench(f["small"], tmp / "report", "--scheduler", "tcp://no host:::87x6"), tmp / "report"


# ---------------------------------------------------------------------------------------------------- demo
@case("demo-out-is-a-file", phrases=["demo_out"], existing_out=True)
def _(f, d, tmp):
    return ["demo", "--out", _write(tmp / "demo_out", "a file\n")], tmp / "demo_out"


@case("demo-out-holds-another-run", phrases=["--force"], existing_out=True)
def _(f, d, tmp):
    out = tmp / "demo_out"
    out.mkdir()
    _write(out / "notes.txt", "someone's notes\n")
    return ["demo", "--out", out], out


@case("demo-without-out", phrases=["--out"])
def _(f, d, tmp):
    return ["demo"], None


@case("demo-unknown-option", phrases=["--fast"])
def _(f, d, tmp):
    return ["demo", "--out", tmp / "demo_out", "--fast"], tmp / "demo_out"


@case("unknown-command", phrases=["predicts"])
def _(f, d, tmp):
    return ["predicts", f["arx"]], None


# ---------------------------------------------------------------------------------------------------- the test
def test_the_catalogue_covers_every_command_with_at_least_60_cases():
    commands = {p.id.split("-")[0] for p in CASES}
    assert {"inspect", "fit", "predict", "network", "plan", "schedule", "bench", "demo"} <= commands
    assert len(CASES) >= 60


@pytest.mark.parametrize("build, phrases, existing_out, max_seconds, timeout", CASES)
def test_bad_input_is_refused_in_one_line_leaving_everything_as_it_was(shipped, tmp_path, build, phrases,
                                                                       existing_out, max_seconds, timeout):
    d = tmp_path / "in"
    d.mkdir()
    work = tmp_path / "work"
    work.mkdir()
    argv, out = build(shipped, d, work)
    watched = [shipped["dir"], d] + ([out] if existing_out else [])
    before, listing = tree_hash(*watched), sorted(p.name for p in work.iterdir())
    run = run_cli(*argv, cwd=work, timeout=timeout)
    line = assert_one_clean_error_line(run, 2)
    for phrase in phrases[0]:
        assert phrase in line, str(run)
    for phrase in phrases[1]:
        assert phrase not in line, str(run)
    if max_seconds is not None:
        assert run.seconds < max_seconds, str(run)
    assert tree_hash(*watched) == before, f"an input changed\n{run}"
    if out is not None:
        if not existing_out:
            assert not out.exists(), f"partial output {out}\n{run}"
        assert leftovers(out) == [], f"leftovers beside {out}: {leftovers(out)}\n{run}"
    assert sorted(p.name for p in work.iterdir()) == listing, f"new files in the work folder\n{run}"
