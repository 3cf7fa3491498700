"""Blanking hides the recorded outputs only (``Session.output_mask``): fits drop the rows and columns whose predicted
outputs are blanked, scores skip blanked outputs, and the inputs of blanked samples stay valid (issue 17, item 4)."""

import numpy as np
import pytest

from stimsteer.sysid import Session
from stimsteer.sysid.artifacts import blank_artifacts
from stimsteer.sysid.arx import RidgeArx
from stimsteer.sysid.exceptions import SessionError
from stimsteer.sysid.io import load_session, open_session_file, save_session
from stimsteer.sysid.metrics import freerun_scores, kstep_scores
from stimsteer.sysid.output_mask import output_valid, output_valid_segments
from stimsteer.sysid.prep import resample_session

FS = 1000.0


def _pulses(n=40000, seed=1, delay=3, n_trials=8):
    """130 Hz trains at 1 kHz (one sample per pulse) into y_k = 0.8 y_(k-1) + 0.05 u_(k-delay), plus an artifact
    of +3 / -1.5 on the pulse sample and the next: the case of issue 17's "What was measured"."""
    rng = np.random.default_rng(seed)
    u = np.zeros((n, 1))
    k = (np.arange(0, n / FS, 1 / 130.0) * FS).astype(int)
    u[k, 0] = rng.uniform(20, 60, k.size)
    y = np.zeros((n, 1))
    for i in range(delay, n):
        y[i, 0] = 0.8 * y[i - 1, 0] + 0.05 * u[i - delay, 0]
    y += 0.01 * rng.standard_normal((n, 1))
    y[k, 0] += 3.0
    y[k + 1, 0] -= 1.5
    step = n // n_trials
    return Session(u=u, y=y, sample_rate_hz=FS, trials=[(i, i + step) for i in range(0, n, step)])


@pytest.fixture(scope="module")
def pulses():
    s = _pulses()
    return s, blank_artifacts(s, window_s=0.002)


def test_blanked_pulse_trains_fit_and_recover_the_system(pulses):
    # Before: blanking 2 ms at 130 Hz / 1 kHz masked every pulse sample and ridge ARX raised "input never varies".
    # Now the inputs stay valid and the simulated system y_k = 0.8 y_(k-1) + 0.05 u_(k-3) is recovered within 3 %
    # (known by construction), where the same fit on the unblanked outputs is wrecked by the artifact.
    s, b = pulses
    assert b.mask.all() and np.array_equal(b.u, s.u)
    m = RidgeArx(output_lags=1, input_lags=1, delay_samples=3).fit(b)
    assert m.ar_coefs_.ravel()[0] == pytest.approx(0.8, rel=0.03)
    assert m.input_coefs_.ravel()[0] == pytest.approx(0.05, rel=0.03)
    raw = RidgeArx(output_lags=1, input_lags=1, delay_samples=3).fit(s)
    assert abs(raw.ar_coefs_.ravel()[0] - 0.8) > 0.5  # the artifact, fitted as a target, biases it


def test_ridge_arx_rows_are_exactly_the_rows_with_unblanked_targets(pulses):
    # Reference: an explicit least-squares fit (numpy.linalg.lstsq) on the rows y_k ~ [1, y_(k-1), u_(k-3)] of
    # every trial whose target y_k is not blanked. With one ridge strength close to 0, the streamed fit must equal it.
    _, b = pulses
    m = RidgeArx(output_lags=1, input_lags=1, delay_samples=3, alphas=(1e-12,)).fit(b)
    X, t = [], []
    for a, e in b.trials:
        k = np.arange(a + 3, e)
        k = k[b.output_mask[k]]
        X.append(np.column_stack([np.ones(k.size), b.y[k - 1, 0], b.u[k - 3, 0]]))
        t.append(b.y[k, 0])
    coef = np.linalg.lstsq(np.vstack(X), np.concatenate(t), rcond=None)[0]
    assert m.n_rows_ == sum(x.shape[0] for x in X)
    assert m.ar_coefs_.ravel()[0] == pytest.approx(coef[1], rel=1e-6)
    assert m.input_coefs_.ravel()[0] == pytest.approx(coef[2], rel=1e-6)


