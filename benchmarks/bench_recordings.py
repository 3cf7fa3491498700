"""Peak memory of reading recordings: ``stimsteer convert`` and ``stimsteer inspect`` on large generated files.

Measured in one run, each case in its own child process (peak resident set, ``ru_maxrss`` of the child), against
the size of the data it is about (float64):

* **convert** of a FIF file of many channels (written by MNE itself) whose description uses a few: the
  description's channels only are picked (``read_mne_file(..., names=, types=)``), against a recording of every
  channel (used when the description names no channel); since the streamed reading both read only the windows of
  the channels used, so the two now agree;
* **convert, streamed** of long EDF recordings (written by MNE's exporter) at two lengths: the session's arrays
  are filled window by window from the file, so the peak beyond the session and its in-memory HDF5 image should
  not grow with the length (before this change it was about 4.2× the session: the channels read whole, then
  copied three times);
* **inspect** of a session file in our HDF5 layout: read lazily, window by window (``open_session_source``),
  against loading the whole session first and running the same checks on it.

Run from the repository root::

    .venv/bin/python benchmarks/bench_recordings.py [--seconds 300] [--channels 64] [--samples 1000000]
        [--edf-seconds 600 2400]
"""

from __future__ import annotations

import argparse
import multiprocessing as mp
import tempfile
import time
from pathlib import Path

import numpy as np


def _status(key: str) -> int:
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith(key + ":"):
            return int(line.split()[1]) * 1024
    raise RuntimeError(f"no {key} in /proc/self/status (Linux only)")


def _child(queue, fn, args):
    baseline()
    before = _status("VmRSS")  # the interpreter and the imports, taken away from the peak
    t0 = time.perf_counter()
    fn(*args)
    queue.put((_status("VmHWM") - before, time.perf_counter() - t0))


def peak(fn, *args) -> tuple[int, float]:
    """Peak resident bytes above the imports, and wall time, of ``fn(*args)`` in a fresh (spawned) process."""
    ctx = mp.get_context("spawn")
    q = ctx.Queue()
    p = ctx.Process(target=_child, args=(q, fn, args))
    p.start()
    out = q.get()
    p.join()
    return out


def baseline() -> None:
    """The interpreter with stimsteer, NumPy, MNE and h5py imported: subtracted from every peak."""
    import mne  # noqa: F401

    import stimsteer.sysid.from_recording  # noqa: F401
    from stimsteer.control import cli  # noqa: F401


# ------------------------------------------------------------------------------------------------ convert
def write_fif(path: Path, seconds: float, n_channels: int) -> int:
    import mne

    fs, n = 1000.0, int(seconds * 1000)
    rng = np.random.default_rng(0)
    data = rng.standard_normal((n_channels, n)).astype(np.float64) * 1e-5
    data[0] = 0.0
    data[0, ::250] = 1.0  # a stimulation channel: pulses at 4 Hz
    names = ["STIM"] + [f"LFP{i:03d}" for i in range(1, n_channels)]
    raw = mne.io.RawArray(data, mne.create_info(names, fs, ["misc"] + ["seeg"] * (n_channels - 1)),
                          verbose="error")
    raw.save(path, verbose="error", overwrite=True)
    return n


def convert(path: str, out: str, every_channel: bool) -> None:
    from stimsteer.sysid.description import parse_description
    from stimsteer.sysid.from_recording import build_session, read_recording
    from stimsteer.sysid.io import save_session
    from stimsteer.sysid.io.mne import read_mne_file

    desc = parse_description({"channels": {"inputs": ["STIM"], "outputs": ["LFP001", "LFP002", "LFP003", "LFP004"]}})
    rec = read_mne_file(path, "fif") if every_channel else read_recording(path, desc)
    save_session(build_session(rec, desc, source=path), out, overwrite=True)


def write_edf(path: Path, seconds: float) -> int:
    import mne

    n = int(seconds * 1000)
    data = np.random.default_rng(0).standard_normal((6, n)) * 1e-4
    data[0] = 0.0
    data[0, ::250] = 1e-3
    raw = mne.io.RawArray(data, mne.create_info(["STIM"] + [f"LFP{i}" for i in range(1, 6)], 1000.0,
                                                ["misc"] + ["seeg"] * 5), verbose="error")
    mne.export.export_raw(path, raw, verbose="error", overwrite=True)
    return n


