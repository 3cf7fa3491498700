"""The Lab Streaming Layer bridge (control/stream.py): a simulated plant behind LSL streams on this machine only,
the live runner through the bridge, faults (late steps, solver failures, a stalled inlet, a clock jump) and bad
streams (missing, wrong channel count, rate or labels).

LSL is restricted to this machine before pylsl is imported (configure_lsl below, at import time): no packet of
these tests is addressed outside 127.0.0.0/8. The hard-limit rules are re-checked with plain numpy on the commands
the simulated stimulator *received* through LSL (amplitude window, slew between consecutive commands, Σ u² over
every window of the horizon's length) -- common practice, no source.
"""

from __future__ import annotations

import os
import subprocess
import sys
import time

import numpy as np
import pytest

from stimsteer.control.stream import LSL_CONFIG, LslBridge, SimulatedLslPlant, StreamError, configure_lsl  # noqa: E402

CONFIG_PATH = configure_lsl()  # before pylsl is imported anywhere in this process
if os.environ.get("CI"):  # the stream extra is part of `test`: in CI a missing pylsl is a failure, not a skip
    import pylsl  # noqa: E402
else:
    pylsl = pytest.importorskip("pylsl")

from stimsteer.control.limits import StimLimits  # noqa: E402
from stimsteer.sysid.exceptions import InvalidParameterError  # noqa: E402
from stimsteer.control.mpc import ModelPredictiveController  # noqa: E402
from stimsteer.control.plants import LinearNetworkPlant  # noqa: E402
from stimsteer.control.realtime import run_live  # noqa: E402
from stimsteer.sysid import StateSpaceModel  # noqa: E402

N, M, P, PAST, H, RATE = 5, 2, 3, 3, 6, 25.0  # a 40 ms period: a budgeted plan takes 10-25 ms here
LO, HI, SLEW, BUDGET = -1.0, 1.0, 0.3, 4.0
_TAG = f"{os.getpid()}-{time.monotonic_ns() % 10**9}"  # stream names no other run on this machine uses


@pytest.fixture(scope="module")
def system():
    rng = np.random.default_rng(5)
    A = rng.normal(size=(N, N))
    A *= 0.8 / np.max(np.abs(np.linalg.eigvals(A)))
    B, C = rng.normal(size=(N, M)), rng.normal(size=(P, N))
    model = StateSpaceModel(A=A, B=B, C=C, past_steps=PAST)
    lim = StimLimits(amplitude_min_ua=LO, amplitude_max_ua=HI, n_inputs=M, slew_max_ua=SLEW, energy_budget_ua2=BUDGET)
    ctrl = ModelPredictiveController(model=model, limits=lim, horizon_steps=H, input_weight=1e-3).fit()
    return model, ctrl, rng.normal(size=P) * 3.0


def _names(case):
    return f"rec-{case}-{_TAG}", f"cmd-{case}-{_TAG}"


def _sim(model, case, **faults):
    plant = LinearNetworkPlant(model.A, model.B, model.C, measurement_noise_std=0.01, sample_rate_hz=RATE)
    out, cmd = _names(case)
    return SimulatedLslPlant(plant, output_stream=out, command_stream=cmd, output_names=plant.output_names,
                             output_units="uV", seed=3, **faults)


def _bridge(ctrl, case, **kw):
    out, cmd = _names(case)
    return LslBridge(inlet_name=out, outlet_name=cmd, input_names=ctrl.input_names_, output_names=ctrl.output_names_,
                     sample_rate_hz=kw.pop("rate", RATE), limits=ctrl.limits_, energy_window_steps=H, **kw)


def _received_are_safe(sim):
    """The commands the simulated stimulator received, checked from rest with the rules' definitions."""
    time.sleep(0.05)  # let the last pushed commands arrive
    u = np.asarray([c for _, c in sim.commands])
    seq = np.vstack([np.zeros((1, M)), u])
    e = np.sum(u**2, axis=1)
    assert np.all((u >= LO) & (u <= HI))
    assert np.all(np.abs(np.diff(seq, axis=0)) <= SLEW * (1 + 1e-9))
    assert all(e[max(0, k - H + 1):k + 1].sum() <= BUDGET * (1 + 1e-12) for k in range(len(e)))
    return u