def test_scores_skip_blanked_outputs(pulses):
    # Reference: the R² definition of stimsteer.sysid.metrics (1 - SSE/SST about the mean of the scored samples),
    # computed by hand on the one-step predictions of the unblanked samples only.
    _, b = pulses
    m = RidgeArx(output_lags=1, input_lags=1, delay_samples=3).fit(b)
    sc = kstep_scores(m, b, horizon_steps=1).kstep
    yt, yp = [], []
    for a, e in b.trials:
        k = np.arange(a + m.past_steps_, e)
        k = k[b.output_mask[k]]
        yp.append(m.predict_many(np.stack([b.u[j - m.past_steps_:j] for j in k]),
                                 np.stack([b.y[j - m.past_steps_:j] for j in k]), b.u[k][:, None, :])[:, 0, 0])
        yt.append(b.y[k, 0])
    yt, yp = np.concatenate(yt), np.concatenate(yp)
    assert int(sc["n_samples"].iloc[0]) == yt.size
    assert sc["r2"].iloc[0] == pytest.approx(1 - ((yt - yp) ** 2).sum() / ((yt - yt.mean()) ** 2).sum(), rel=1e-9)
    free = freerun_scores(m, b).freerun
    assert int(free["n_samples"].iloc[0]) == sum(int(b.output_mask[a + m.past_steps_:e].sum()) for a, e in b.trials)
    assert free["vaf"].iloc[0] > 99.0


def test_direct_route_fits_and_scores_a_blanked_session(pulses):
    from stimsteer.sysid.datadriven import LsqPredictor

    _, b = pulses
    train, test = b.train_test(b.split(2))
    m = LsqPredictor(past_steps=4, horizon_steps=2).fit(train)
    n_cols = sum(sum(e - s - 5 for s, e in output_valid_segments(train, [(a, z)], 6, 4)) for a, z in train.trials)
    assert m.n_columns_ == n_cols  # only the columns whose two predicted outputs are unblanked
    assert kstep_scores(m, test, horizon_steps=2).kstep["r2"].min() > 0.99


def test_output_valid_segments_keeps_windows_whose_predicted_outputs_are_valid():
    om = np.ones(20, dtype=bool)
    om[[7, 8, 15]] = False
    s = Session(u=np.zeros((20, 1)), y=np.zeros((20, 1)), sample_rate_hz=FS, output_mask=om)
    # windows of 4 samples predicting their last 2: start t is kept iff t+2, t+3 avoid {7, 8, 15}
    got = output_valid_segments(s, [(0, 20)], 4, 2)
    kept = [t for t in range(17) if not {t + 2, t + 3} & {7, 8, 15}]
    assert sorted({t for a, e in got for t in range(a, e - 3)}) == kept
    assert all(e - a >= 4 for a, e in got)
    assert output_valid(s, 6, 10).tolist() == [True, False, False, True]
    assert output_valid_segments(s.replace(output_mask=None), [(0, 20)], 4, 2) == [(0, 20)]


def test_the_output_mask_survives_files_subsets_and_resampling(tmp_path, pulses):
    s, b = pulses
    path = save_session(b, tmp_path / "b.h5")
    back = load_session(path)
    assert np.array_equal(back.output_mask, b.output_mask) and back.content_hash() == b.content_hash()
    assert b.content_hash() != b.replace(output_mask=None).content_hash()
    with open_session_file(path) as f:  # the lazy file gives the same fit as the loaded session
        assert f.content_hash() == b.content_hash()
        lazy = RidgeArx(output_lags=1, input_lags=1, delay_samples=3).fit(f)
    eager = RidgeArx(output_lags=1, input_lags=1, delay_samples=3).fit(b)
    assert np.allclose(lazy.input_coefs_, eager.input_coefs_, rtol=1e-10)
    unblanked = save_session(s, tmp_path / "s.h5")
    with open_session_file(unblanked) as f:  # files without blanking keep their layout and hash
        assert f.output_mask is None and f.content_hash() == s.content_hash()
    sub = b.select_trials([1, 3])
    assert np.array_equal(sub.output_mask, np.concatenate([b.output_mask[a:e] for a, e in b.trials[[1, 3]]]))
    with pytest.raises(Exception, match=r"cannot keep blanked outputs"):
        save_session(b, tmp_path / "b.csv")


