"""The streaming bridge to lab hardware through Lab Streaming Layer (LSL, ``pylsl``; the ``stream`` extra).

:class:`LslBridge` is a plant (:class:`stimsteer.sysid.protocols.Plant`) made of two streams: it reads the recorded
channels from an LSL *inlet* (the acquisition system's stream) and writes stimulation commands, µA per site, to an
LSL *outlet* whose description names every channel and its unit. Every command passes an
:class:`~stimsteer.control.input_gate.InputGate` at the moment it is pushed (amplitude, slew from the last pushed
command, every rolling charge or energy window of pushed commands, train length and duty cycle), whoever calls
:meth:`LslBridge.step`: a command that breaks a per-sample limit leaves as the safe fallback instead, one that would
break a window or a train as the largest safe command. :class:`SimulatedLslPlant` puts a simulated plant behind
the same two streams (a thread that samples at the plant's rate, applies the latest command and pushes the
outputs), for tests and the demo, with injectable faults (a stall, a clock jump).

Machine scope only. :func:`configure_lsl` writes an LSL configuration file and points ``LSLAPICFG`` at it before
``pylsl`` is imported: discovery only on this machine (``[multicast] ResolveScope = machine``, the machine
addresses, the address override and the listen address all 127.0.0.1, multicast TTL 0), ``[lab] KnownPeers =
{127.0.0.1}``, ``[ports] IPv6 = disable``. So no LSL packet is addressed outside 127.0.0.0/8. The keys are those the
bundled liblsl 1.18 reads (its strings list ``multicast.ResolveScope``, ``multicast.MachineAddresses``,
``multicast.AddressesOverride``, ``multicast.ListenAddress``, ``multicast.TTLOverride``, ``lab.KnownPeers``,
``ports.IPv6`` with the values ``machine`` and ``disable``). If ``pylsl`` was imported before with another
configuration, the bridge refuses to run (liblsl reads its configuration once per process).

Bad input (each a :class:`StreamError`, a :class:`~stimsteer.sysid.SessionError`: one line and exit 2 on the command
line): no inlet of the given name within the bounded wait; an inlet whose channel count, nominal rate or channel
labels differ from the model's; a clock jump in the inlet's time stamps (a step backwards, or forwards by what is
not a whole number of sample periods; whole periods are dropped samples, counted). A sample that does not arrive
within ``sample_timeout_s`` gives a row of NaN (the live runner then delivers the safe fallback, and stops after its
``max_stall_s``).
"""

from __future__ import annotations

import os
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np

from ..sysid import InvalidParameterError, SessionError
from ..sysid._files import atomic_path
from .input_gate import InputGate

__all__ = ["LSL_CONFIG", "LslBridge", "SimulatedLslPlant", "StreamError", "configure_lsl"]

LSL_CONFIG = """\
; written by stimsteer: Lab Streaming Layer on this machine only (no packet outside 127.0.0.0/8)
[ports]
IPv6 = disable

[multicast]
ResolveScope = machine
MachineAddresses = {127.0.0.1}
AddressesOverride = {127.0.0.1}
ListenAddress = 127.0.0.1
TTLOverride = 0

[lab]
KnownPeers = {127.0.0.1}

[log]
level = -3
"""
_MICROAMPERE = "uA"


class StreamError(SessionError):
    """A stream that is missing, does not match the model, or whose clock jumped."""


def configure_lsl(directory=None) -> Path:
    """Write the machine-scope LSL configuration and point ``LSLAPICFG`` at it; return its path.

    Parameters
    ----------
    directory : str or Path, optional
        Folder of the file ``lsl_api.cfg``; default a per-user folder in the system's temporary folder.

    Raises
    ------
    InvalidParameterError
        When ``pylsl`` was already imported with another configuration (liblsl reads it once per process).
    """
    current = os.environ.get("LSLAPICFG")
    if current and _is_ours(current):
        return Path(current)
    if "pylsl" in sys.modules:
        raise InvalidParameterError(
            f"pylsl was imported before stimsteer could restrict LSL to this machine (LSLAPICFG={current!r}); "
            "call stimsteer.control.stream.configure_lsl() before importing pylsl, or set LSLAPICFG to a file "
            "with stimsteer.control.stream.LSL_CONFIG.")
    folder = Path(directory) if directory is not None else Path(tempfile.gettempdir()) / f"stimsteer-lsl-{os.getuid()}"
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / "lsl_api.cfg"
    if not _is_ours(path):
        with atomic_path(path) as tmp:
            tmp.write_text(LSL_CONFIG, encoding="utf-8")
    os.environ["LSLAPICFG"] = str(path)
    return path


