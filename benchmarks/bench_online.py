"""Online identification against batch refits (issue 20, item 1): cost of taking one more trial in.

Setup (not timed): 50 trials of 400 samples of a 6-state system with 3 inputs and 8 outputs (noisy). Timed in one
run, each the median of 5 repeats:

* ridge ARX (2 output lags, 2 input lags, delay 1): ``OnlineRidgeArx.update`` with trial 50 plus reading
  ``coef_`` (the solve) ÷ a batch ``RidgeArx`` refit on the 50 trials with the same structure and strength (one
  alpha: no cross-validation over strengths) and ÷ the default batch fit (structure and strength searched);
* least-squares Hankel predictor (past 4, horizon 10): ``OnlineLsqPredictor.update`` (block QR) + ``Kp_``
  ÷ a batch ``LsqPredictor`` refit with one strength, and ÷ the default batch fit (strengths cross-validated).

Target (issue 20): online update per trial <= 0.1 × a batch refit at 50 trials. The script also prints the largest
relative difference between the online and the batch coefficients. Timings depend on the machine's load: the
script prints the 1-minute load average next to them. BLAS runs on one thread for both sides (threadpoolctl): on a
loaded machine a two-thread BLAS spends most of a small factorisation waiting for the other core.

Run from the repository root:  .venv/bin/python benchmarks/bench_online.py
"""

from __future__ import annotations

import os
import time

import numpy as np

from stimsteer.sysid import RidgeArx, Session
from stimsteer.sysid.datadriven import LsqPredictor
from stimsteer.sysid.online import OnlineLsqPredictor, OnlineRidgeArx

N_TRIALS, TRIAL, N, M, P = 50, 400, 6, 3, 8


def _trials(seed=0):
    rng = np.random.default_rng(seed)
    A = rng.normal(size=(N, N))
    A *= 0.9 / np.max(np.abs(np.linalg.eigvals(A)))
    B, C = rng.normal(size=(N, M)), rng.normal(size=(P, N))
    out = []
    for _ in range(N_TRIALS):
        u, x, y = rng.normal(size=(TRIAL, M)), np.zeros(N), np.empty((TRIAL, P))
        for k in range(TRIAL):
            y[k] = C @ x + 0.05 * rng.normal(size=P)
            x = A @ x + B @ u[k]
        out.append((u, y))
    return out


def _session(trials):
    edges = np.cumsum([0] + [t[0].shape[0] for t in trials])
    return Session(u=np.vstack([t[0] for t in trials]), y=np.vstack([t[1] for t in trials]), sample_rate_hz=100.0,
                   trials=np.column_stack([edges[:-1], edges[1:]]))


def _median_time(fn, repeats=5):
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return float(np.median(times))


def _online_step(make, trials, read):
    """Median time of taking the last trial in (plus the solve), each repeat from the state after 49 trials."""
    import copy

    base = make()
    for u, y in trials[:-1]:
        base.update(u, y)
    read(base)
    u, y = trials[-1]

    def step():
        o = copy.deepcopy(base)  # not timed separately: a deep copy of a few small arrays
        o.update(u, y)
        read(o)
    copy_time = _median_time(lambda: copy.deepcopy(base))
    return max(_median_time(step) - copy_time, 0.0), base


def main():
    trials = _trials()
    session = _session(trials)
    print(f"load average (1 min): {os.getloadavg()[0]:.2f} on {os.cpu_count()} CPUs")
    arx_kw = dict(output_lags=2, input_lags=2, delay_samples=1)
    fixed = RidgeArx(alphas=(1e-4,), **arx_kw)
    t_arx = _median_time(lambda: RidgeArx(alphas=(1e-4,), **arx_kw).fit(session))
    t_arx_auto = _median_time(lambda: RidgeArx().fit(session), repeats=1)
    t_on, base = _online_step(lambda: OnlineRidgeArx(alpha=1e-4, **arx_kw), trials, lambda o: o.coef_)
    base.update(*trials[-1])
    diff = np.abs(base.coef_ - fixed.fit(session).coef_).max() / np.abs(fixed.coef_).max()
    print(f"ridge ARX: online update per trial {t_on * 1e3:.2f} ms; batch refit (one structure and strength) "
          f"{t_arx * 1e3:.1f} ms, ratio {t_on / t_arx:.3f}; default batch fit (search) {t_arx_auto * 1e3:.0f} ms, "
          f"ratio {t_on / t_arx_auto:.4f}; largest relative coefficient difference {diff:.1e}")
    lsq_kw = dict(past_steps=4, horizon_steps=10)
    t_lsq = _median_time(lambda: LsqPredictor(alphas=(1e-6,), **lsq_kw).fit(session))
    t_lsq_auto = _median_time(lambda: LsqPredictor(**lsq_kw).fit(session), repeats=1)
    t_on, base = _online_step(lambda: OnlineLsqPredictor(alpha=1e-6, **lsq_kw), trials, lambda o: o.Kp_)
    base.update(*trials[-1])
    batch = LsqPredictor(alphas=(1e-6,), **lsq_kw).fit(session)
    K, K0 = np.hstack([base.Kp_, base.Kf_]), np.hstack([batch.Kp_, batch.Kf_])
    diff = np.abs(K - K0).max() / np.abs(K0).max()
    print(f"LSQ Hankel predictor: online update per trial {t_on * 1e3:.2f} ms; batch refit (one strength) "
          f"{t_lsq * 1e3:.1f} ms, ratio {t_on / t_lsq:.3f}; default batch fit (strengths cross-validated) "
          f"{t_lsq_auto * 1e3:.0f} ms, ratio {t_on / t_lsq_auto:.4f}; largest relative difference {diff:.1e}")


if __name__ == "__main__":
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=1):
        main()