def convert_cli(path: str, out: str) -> None:
    import contextlib
    import io

    from stimsteer.control.cli import main

    desc = Path(out).with_suffix(".toml")
    desc.write_text('[channels]\ninputs = ["STIM"]\noutputs = ["LFP1", "LFP2", "LFP3"]\n')
    with contextlib.redirect_stdout(io.StringIO()):
        assert main(["convert", path, "--description", str(desc), "--out", out, "--force"]) == 0


def streamed(tmp: Path, lengths) -> None:
    print("convert (streamed): EDF, 6 channels at 1 kHz, the description uses 4 (session = 4 float64 columns)")
    for seconds in lengths:
        edf = tmp / f"long_{int(seconds)}.edf"
        n = write_edf(edf, seconds)
        mb = n * 4 * 8 / 1e6
        rss, wall = peak(convert_cli, str(edf), str(tmp / "e.h5"))
        print(f"  {seconds:6.0f} s  session {mb:6.1f} MB  peak {rss / 1e6:7.1f} MB = {rss / 1e6 / mb:4.2f}x; beyond "
              f"session + its file image {rss / 1e6 - 2 * mb:6.1f} MB; {wall:.1f} s")


# ------------------------------------------------------------------------------------------------ inspect
def write_h5(path: Path, n: int, p: int) -> None:
    from stimsteer.sysid import Session, save_session

    rng = np.random.default_rng(1)
    u = np.zeros((n, 2))
    u[::97, 0] = rng.uniform(10, 50, u[::97].shape[0])
    u[::131, 1] = rng.uniform(10, 50, u[::131].shape[0])
    y = rng.standard_normal((n, p))
    step = n // 20
    save_session(Session(u=u, y=y, sample_rate_hz=1000.0, trials=[(i, i + step) for i in range(0, n, step)]), path,
                 overwrite=True)


def inspect_lazy(path: str) -> None:
    import contextlib
    import io

    from stimsteer.control.cli import main

    with contextlib.redirect_stdout(io.StringIO()):
        assert main(["inspect", path]) == 0


def inspect_whole(path: str) -> None:
    from stimsteer.sysid import describe_session, excitation_report, load_session
    from stimsteer.sysid.artifacts import detect_artifacts

    s = load_session(path)
    describe_session(s)
    excitation_report(s, past_steps=10, horizon_steps=20)
    detect_artifacts(s)


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--seconds", type=float, default=300.0)
    ap.add_argument("--channels", type=int, default=64)
    ap.add_argument("--samples", type=int, default=1_000_000)
    ap.add_argument("--outputs", type=int, default=16)
    ap.add_argument("--edf-seconds", type=float, nargs="+", default=[600.0, 2400.0])
    a = ap.parse_args()
    base = 0
    import os

    print("peak resident set above the interpreter with stimsteer, MNE and h5py imported (VmHWM - VmRSS); "
          f"load average {os.getloadavg()[0]:.1f}")
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        streamed(tmp, a.edf_seconds)
        fif = tmp / "big_raw.fif"
        n = write_fif(fif, a.seconds, a.channels)
        all_mb, used_mb = a.channels * n * 8 / 1e6, 5 * n * 8 / 1e6
        print(f"convert: FIF of {a.channels} channels x {n} samples ({all_mb:.0f} MB as float64); the description "
              f"uses 5 channels ({used_mb:.0f} MB)")
        for label, every in (("every channel in the recording", True), ("described channels only", False)):
            rss, wall = peak(convert, str(fif), str(tmp / "s.h5"), every)
            print(f"  {label:34s} peak {(rss - base) / 1e6:7.0f} MB = {(rss - base) / 1e6 / used_mb:5.1f}x the "
                  f"used data; {wall:.1f} s")
        h5 = tmp / "big.h5"
        write_h5(h5, a.samples, a.outputs)
        data_mb = a.samples * (2 + a.outputs) * 8 / 1e6
        print(f"inspect: HDF5 session of {a.samples} samples x {2 + a.outputs} channels ({data_mb:.0f} MB)")
        for label, fn in (("whole session loaded", inspect_whole), ("stimsteer inspect (lazy)", inspect_lazy)):
            rss, wall = peak(fn, str(h5))
            print(f"  {label:34s} peak {(rss - base) / 1e6:7.0f} MB = {(rss - base) / 1e6 / data_mb:5.2f}x the data; "
                  f"{wall:.1f} s")


if __name__ == "__main__":
    main()