def _is_ours(path) -> bool:
    try:
        return Path(path).read_text(encoding="utf-8") == LSL_CONFIG
    except OSError:
        return False


def _pylsl():
    configure_lsl()
    try:
        import pylsl
    except ImportError:
        raise InvalidParameterError("the streaming bridge needs pylsl; install stimsteer with the stream extra "
                                    "(pip install 'stimsteer[stream]').") from None
    return pylsl


def _lsl_error(pylsl, name):
    """pylsl's error class ``name`` (top level in pylsl 1.16, in ``pylsl.util`` from 1.17)."""
    found = getattr(pylsl, name, None)
    if found is None:
        import importlib

        found = getattr(importlib.import_module("pylsl.util"), name)
    return found


def _stream_info(pylsl, name, kind, labels, units, rate, source_id):
    info = pylsl.StreamInfo(name, kind, len(labels), float(rate), "double64", source_id)
    chans = info.desc().append_child("channels")
    for label, unit in zip(labels, units):
        ch = chans.append_child("channel")
        ch.append_child_value("label", label)
        ch.append_child_value("unit", unit)
        ch.append_child_value("type", kind)
    info.desc().append_child_value("software", "stimsteer")
    return info


def _labels(info):
    """Channel labels of a stream description, or None when it has none."""
    ch = info.desc().child("channels").child("channel")
    out = []
    while not ch.empty():
        out.append(ch.child_value("label"))
        ch = ch.next_sibling()
    return out if len(out) == info.channel_count() and all(out) else None


def _resolve(pylsl, name, timeout_s, what):
    found = pylsl.resolve_byprop("name", name, 1, float(timeout_s))
    if not found:
        raise StreamError(f"no LSL stream named {name!r} ({what}) appeared on this machine within {timeout_s:g} s; "
                          "start the stream first, check its name, or raise the wait.")
    return found[0]