def test_output_mask_is_validated():
    with pytest.raises(SessionError, match=r"output_mask must have shape \(10,\)"):
        Session(u=np.zeros((10, 1)), y=np.zeros((10, 1)), sample_rate_hz=FS, output_mask=np.ones(9, dtype=bool))
    with pytest.raises(SessionError, match=r"output_mask must be boolean"):
        Session(u=np.zeros((10, 1)), y=np.zeros((10, 1)), sample_rate_hz=FS, output_mask=np.full(10, 2))


def test_trial_resamples_keep_the_blanked_outputs_of_each_drawn_trial():
    """Bootstrap draws (repeats allowed) and per-condition resamples carry each drawn trial's output mask; they used
    to raise a shape error on any blanked session (found when the two features met)."""
    from stimsteer.sysid.ensemble import resample_trials
    from stimsteer.sysid.network.conditions import _resampled

    om = np.ones(30, dtype=bool)
    om[[3, 14, 15, 27]] = False
    s = Session(u=np.arange(30.0)[:, None], y=np.zeros((30, 1)), sample_rate_hz=FS, output_mask=om,
                trials=[(0, 10), (10, 20), (20, 30)])
    for draw in (resample_trials(s, [1, 1, 0]), _resampled(s, [1, 1, 0])):
        np.testing.assert_array_equal(draw.output_mask, np.concatenate([om[10:20], om[10:20], om[0:10]]))
        np.testing.assert_array_equal(draw.u[:, 0], np.concatenate([np.arange(10, 20), np.arange(10, 20),
                                                                     np.arange(10)]))


def test_one_blanked_trial_is_folded_by_time_over_its_short_pieces():
    # Before: the direct route cut each valid piece of a single trial into n_splits blocks; blanking every 7.7
    # samples leaves pieces of a few columns, so every block was shorter than one column and the fit raised
    # "... fit in 0 fold(s)". Now the trial's pieces, end to end in time order, are cut into n_splits blocks.
    from stimsteer.sysid.datadriven import LsqPredictor
    from stimsteer.sysid.datadriven._fold_pieces import _fold_of_segments

    b = blank_artifacts(_pulses(n=8000, n_trials=1), window_s=0.002)
    L, past = 6, 4
    segs = output_valid_segments(b, b.segments(L), L, past)
    assert max(e - a for a, e in segs) < 3 * L  # the case: no piece survives a cut into 3 blocks of >= L samples
    pieces, k, scheme = _fold_of_segments(b, segs, 3, 0, L)
    assert k == 3 and scheme == "contiguous blocks (one trial)"
    cols = lambda ranges: [t for a, e, *_ in ranges for t in range(a, e - L + 1)]  # noqa: E731 (column starts)
    assert set(cols(pieces)) <= set(cols(segs)) and len(cols(pieces)) == len(set(cols(pieces)))  # none twice
    assert len(cols(pieces)) >= len(cols(segs)) - 2 * (L - 1)  # at most L - 1 columns lost at each of 2 cuts
    folds = [f for a, e, f in sorted(pieces)]
    assert folds == sorted(folds)  # contiguous in time: fold 0, then 1, then 2
    sizes = [len(cols([p for p in pieces if p[2] == f])) for f in range(3)]
    assert max(sizes) - min(sizes) <= 0.02 * sum(sizes)  # blocks of nearly equal length
    m = LsqPredictor(past_steps=past, horizon_steps=L - past).fit(b)
    assert m.cv_scheme_ == "contiguous blocks (one trial)" and m.n_columns_ == len(cols(pieces))