class _Faulty:
    """Injects late plans (sleeps past the period), solver crashes, failed plans and plans that ask for the amplitude
    maximum on every input (a greedy plan the gate has to reduce) at chosen controlled steps."""

    def __init__(self, inner, *, late=(), raises=(), fails=(), greedy=(), skip=20):
        self._c, self.calls = inner, -skip
        self._late, self._raises, self._fails, self._greedy = set(late), set(raises), set(fails), set(greedy)

    def __getattr__(self, name):
        return getattr(self._c, name)

    def reset(self):
        return self._c.reset()

    def plan(self, u_past, y_past, **kw):
        k, self.calls = self.calls, self.calls + 1
        if k in self._late:
            time.sleep(3.0 / RATE)
        if k in self._raises:
            raise RuntimeError("injected solver crash")
        plan = self._c.plan(u_past, y_past, **kw)
        if k in self._fails:
            import dataclasses

            return dataclasses.replace(plan, status="failed", fallback=True, inputs=plan.inputs + 30.0)
        if k in self._greedy:
            import dataclasses

            return dataclasses.replace(plan, inputs=np.full_like(plan.inputs, HI))
        return plan


def test_the_config_keeps_lsl_on_this_machine():
    assert os.environ["LSLAPICFG"] == str(CONFIG_PATH)
    text = CONFIG_PATH.read_text()
    assert text == LSL_CONFIG
    for line in ("ResolveScope = machine", "KnownPeers = {127.0.0.1}", "IPv6 = disable",
                 "MachineAddresses = {127.0.0.1}", "AddressesOverride = {127.0.0.1}", "ListenAddress = 127.0.0.1"):
        assert line in text


@pytest.mark.slow  # a fresh interpreter imports stimsteer (about 7 s on a busy machine)
def test_configure_refuses_after_pylsl_was_imported_with_another_config(tmp_path):
    env = {k: v for k, v in os.environ.items() if k != "LSLAPICFG"}
    code = ("import pylsl\nfrom stimsteer.control.stream import configure_lsl\n"
            "try:\n    configure_lsl()\nexcept Exception as e:\n    print(type(e).__name__, e)\n")
    out = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True, timeout=60)
    assert out.stdout.startswith("InvalidParameterError pylsl was imported before")


def test_a_live_run_through_lsl_records_the_session_and_sends_only_safe_commands(system):
    model, ctrl, target = system
    with _sim(model, "run") as sim, _bridge(ctrl, "run") as bridge:
        run = run_live(ctrl, bridge, n_steps=40, target=target, pace="source", output_units="uV")
        received = _received_are_safe(sim)
    s = run.session
    assert run.stop_reason == "" and len(run.events) == 40
    assert run.summary["unchecked_inputs"] == 0
    assert s.sample_rate_hz == RATE and s.output_units == ("uV",) * P
    # what left the bridge is what the stimulator received, in order
    np.testing.assert_allclose(received, np.asarray(s.u))
    assert np.all(received[-1] == 0)


def test_the_command_stream_names_its_channels_and_their_unit(system):
    model, ctrl, _ = system
    with _sim(model, "desc"), _bridge(ctrl, "desc"):
        info = pylsl.resolve_byprop("name", _names("desc")[1], 1, 5.0)[0]
        full = pylsl.StreamInlet(info).info(timeout=5.0)
    ch, labels, units = full.desc().child("channels").child("channel"), [], []
    while not ch.empty():
        labels.append(ch.child_value("label"))
        units.append(ch.child_value("unit"))
        ch = ch.next_sibling()
    assert labels == list(ctrl.input_names_) and units == ["uA"] * M
    assert full.nominal_srate() == RATE and full.channel_count() == M


def test_the_command_stream_carries_the_models_input_units(system):
    # a model in mA (or charge rate) must not announce µA to the stimulator: the description says what it sends
    model, ctrl, _ = system
    units_in = ["mA"] + ["uC/s"] * (M - 1)
    with _sim(model, "unit"), _bridge(ctrl, "unit", input_units=units_in):
        info = pylsl.resolve_byprop("name", _names("unit")[1], 1, 5.0)[0]
        full = pylsl.StreamInlet(info).info(timeout=5.0)
    ch, units = full.desc().child("channels").child("channel"), []
    while not ch.empty():
        units.append(ch.child_value("unit"))
        ch = ch.next_sibling()
    assert units == units_in
    with pytest.raises(InvalidParameterError, match="one unit per input"):
        _bridge(ctrl, "unit", input_units=["mA"] * (M + 1))


def test_the_bridge_gates_commands_whoever_sends_them(system):
    model, ctrl, _ = system
    with _sim(model, "gate") as sim, _bridge(ctrl, "gate") as bridge:
        bridge.reset()
        for u in ([0.2, 0.2], [50.0, 0.0], [0.2, 0.2 + SLEW * 2], [np.nan, 0.0]):
            bridge.step(np.asarray(u))
        assert bridge.gate.n_replaced == 3
        _received_are_safe(sim)


