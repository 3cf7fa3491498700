"""Accuracy of every method with its automatic settings on six simulated systems of different kinds.

For each system: a seeded session of 12 trials (9 train, 3 held out by ``fit_route``'s seeded split), every
registered method fitted with its automatic selection (ridge ARX: lags, delay and alpha; subspace: order; direct
predictors: past 10, horizon 20, strengths by their own rules), and printed per method:

* ``vaf`` — free-run VAF on the held-out trials (fit's printed score, mean over outputs);
* ``ref`` — a hand-written least-squares ARX (numpy ``lstsq``, an intercept) whose orders (1-8 lags, delay 0-3)
  are searched by free-run error on 2 of the training trials, refitted on all 9 and scored by the same rule
  (Ljung 1999, System Identification, ch. 16: order selection by validation);
* ``gap`` = vaf − ref (target: >= −1 point);
* ``peak`` — max |ŷ| / max |y| of the prediction of a 5,000-sample pattern from rest against the noise-free system's
  own response (target for stable systems: <= 1.5, no divergence);
* ``pred−fit`` — the free-run VAF of the saved-and-loaded model on the held-out trials minus fit's (target 0.1).

Targets are printed, never asserted. Run: ``.venv/bin/python benchmarks/bench_accuracy.py`` (about a minute or two).
"""

from __future__ import annotations

import itertools
import tempfile
import time
import warnings
from pathlib import Path

import numpy as np

from stimsteer.control.network_plant import LinearNetworkPlant
from stimsteer.control.plants import record_session
from stimsteer.control.saturating_plant import SaturatingRateNetworkPlant
from stimsteer.sysid import fit_route, load_predictor, save_predictor
from stimsteer.sysid.metrics import freerun_scores
from stimsteer.sysid.patterns import Pattern, predict_pattern

RATE, N_TRIALS, LENGTH, REST = 100.0, 12, 300, 50
METHODS = (("indirect", "arx", {}), ("indirect", "subspace", {}), ("direct", "lsq", {"past_steps": 10}),
           ("direct", "hankel", {"past_steps": 10}))
HORIZON = 20


def _linear(A, B, C, D=None, **kw):
    return lambda **noise: LinearNetworkPlant(np.asarray(A, float), np.asarray(B, float), np.asarray(C, float),
                                              None if D is None else np.asarray(D, float), sample_rate_hz=RATE,
                                              **{**kw, **noise})


def _systems():
    rng = np.random.default_rng(11)
    A2 = [[0.9, 0.2], [-0.15, 0.75]]
    osc = 0.985 * np.array([[np.cos(0.25), -np.sin(0.25)], [np.sin(0.25), np.cos(0.25)]])
    W = rng.standard_normal((4, 4))
    W *= 0.8 / np.linalg.norm(W, 2)
    return {
        "exact linear": (_linear(A2, [[1.0], [0.5]], [[1.0, 0.0]]), {}),
        "noisy linear": (_linear(A2, [[1.0], [0.5]], [[1.0, 0.0]]),
                         {"process_noise_std": 0.05, "measurement_noise_std": 0.1}),
        "feed-through": (_linear(A2, [[1.0], [0.5]], [[1.0, 0.0]], [[0.8]]), {"measurement_noise_std": 0.02}),
        "slow drift": (_linear(A2, [[1.0], [0.5]], [[1.0, 0.0]]),
                       {"measurement_noise_std": 0.05, "drift_amplitude": 0.3, "drift_period_s": 30.0}),
        "saturating network": (lambda **kw: SaturatingRateNetworkPlant(
            W, rng.standard_normal((4, 2)) * 0.6, np.eye(4)[:2], leak=0.3, sample_rate_hz=RATE, **kw),
            {"measurement_noise_std": 0.01}),
        "damped oscillator": (_linear(osc, [[1.0], [0.0]], [[1.0, 0.5]]), {"measurement_noise_std": 0.05}),
    }


def _schedule(m: int, n: int, seed: int):
    rng = np.random.default_rng(seed)
    u = np.where(rng.random((n, m)) < 0.3, rng.uniform(-1.0, 1.0, (n, m)), 0.0)
    return u


def _session(make, noise, seed):
    n = N_TRIALS * (LENGTH + REST)
    plant = make(**noise, seed=seed)
    u = _schedule(plant.n_inputs if hasattr(plant, "n_inputs") else plant.B.shape[1], n, seed)
    trials = [(i * (LENGTH + REST), i * (LENGTH + REST) + LENGTH) for i in range(N_TRIALS)]
    for a, b in trials:
        u[b:b + REST] = 0.0
    return record_session(plant, u, trials=trials, seed=seed)


# ------------------------------------------------------------------------------------------------ reference ARX
def _rows(s, trials, na, nb, d):
    L = max(na, d + nb - 1)
    X, Y = [], []
    for t in trials:
        a, b = s.trials[t]
        u, y = s.u[a:b], s.y[a:b]
        for k in range(L, b - a):
            X.append(np.concatenate([y[k - na:k][::-1].ravel(), u[k - d - nb + 1:k - d + 1][::-1].ravel(), [1.0]]))
            Y.append(y[k])
    return np.array(X), np.array(Y)