def test_resampling_blanks_only_the_outputs_the_blank_really_moves():
    # Before: every new sample the anti-aliasing filter reached (20 source samples either side at 1 kHz -> 500 Hz)
    # was blanked: samples 90..110 for a blank at source samples 200-201. Now the blank is interpolated before
    # filtering and a new sample is blanked only where the blank holds > 1 % of the filter's absolute weight.
    # Reference, written out here: scipy.signal.resample_poly's default filter (firwin of 2·10·max(up, down) + 1
    # taps, cut-off 1/max(up, down), Kaiser beta 5; SciPy documentation), new sample j at source position 2j.
    from scipy.signal import firwin

    from stimsteer.sysid.prep import BLANK_INFLUENCE_TOLERANCE

    n, blanked = 400, {200, 201}
    t = np.arange(n) / FS
    clean = np.sin(2 * np.pi * 7.0 * t)[:, None]
    y = clean.copy()
    y[sorted(blanked), 0] += [80.0, -40.0]  # the artifact, under the blank
    one = np.zeros((n, 1))
    one[200] = 1.0
    b = blank_artifacts(Session(u=one, y=y, sample_rate_hz=FS), window_s=0.002)
    assert set(np.flatnonzero(~b.output_mask)) == blanked
    half = resample_session(b, target_rate_hz=500.0)
    h = np.abs(firwin(41, 0.5, window=("kaiser", 5.0)))
    share = np.array([sum(h[20 + k - 2 * j] for k in blanked if abs(k - 2 * j) <= 20)
                      / sum(h[20 + k - 2 * j] for k in range(n) if abs(k - 2 * j) <= 20) for j in range(n // 2)])
    expected = np.flatnonzero(share > BLANK_INFLUENCE_TOLERANCE).tolist()
    assert np.flatnonzero(~half.output_mask).tolist() == expected
    assert len(expected) < 21 and expected[0] > 90  # fewer than the filter's whole reach
    # the artifact does not leak into the kept samples: they equal the artifact-free signal's resampling to 1e-3
    # (the blank's straight line departs from the sine by < 0.05; 1 % of the filter weight on it moves < 1e-3)
    ref = resample_session(Session(u=one, y=clean, sample_rate_hz=FS), target_rate_hz=500.0)
    kept = half.output_mask
    assert np.max(np.abs(half.y[kept, 0] - ref.y[kept, 0])) < 1e-3
    assert half.metadata["prep"][-1]["blanked_outputs"].startswith("interpolated across each blank")


@pytest.mark.parametrize("make", ["subspace", "lsq_one_strength", "lsq_selection", "hankel_one_strength"])
def test_routes_that_lose_every_window_to_blanking_say_so_and_what_to_do(make):
    # 130 Hz pulses at 1 kHz, 2 ms blanked after each: every window predicting 10 outputs holds a blanked one.
    # Before: subspace said "0 Hankel columns ... record longer trials" (no word of blanking), the selection
    # "fit in 0 fold(s)", and a direct predictor with one strength fitted silently on no column at all
    # (n_columns_ == 0). Now each names the blanking, the counts (known by construction: every window) and the fixes.
    from stimsteer.sysid.datadriven import HankelPredictor, LsqPredictor
    from stimsteer.sysid.subspace import SubspaceId

    b = blank_artifacts(_pulses(n=6000, n_trials=2), window_s=0.002)
    est = {"subspace": lambda: SubspaceId(past_steps=10, future_steps=10, order=2),
           "lsq_one_strength": lambda: LsqPredictor(past_steps=10, horizon_steps=10, alphas=[1e-3]),
           "lsq_selection": lambda: LsqPredictor(past_steps=10, horizon_steps=10),
           "hankel_one_strength": lambda: HankelPredictor(past_steps=10, horizon_steps=10, lambdas_g=[1e-3])}[make]()
    n = sum(e - a - 19 for a, e in b.trials)
    with pytest.raises(SessionError, match=rf"Output blanking removed {n} of the {n} windows of 20 samples.*"
                                           r"--blank-outputs-ms.*template.*--method arx"):
        est.fit(b)


def test_a_blanked_session_file_read_through_a_description_stays_blanked(tmp_path):
    # Before: a session file given to convert with a description became a recording whose outputs were all valid,
    # so the blanked outputs (straight lines across each blank) came back as fitting targets. Known by
    # construction: the rebuilt session has the file's output mask, outputs and trials.
    from stimsteer.sysid.description import parse_description
    from stimsteer.sysid.from_recording import build_session, read_recording

    b = blank_artifacts(_pulses(n=4000, n_trials=2), window_s=0.002)
    save_session(b, tmp_path / "b.h5")
    desc = parse_description({"channels": {"inputs": ["u0"], "outputs": ["y0"]}})
    s = build_session(read_recording(tmp_path / "b.h5", desc), desc)
    assert not b.output_mask.all()
    assert np.array_equal(s.output_mask, b.output_mask) and np.array_equal(s.y, b.y) and np.array_equal(s.u, b.u)
    assert np.array_equal(s.trials, b.trials) and s.mask.all()