def test_late_steps_solver_failures_and_a_stalled_inlet_leave_only_safe_inputs(system):
    """The issue's safety test, through LSL."""
    model, ctrl, target = system
    faulty = _Faulty(ctrl, late={5, 6, 30}, raises={10}, fails={12, 13})
    with _sim(model, "faults", stall_after=PAST + 30) as sim, _bridge(ctrl, "faults") as bridge:
        run = run_live(faulty, bridge, n_steps=400, target=target, pace="source", max_stall_s=0.2)
        received = _received_are_safe(sim)
    assert "stalled" in run.stop_reason
    kinds = [e.split("+")[0] for e in run.events]
    assert kinds[5] == "overrun" and kinds[10] == "failed" and kinds[12] == "failed" and "no_data" in kinds
    assert np.all(received[-1] == 0)
    u = np.asarray(run.session.u)
    assert ctrl.limits_.violations(u, np.zeros(M), energy_window_steps=H) == {
        "amplitude": 0, "slew": 0, "energy_budget": 0}
    assert not run.session.mask[-1]


def test_a_binding_charge_window_with_late_steps_and_a_stalled_inlet_leaves_only_safe_inputs(system):
    """Issue 20 under issue 16's sequence limits, through LSL: a rolling charge window and a train limit that bind
    (the target is out of reach), late steps, a solver crash and a stalled inlet. The commands the stimulator
    received are graded by the independent checker of test_live_sequence_limits (rolling sums over every window,
    train runs with their hold, duty windows)."""
    from stimsteer.control.sequence_limits import TrainLimits, WindowBudget
    from .test_live_sequence_limits import sequence_breaks

    model = system[0]
    lim = StimLimits(amplitude_min_ua=[0.0, 0.0], amplitude_max_ua=[HI, HI],
                     window_budgets=(WindowBudget("charge_rate_window", 4.0, 10, np.ones(2), np.zeros(2), "uC"),),
                     train_limits=TrainLimits((6, None), (None, 7), (None, 12), (1, 2)))
    ctrl = ModelPredictiveController(model=model, limits=lim, horizon_steps=H, input_weight=1e-3).fit()
    # three greedy plans in a row ask 6 uC of the window's 4: the gate reduces whatever the timing was before
    faulty = _Faulty(ctrl, late={4, 5, 20}, raises={9}, greedy={30, 31, 32})
    with _sim(model, "window", stall_after=PAST + 45) as sim, _bridge(ctrl, "window") as bridge:
        run = run_live(faulty, bridge, n_steps=400, target=np.full(P, 40.0), pace="source", max_stall_s=0.2)
        time.sleep(0.05)
        received = np.asarray([c for _, c in sim.commands])
    assert "stalled" in run.stop_reason
    kinds = [e.split("+")[0] for e in run.events]
    assert kinds[4] == "overrun" and kinds[9] == "failed" and "no_data" in kinds
    np.testing.assert_allclose(received, np.asarray(run.session.u))
    assert sequence_breaks(received, lim) == [] and np.all(received[-1] == 0)
    q = received.sum(axis=1)  # the window binds: some window of 10 delivered samples holds the whole budget
    assert max(q[max(0, k - 9):k + 1].sum() for k in range(q.size)) >= 4.0 * 0.999
    assert run.summary["gate"]["reduced"] > 0 and not any(run.summary["delivered_violations"].values())


def test_a_clock_jump_stops_the_run_and_winds_down(system):
    model, ctrl, target = system
    with _sim(model, "jump", clock_jump_after=PAST + 15) as sim, _bridge(ctrl, "jump") as bridge:
        run = run_live(ctrl, bridge, n_steps=200, target=target, pace="source")
        received = _received_are_safe(sim)
    assert "jumped" in run.stop_reason and len(run.events) < 200
    assert np.all(received[-1] == 0)


def test_an_inlet_that_does_not_appear_is_refused_within_the_wait(system):
    _, ctrl, _ = system
    t0 = time.perf_counter()
    with pytest.raises(StreamError, match=r"no LSL stream named 'rec-absent-.*' .* within 0.3 s"):
        _bridge(ctrl, "absent", resolve_timeout_s=0.3).open()
    assert time.perf_counter() - t0 < 5.0


@pytest.mark.parametrize("channels, rate, labels, match", [
    (2, RATE, None, "has 2 channels but the model has 3 outputs"),
    (P, 20.0, None, "samples at 20 Hz but the model at 25 Hz"),
    (P, RATE, ("a", "b", "c"), r"names its channels \['a', 'b', 'c'\]"),
])
def test_a_stream_that_does_not_match_the_model_is_refused(system, channels, rate, labels, match):
    _, ctrl, _ = system
    case = f"bad{channels}-{int(rate)}-{labels is None}"
    info = pylsl.StreamInfo(_names(case)[0], "recording", channels, rate, "double64", f"src-{case}-{_TAG}")
    if labels:
        chans = info.desc().append_child("channels")
        for name in labels:
            chans.append_child("channel").append_child_value("label", name)
    outlet = pylsl.StreamOutlet(info)
    with pytest.raises(StreamError, match=match):
        _bridge(ctrl, case, resolve_timeout_s=3.0).open()
    del outlet