def _simulate(theta, s, trials, na, nb, d, skip):
    """Free run of each trial from its first ``skip`` measured samples (fit's rule); measured and simulated."""
    meas, sims = [], []
    for t in trials:
        a, b = s.trials[t]
        u, y = s.u[a:b], s.y[a:b]
        sim = y.copy()
        for k in range(max(skip, na, d + nb - 1), b - a):
            x = np.concatenate([sim[k - na:k][::-1].ravel(), u[k - d - nb + 1:k - d + 1][::-1].ravel(), [1.0]])
            sim[k] = x @ theta
        meas.append(y[skip:])
        sims.append(sim[skip:])
    return np.vstack(meas), np.vstack(sims)


def _vaf(y, yhat):
    return float(np.mean(100.0 * (1.0 - (y - yhat).var(axis=0) / y.var(axis=0))))


def _reference(s, train, test, skip):
    inner_fit, inner_val = train[:-2], train[-2:]
    best = None
    for na, nb, d in itertools.product(range(1, 9), range(1, 9), range(0, 4)):
        theta = np.linalg.lstsq(*_rows(s, inner_fit, na, nb, d), rcond=None)[0]
        with np.errstate(all="ignore"):
            v = _vaf(*_simulate(theta, s, inner_val, na, nb, d, max(na, d + nb - 1)))
        if np.isfinite(v) and (best is None or v > best[0]):
            best = (v, na, nb, d)
    _v, na, nb, d = best
    theta = np.linalg.lstsq(*_rows(s, train, na, nb, d), rcond=None)[0]
    with np.errstate(all="ignore"):
        return _vaf(*_simulate(theta, s, test, na, nb, d, max(skip, na, d + nb - 1))), (na, nb, d)


# ------------------------------------------------------------------------------------------------ one system
def _long_pattern_peak(make, res, s):
    n = 5000
    u = _schedule(s.n_inputs, n, 99)
    truth = record_session(make(seed=0), u)  # noise-free, from rest
    pat = Pattern(np.arange(n) / RATE, u, s.input_names, s.input_units, RATE)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        pred = predict_pattern(res.predictor, res.provenance, pat)
    with np.errstate(all="ignore"):
        return float(np.max(np.abs(pred.y)) / np.max(np.abs(truth.y))), pred.notes


def _method_row(name, make, s, route, method, settings, tmp):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        t0 = time.perf_counter()
        res = fit_route(s, route=route, method=method, settings=settings, horizon_steps=HORIZON, seed=1)
        fit_s = time.perf_counter() - t0
    vaf = float(res.heldout.freerun["vaf"].mean())
    path = Path(tmp) / f"{name}_{method}.h5".replace(" ", "_")
    save_predictor(res.predictor, path, provenance=res.provenance, overwrite=True)
    loaded, _prov = load_predictor(path)
    again = float(freerun_scores(loaded, s.select_trials(res.split.test)).freerun["vaf"].mean())
    peak, notes = _long_pattern_peak(make, res, s)
    return res, vaf, again - vaf, peak, fit_s, any("unstable" in n for n in notes)


def main() -> None:
    print(f"{N_TRIALS} trials of {LENGTH} samples at {RATE:g} Hz per system; 3 held out (seed 1); free-run VAF in %")
    print(f"{'system':<20}{'method':<10}{'vaf':>8}{'ref':>8}{'gap':>8}{'peak':>8}{'pred-fit':>10}{'fit s':>7}  "
          "selection")
    with tempfile.TemporaryDirectory() as tmp:
        for k, (name, (make, noise)) in enumerate(_systems().items()):
            s = _session(make, noise, seed=100 + k)
            ref, order = None, None
            for route, method, settings in METHODS:
                res, vaf, diff, peak, fit_s, cautioned = _method_row(name, make, s, route, method, settings, tmp)
                if ref is None:
                    ref, order = _reference(s, list(res.split.train), list(res.split.test),
                                            int(res.predictor.past_steps_))
                sel = _selection(res.predictor)
                flag = " (predict warned: unstable chain)" if cautioned else ""
                print(f"{name:<20}{method:<10}{vaf:8.2f}{ref:8.2f}{vaf - ref:8.2f}{peak:8.2f}{diff:10.1e}"
                      f"{fit_s:7.2f}  {sel}{flag}")
            print(f"{'':<20}reference ARX orders (na, nb, delay) = {order}")


def _selection(p) -> str:
    if hasattr(p, "structure_table_"):
        return f"na={p.output_lags_} nb={p.input_lags_} d={p.delay_samples_} alpha={p.alpha_:.0e}"
    if hasattr(p, "order_"):
        return f"order={p.order_} D={'fit' if p.feedthrough_ else '0'}" + (" (unstable)" if not p.is_stable_ else "")
    if hasattr(p, "lambda_g_relative_"):
        return f"lambda_g={p.lambda_g_relative_:.0e} chain rho={p.chain_spectral_radius_:.3f}"
    return f"alpha={p.alpha_:.0e} chain rho={p.chain_spectral_radius_:.3f}"


if __name__ == "__main__":
    main()