class LslBridge:
    """A plant made of an LSL inlet (recorded channels) and an LSL outlet (stimulation commands, µA).

    Parameters
    ----------
    inlet_name : str
        Name of the acquisition stream to read.
    outlet_name : str
        Name of the command stream to create.
    input_names, output_names : sequence of str
        The model's inputs (command channels) and outputs (recorded channels), in its order.
    sample_rate_hz : float
        The model's rate; the inlet's nominal rate must equal it.
    limits : StimLimits
        Checked for every command at the moment it is pushed.
    energy_window_steps : int, optional
        Rolling window of the energy budget, samples (required with a budget; the controller's horizon).
    resolve_timeout_s : float, default 5.0
        Bounded wait for the inlet to appear.
    sample_timeout_s : float, optional
        Wait for each sample; default two sample periods.
    clock_tolerance : float, default 0.25
        Allowed deviation of a time-stamp step from a whole number of periods, in periods.
    input_units : sequence of str, optional
        The unit of each command channel as the model holds it (``mA``, ``uA``, ``uC/s``), written into the command
        stream's description; default ``uA`` for every channel.

    Attributes
    ----------
    n_dropped, n_missing : int
        Samples the source skipped (whole-period gaps in its time stamps) and samples that did not arrive in time.
    gate : InputGate
    """

    def __init__(self, *, inlet_name, outlet_name, input_names, output_names, sample_rate_hz, limits,
                 energy_window_steps=None, resolve_timeout_s=5.0, sample_timeout_s=None, clock_tolerance=0.25,
                 input_units=None):
        self.inlet_name, self.outlet_name = str(inlet_name), str(outlet_name)
        self.input_names, self.output_names = tuple(input_names), tuple(output_names)
        self.input_units = (_MICROAMPERE,) * len(self.input_names) if input_units is None else tuple(input_units)
        if len(self.input_units) != len(self.input_names):
            raise InvalidParameterError(f"input_units needs one unit per input ({len(self.input_names)}); got "
                                        f"{len(self.input_units)}.")
        self.n_inputs, self.n_outputs = len(self.input_names), len(self.output_names)
        self.sample_rate_hz = float(sample_rate_hz)
        if not (np.isfinite(self.sample_rate_hz) and self.sample_rate_hz > 0):
            raise InvalidParameterError(f"sample_rate_hz must be positive; got {sample_rate_hz!r}.")
        self.limits, self.energy_window_steps = limits, energy_window_steps
        self.resolve_timeout_s = float(resolve_timeout_s)
        period = 1.0 / self.sample_rate_hz
        self.sample_timeout_s = 2.0 * period if sample_timeout_s is None else float(sample_timeout_s)
        self.clock_tolerance = float(clock_tolerance)
        self._inlet = self._outlet = None
        self.gate = InputGate(limits, energy_window_steps=energy_window_steps)
        self.n_dropped = self.n_missing = 0
        self._last_ts = None

    def open(self) -> "LslBridge":
        """Find the inlet (bounded wait), check it against the model, create the command outlet."""
        pylsl = _pylsl()
        info = _resolve(pylsl, self.inlet_name, self.resolve_timeout_s, "the recorded channels")
        self._check_inlet(info, None)
        inlet = pylsl.StreamInlet(info, max_buflen=1, recover=False)
        try:  # a resolved description holds no channel labels: ask the stream for its full one
            full = inlet.info(timeout=self.resolve_timeout_s)
        except _lsl_error(pylsl, "TimeoutError"):
            raise StreamError(f"the stream {self.inlet_name!r} did not send its description within "
                              f"{self.resolve_timeout_s:g} s; check the acquisition software.") from None
        self._check_inlet(info, _labels(full))
        self._outlet = pylsl.StreamOutlet(_stream_info(pylsl, self.outlet_name, "stimulation", self.input_names,
                                                       self.input_units, self.sample_rate_hz,
                                                       f"stimsteer-{self.outlet_name}"))
        self._inlet, self._lost = inlet, _lsl_error(pylsl, "LostError")
        self._inlet.open_stream(self.resolve_timeout_s)
        if not self._outlet.wait_for_consumers(self.resolve_timeout_s):
            self.close()
            raise StreamError(f"nothing read the command stream {self.outlet_name!r} within "
                              f"{self.resolve_timeout_s:g} s; start the stimulator's LSL client (it must open an "
                              "inlet on that stream name) before the run.")
        return self

    def _check_inlet(self, info, labels):
        n, rate = info.channel_count(), info.nominal_srate()
        if n != self.n_outputs:
            raise StreamError(f"the stream {self.inlet_name!r} has {n} channels but the model has {self.n_outputs} "
                              f"outputs ({list(self.output_names)}); stream the channels the model was fitted on.")
        if abs(rate - self.sample_rate_hz) > 1e-6 * self.sample_rate_hz:
            raise StreamError(f"the stream {self.inlet_name!r} samples at {rate:g} Hz but the model at "
                              f"{self.sample_rate_hz:g} Hz; stream at the model's rate or fit a model at this rate.")
        if labels is not None and tuple(labels) != self.output_names:
            raise StreamError(f"the stream {self.inlet_name!r} names its channels {labels} but the model's outputs "
                              f"are {list(self.output_names)}; stream the same channels in the same order.")

    def reset(self, seed=None, x0=None) -> None:
        """Drop samples queued before the run (a live stream has no seed or initial state to set)."""
        self._require_open()
        while self._inlet.pull_sample(timeout=0.0)[0] is not None:
            pass
        self._last_ts = None

    def step(self, u_k) -> np.ndarray:
        """Push the checked command ``u_k`` (µA), then return the next recorded sample (NaN if none in time).

        Raises
        ------
        StreamError
            On a clock jump in the inlet's time stamps (the command was pushed before).
        """
        self._require_open()
        if self.gate.take(u_k):  # admitted by this gate just now (a live runner sharing it): checked once, sent
            sent = np.asarray(u_k, np.float64).reshape(-1)
        else:
            sent, _why = self.gate.admit(u_k)
        self._outlet.push_sample(sent.tolist())
        try:
            sample, ts = self._inlet.pull_sample(timeout=self.sample_timeout_s)
        except self._lost:
            raise StreamError(f"the stream {self.inlet_name!r} was lost (its source closed); the last command was "
                              "pushed, check the acquisition system.") from None
        if sample is None:
            self.n_missing += 1
            return np.full(self.n_outputs, np.nan)
        self._check_clock(ts)
        return np.asarray(sample, np.float64)

    def _check_clock(self, ts):
        last, self._last_ts = self._last_ts, ts
        if last is None:
            return
        steps = (ts - last) * self.sample_rate_hz
        whole = round(steps)
        if whole < 1 or abs(steps - whole) > self.clock_tolerance:
            raise StreamError(f"the clock of stream {self.inlet_name!r} jumped: consecutive time stamps {last:.6f} s "
                              f"and {ts:.6f} s are {steps:.3f} sample periods apart (expected a whole number >= 1); "
                              "check the acquisition clock and restart the run.")
        self.n_dropped += whole - 1

    def _require_open(self):
        if self._inlet is None:
            raise InvalidParameterError("the bridge is not open; call open() (or use it in a with block) first.")

    def close(self) -> None:
        """Close both streams (the last pushed command stays with the receiver: the runner winds down first)."""
        if self._inlet is not None:
            self._inlet.close_stream()
        self._inlet = self._outlet = None  # liblsl frees a stream when its last reference goes

    def __enter__(self):
        return self.open()

    def __exit__(self, *exc):
        self.close()