def test_a_bridge_that_was_not_opened_says_so(system):
    _, ctrl, _ = system
    with pytest.raises(Exception, match="not open"):
        _bridge(ctrl, "closed").step(np.zeros(M))


_EXCHANGE = """
import numpy as np
from stimsteer.control.stream import LslBridge, SimulatedLslPlant, configure_lsl
configure_lsl()
from stimsteer.control.limits import StimLimits
from stimsteer.control.plants import LinearNetworkPlant
plant = LinearNetworkPlant(np.eye(2) * 0.5, np.eye(2), np.eye(2), sample_rate_hz=50.0)
lim = StimLimits(amplitude_min_ua=-1.0, amplitude_max_ua=1.0, n_inputs=2)
names = ("TAG-rec", "TAG-cmd")
with SimulatedLslPlant(plant, output_stream=names[0], command_stream=names[1], output_names=plant.output_names):
    with LslBridge(inlet_name=names[0], outlet_name=names[1], input_names=plant.input_names,
                   output_names=plant.output_names, sample_rate_hz=50.0, limits=lim) as bridge:
        bridge.reset()
        for k in range(20):
            bridge.step(np.full(2, 0.1 * (k % 3)))
print("exchanged")
"""


@pytest.mark.slow  # a fresh interpreter under strace (about 10 s)
def test_no_lsl_packet_is_addressed_outside_the_loopback_range(tmp_path):
    """Every address the bridge and the simulated plant connect or send to is in 127.0.0.0/8, and none is IPv6
    (system-call trace of a whole exchange; the loopback range is RFC 1122, section 3.2.1.3)."""
    import re
    import shutil

    if shutil.which("strace") is None:
        pytest.skip("strace is not installed: the system-call check of the addresses cannot run here")
    trace = tmp_path / "trace.txt"
    cmd = ["strace", "-f", "-qq", "-e", "trace=connect,sendto,sendmsg,sendmmsg", "-o", str(trace), sys.executable,
           "-c", _EXCHANGE.replace("TAG", f"trace-{_TAG}")]
    out = subprocess.run(cmd, capture_output=True, text=True, timeout=120)
    if "exchanged" not in out.stdout and "ptrace" in out.stderr:
        pytest.skip(f"strace cannot trace here: {out.stderr.strip()[:200]}")
    assert "exchanged" in out.stdout, out.stderr[-2000:]
    text = trace.read_text()
    v4 = re.findall(r'inet_addr\("([0-9.]+)"\)', text)
    assert v4 and all(a.startswith("127.") for a in v4), sorted(set(v4))
    assert "AF_INET6" not in text


def test_a_live_run_through_the_bridge_checks_each_command_once(system, monkeypatch):
    # the runner shares the bridge's gate (same limits object, same energy window): one check per command, and
    # every command still checked (the gate's own counts and the received commands against the rules)
    from stimsteer.control.input_gate import InputGate

    model, ctrl, target = system
    calls, admit = [], InputGate.admit
    monkeypatch.setattr(InputGate, "admit", lambda self, u, **kw: calls.append(self) or admit(self, u, **kw))
    with _sim(model, "once") as sim, _bridge(ctrl, "once") as bridge:
        run = run_live(ctrl, bridge, n_steps=30, target=target, pace="source", output_units="uV")
        received = _received_are_safe(sim)
    n = len(run.session.u)
    assert run.summary["unchecked_inputs"] == 0 and len(received) == n
    assert [c is bridge.gate for c in calls[-n:]] == [True] * n and len(calls) == n + run.summary["calibration_s"]["n"]
    assert bridge.gate.n_admitted + bridge.gate.n_replaced == n


def test_a_handed_input_is_taken_once_and_only_with_its_values():
    from stimsteer.control.input_gate import InputGate

    lim = StimLimits(amplitude_min_ua=[-1.0, -1.0], amplitude_max_ua=[1.0, 1.0], slew_max_ua=[0.5, 0.5])
    gate = InputGate(lim)
    sent, _ = gate.admit(np.array([0.3, -0.2]), hand=True)
    assert not gate.take(sent + 1e-12)  # other values: not the admitted input (and the token is spent)
    assert not gate.take(sent)
    sent, _ = gate.admit(np.array([0.4, -0.1]), hand=True)
    assert gate.take(sent) and not gate.take(sent)  # one shot
    gate.admit(np.array([0.4, -0.1]))  # admitted without handing: nothing to take, however equal
    assert not gate.take(np.array([0.4, -0.1]))
