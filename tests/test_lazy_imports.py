"""A command starts without the libraries it does not use (sysid/_lazy.py), and the stand-ins behave like them."""

import subprocess
import sys
import threading

import numpy as np

from stimsteer.sysid._lazy import LazyInstance, lazy_module


def test_the_command_line_starts_without_scipy_signal_pint_cvxpy_or_scikit_learn():
    code = ("import sys, stimsteer.control.cli\n"
            "print(sorted(m for m in ('scipy.signal', 'pint', 'cvxpy', 'sklearn') if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=300, check=True)
    assert out.stdout.strip() == "[]"


def test_a_lazy_module_is_the_module_at_its_first_use():
    signal = lazy_module("scipy.signal")
    import scipy.signal

    assert signal.butter is scipy.signal.butter


def test_a_lazy_instance_is_made_once_even_when_threads_ask_at_the_same_moment():
    made = []
    gate = threading.Barrier(8)

    def factory():
        made.append(1)
        return np.arange(3)

    lazy = LazyInstance(factory)
    seen = []

    def ask():
        gate.wait()
        seen.append(lazy.sum())

    threads = [threading.Thread(target=ask) for _ in range(8)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert made == [1] and seen == [3] * 8


def test_units_still_convert_through_the_lazy_registry():
    from stimsteer.sysid.stimulation.units import UREG, convert, parse_quantity

    # 1 mA = 1000 µA: BIPM 2019, The International System of Units (SI), 9th edition, the SI prefixes
    assert convert(parse_quantity("1.5 mA", "amplitude"), "current", "amplitude") == 1500.0
    assert UREG.Unit("uC") == UREG.microcoulomb