class SimulatedLslPlant:
    """A simulated plant behind LSL streams, sampling in its own thread at the plant's rate (tests and demos).

    Parameters
    ----------
    plant : Plant
        With ``n_inputs``, ``n_outputs``, ``sample_rate_hz``, ``reset`` and ``step``.
    output_stream, command_stream : str
        Name of the stream it creates (its outputs) and of the command stream it reads (the bridge's outlet).
    output_names, output_units : sequence of str
    seed : int, optional
        For ``plant.reset``.
    stall_after : int, optional
        Stop pushing samples this many samples after the first command arrived (the thread keeps running): a
        stalled inlet.
    clock_jump_after : int, optional
        Add ``clock_jump_s`` to every time stamp from this many samples after the first command on: a clock jump.
    clock_jump_s : float, default -0.5
    """

    def __init__(self, plant, *, output_stream, command_stream, output_names, output_units="a.u.", seed=None,
                 stall_after=None, clock_jump_after=None, clock_jump_s=-0.5):
        self.plant, self.output_stream, self.command_stream = plant, output_stream, command_stream
        self.output_names = tuple(output_names)
        units = output_units
        self.output_units = (units,) * len(self.output_names) if isinstance(units, str) else tuple(units)
        self.seed, self.stall_after = seed, stall_after
        self.clock_jump_after, self.clock_jump_s = clock_jump_after, float(clock_jump_s)
        self.commands = []  # (sample index, command) as received, for checks
        self._stop = threading.Event()
        self._thread = None
        self.n_samples = 0

    def start(self) -> "SimulatedLslPlant":
        """Create the output stream and start sampling."""
        pylsl = _pylsl()
        rate = float(self.plant.sample_rate_hz)
        info = _stream_info(pylsl, self.output_stream, "recording", self.output_names, self.output_units, rate,
                            f"stimsteer-sim-{self.output_stream}")
        self._outlet = pylsl.StreamOutlet(info)
        self.plant.reset(seed=self.seed)
        self._thread = threading.Thread(target=self._run, args=(pylsl, rate), daemon=True)
        self._thread.start()
        return self

    def _run(self, pylsl, rate):
        inlet, u, first = None, np.zeros(self.plant.n_inputs), None
        t0, k = time.perf_counter(), 0
        ts0 = pylsl.local_clock()  # stamps on the nominal sample grid, as an acquisition clock does
        while not self._stop.is_set():
            if inlet is None:
                found = pylsl.resolve_byprop("name", self.command_stream, 1, 0.5 / rate)
                inlet = pylsl.StreamInlet(found[0]) if found else None
            while inlet is not None:
                cmd, _ = inlet.pull_sample(timeout=0.0)
                if cmd is None:
                    break
                u = np.asarray(cmd, np.float64)  # the stimulator applies the latest command
                self.commands.append((k, u))
                first = k if first is None else first
            y = self.plant.step(u)
            since = -1 if first is None else k - first
            if self.stall_after is None or since < self.stall_after:
                ts = ts0 + k / rate
                if self.clock_jump_after is not None and since >= self.clock_jump_after:
                    ts += self.clock_jump_s
                self._outlet.push_sample(np.asarray(y, np.float64).tolist(), ts)
            k += 1
            self.n_samples = k
            left = t0 + k / rate - time.perf_counter()
            if left > 0:
                time.sleep(left)

    def stop(self) -> None:
        """Stop sampling and close the output stream."""
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout=5.0)
        self._outlet = None

    def __enter__(self):
        return self.start()

    def __exit__(self, *exc):
        self.stop()
