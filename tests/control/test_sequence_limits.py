"""Safety properties of limits over the delivered sequence: rolling charge and energy windows, train length, duty.

The checks decode model inputs into pulses (``decode_plan``) and measure every pulse and every continuous-time
window directly from the pulse list with numpy, independently of the compiled bounds, window budgets and masks they
test. Random problems cover every limit kind of the ``[physical]`` section (amplitude, charge per phase, Shannon,
injection, charge-rate window, energy window, train length, duty, irradiance) on electrical and optical sites, and
infeasible ones (a window budget smaller than one pulse, an applied past that already breaks a window).
"""

import dataclasses

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from stimsteer.control.loop import run_closed_loop
from stimsteer.control.mpc import DataPredictiveController, ModelPredictiveController
from stimsteer.control.mpc._budget import _RollingBudget, blend_all
from stimsteer.control.physical_limits import PhysicalLimits, compile_limits
from stimsteer.control.plants import LinearNetworkPlant, record_session
from stimsteer.control.pulse_plan import checks_pass, safety_checks
from stimsteer.control.random_networks import random_network
from stimsteer.control.sequence_limits import on_mask
from stimsteer.sysid import StateSpaceModel
from stimsteer.sysid.exceptions import LimitsError
from stimsteer.sysid.stimulation import InputMapping, StimulationDescription, decode_plan

# Shannon (1992), A model of safe levels for electrical stimulation, IEEE Trans. Biomed. Eng. 39:424: the limit
# k = log10(D) + log10(Q) <= 1.75 that clinical practice applies (common practice, no source for the 1.75 choice)
SHANNON_K = 1.75


def _mapping(rate, sites):
    return InputMapping(StimulationDescription.from_dict({"sites": sites}), rate)


# ------------------------------------------------------------------------------------------- independent checks
def _window_sums(t, v, span):
    """Σ v over [t_i, t_i + span) for each i (windows starting at a pulse hold the worst one)."""
    if not t.size:
        return np.zeros(0)
    o = np.argsort(t, kind="stable")
    t, v = t[o], v[o]
    c = np.concatenate([[0.0], np.cumsum(v)])
    return c[np.searchsorted(t, t + span - 1e-12, side="left")] - c[:-1]


def _pulse_energy_uj(row, site, impedance):
    if site.kind == "optical":  # irradiance x illuminated area x width (definition): mW/mm² · mm² · ms = µJ
        return row["irradiance_mw_per_mm2"] * site.illuminated_area_mm2 * site.pulse_width_ms
    # Joule's law on a resistive electrode model, each phase separately (common practice, no source): I² R t
    i1, i2 = row["amplitude_ua"] * 1e-6, row["second_phase_amplitude_ua"] * 1e-6
    return (i1**2 * impedance * row["phase_width_us"] * 1e-6 + i2**2 * impedance * row["second_phase_width_us"]
            * 1e-6) * 1e6


def breaks(u, mapping, table, u_past=None):
    """Every physical limit of ``table`` that the pulses decoded from ``u`` break (counting ``u_past`` before it in
    the rolling windows and trains), measured on the pulse list itself."""
    rate = mapping.sample_rate_hz
    seq = u if u_past is None else np.vstack([u_past, u])
    t0 = -(len(seq) - len(u)) / rate
    pulses = decode_plan(seq, mapping, start_time_s=t0)
    plan = pulses[pulses["onset_s"] >= -1e-12]
    out, rtol = [], 1e-7
    for site in mapping.sites:
        lim = table["sites"][site.name]
        sp, every = plan[plan["site"] == site.name], pulses[pulses["site"] == site.name]
        if site.kind == "optical":
            if len(sp) and sp["irradiance_mw_per_mm2"].max() > lim["irradiance_max_mw_per_mm2"] * (1 + rtol):
                out.append(f"irradiance {site.name}")
        else:
            a2 = sp["second_phase_amplitude_ua"].to_numpy()
            if len(sp) and max(sp["amplitude_ua"].max(), a2.max()) > lim["amplitude_max_ua"] * (1 + rtol):
                out.append(f"amplitude {site.name}")
            q = sp["charge_per_phase_uc"].to_numpy()
            if "charge_per_phase_max_uc" in lim and np.any(q > lim["charge_per_phase_max_uc"] * (1 + rtol)):
                out.append(f"charge per phase {site.name}")
            area = site.contact_area_cm2
            # Shannon (1992): log10(Q/A) + log10(Q) <= k on macro contacts
            if area >= 1e-3 and len(q) and np.any(np.log10(q / area) + np.log10(q) > SHANNON_K + 1e-9):
                out.append(f"shannon {site.name}")
            if "injection_limit_uc_per_cm2" in lim and np.any(q / area > lim["injection_limit_uc_per_cm2"] * (1 + rtol)):
                out.append(f"injection {site.name}")
        period = 1.0 / site.frequency_hz
        t = np.sort(every["onset_s"].to_numpy())
        if "train_length_max_s" in lim and t.size:
            # a train: pulses one period apart; its onsets must span less than the longest train
            cut = np.flatnonzero(np.diff(t) > period * (1 + 1e-6))
            starts, stops = np.concatenate([[0], cut + 1]), np.concatenate([cut, [t.size - 1]])
            span = t[stops] - t[starts]
            if np.any((span >= lim["train_length_max_s"] - 1e-12) & (t[stops] >= 0)):
                out.append(f"train length {site.name}")
        if "duty_cycle_max_fraction" in lim and t.size:
            d = lim.get("duty_window_s", table.get("window_s"))
            light = site.pulse_width_ms * 1e-3 * site.frequency_hz if site.kind == "optical" else 1.0
            # on-time = pulses x period (x the light-on fraction); a window's edges may cut one period and a sample
            on = _window_sums(t, np.full(t.size, period * light), d)[t >= -d]
            if np.any(on > lim["duty_cycle_max_fraction"] * d + (period + 2.0 / rate) * light + 1e-12):
                out.append(f"duty {site.name}")
    out += _window_breaks(pulses, mapping, table)
    return out


def _window_breaks(pulses, mapping, table):
    if "window_s" not in table or not len(pulses):
        return []
    ws, out = table["window_s"], []
    t = pulses["onset_s"].to_numpy()
    recent = t >= -1e-12  # windows that start before the plan but reach into it count too
    recent = t + ws > 0
    if "charge_rate_max_uc_per_s" in table:
        q = pulses["charge_per_phase_uc"].fillna(0.0).to_numpy()
        worst = np.max(_window_sums(t, q, ws)[recent], initial=0.0)
        if worst > table["charge_rate_max_uc_per_s"] * ws * (1 + 1e-7):
            out.append(f"charge window {worst:.6g}")
    if "window_energy_max_uj" in table:
        sites = {s.name: s for s in mapping.sites}
        e = np.array([_pulse_energy_uj(r, sites[r["site"]], table["sites"][r["site"]].get("impedance_ohm"))
                      for _, r in pulses.iterrows()])
        worst = np.max(_window_sums(t, e, ws)[recent], initial=0.0)
        if worst > table["window_energy_max_uj"] * (1 + 1e-7):
            out.append(f"energy window {worst:.6g}")
    return out


# ------------------------------------------------------------------------------------------- random problems
def _random_case(seed, *, optical=None):
    g = np.random.default_rng(seed)
    rate = float(g.choice([100.0, 250.0, 1000.0]))
    freq = float(g.choice([rate, rate / 2, rate / 3, 2 * rate, g.uniform(5.0, 1.5 * rate)]))
    pw = float(g.uniform(20.0, 200.0))
    if pw * 3e-6 * freq >= 0.9:  # an asymmetric pulse lasts 3 PW
        freq = 0.3 / (pw * 3e-6)
    area = float(10 ** g.uniform(-5.5, -0.5))
    e = {"kind": "electrical", "phase_width": f"{pw} us", "frequency": f"{freq} Hz",
         "amplitude_unit": str(g.choice(["uA", "mA"])), "contact_area": f"{area} cm^2"}
    if g.random() < 0.3:
        e.update(waveform="asymmetric", second_phase_width=f"{2 * pw} us")
    sites, lims = {"a": e}, {"a": {"amplitude_max_ua": float(g.uniform(10.0, 3000.0))}}
    a = lims["a"]
    if g.random() < 0.5:
        a["charge_per_phase_max_uc"] = float(g.uniform(0.001, 0.3))
    if area < 1e-3 or g.random() < 0.3:
        a["injection_limit_uc_per_cm2"] = float(g.uniform(30.0, 3000.0))
    if (g.random() < 0.3) if optical is None else optical:
        of = float(g.uniform(5.0, 0.8 * rate))
        sites["o"] = {"kind": "optical", "pulse_width": f"{min(5.0, 500.0 / of)} ms", "frequency": f"{of} Hz",
                      "illuminated_area": f"{g.uniform(0.01, 0.2)} mm^2"}
        lims["o"] = {"irradiance_max_mw_per_mm2": float(g.uniform(1.0, 20.0))}
    top = {}
    if g.random() < 0.8:
        top["window_s"] = float(g.uniform(0.05, 1.0))
        if g.random() < 0.7:
            top["charge_rate_max_uc_per_s"] = float(10 ** g.uniform(-1, 2))
        if g.random() < 0.5 or "charge_rate_max_uc_per_s" not in top:
            top["window_energy_max_uj"] = float(10 ** g.uniform(-3, 1))
            a["impedance_ohm"] = float(g.uniform(200.0, 5000.0))
    for name, lim in lims.items():
        if g.random() < 0.4:
            lim["train_length_max_s"] = float(g.uniform(2.0, 20.0) / rate)
        if g.random() < 0.4:
            lim["duty_cycle_max_fraction"] = float(g.uniform(0.1, 0.9)) * (
                1.0 if name == "a" else min(1.0, 2 * _light(sites[name])))
            lim["duty_window_s"] = float(g.uniform(10.0, 60.0) / rate)
    return g, _mapping(rate, sites), {**top, "sites": lims}


def _light(site):
    f = float(site["frequency"].split()[0])
    return float(site["pulse_width"].split()[0]) * 1e-3 * f


def _inside(u, lim, u_past):
    """``u`` made to obey the compiled StimLimits as a controller's projection does: box, on/off mask, budgets."""
    lo, hi = lim.input_bounds()
    u = np.clip(u, lo, hi)
    if lim.train_limits is not None:
        u = np.where(on_mask(lim.train_limits, u_past, len(u)), u, 0.0)
    if lim.window_budgets:
        buds = [_RollingBudget(b.budget, b.window_steps, len(u), None, linear=b.linear, quadratic=b.quadratic)
                for b in lim.window_budgets]
        u = blend_all(buds, [b.history(u_past) for b in buds], u, np.zeros_like(u))
    return u


def _check_random_problem(seed):
    g, m, table = _random_case(seed)
    try:
        c = compile_limits(PhysicalLimits.from_dict(table), m)
    except LimitsError as exc:  # refused (a window budget smaller than one pulse): reported, never relaxed
        assert "smaller than one pulse" in str(exc)
        return "refused"
    lim = c.stim_limits
    lo, hi = lim.input_bounds()
    past = np.zeros((0, len(hi)))
    if g.random() < 0.5:  # an applied past planned under the same limits
        past = _inside(g.uniform(0, 1.2, size=(int(g.integers(5, 60)), len(hi))) * hi, lim, past)
    u = g.uniform(0, 1.2, size=(int(g.integers(20, 120)), len(hi))) * hi * (g.random(size=(1, len(hi))) < 0.9)
    u = _inside(u, lim, past)
    assert not any(lim.violations(u, history=past).values())
    assert breaks(u, m, table, past) == []
    assert checks_pass(safety_checks(u, m, c, u_past=past)[1])
    return "ok"


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(seed=st.integers(0, 2**31 - 1))
def test_inputs_inside_the_compiled_limits_deliver_only_safe_pulses(seed):
    _check_random_problem(seed)


@pytest.mark.slow
@settings(max_examples=1000, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(seed=st.integers(0, 2**31 - 1))
def test_a_thousand_random_problems_deliver_only_safe_pulses(seed):
    _check_random_problem(seed)


def test_the_independent_checks_catch_what_the_limits_forbid():
    """The checker above must be able to fail: a full train breaks the duty, train and window limits it tests."""
    m = _mapping(250.0, {"a": {"kind": "electrical", "phase_width": "100 us", "frequency": "250 Hz",
                               "contact_area": "0.06 cm^2"}})
    table = {"window_s": 0.2, "charge_rate_max_uc_per_s": 1.0, "window_energy_max_uj": 0.01,
             "sites": {"a": {"amplitude_max_ua": 100.0, "train_length_max_s": 0.05, "duty_cycle_max_fraction": 0.5,
                             "duty_window_s": 0.2, "impedance_ohm": 1000.0}}}
    found = breaks(np.full((100, 1), 100.0), m, table)
    assert {b.split()[0] for b in found} >= {"train", "duty", "charge", "energy"}


# ------------------------------------------------------------------------------------------- closed loops
def _loop_case(seed):
    """A random stable network driven through one site (positive gains, a far positive target: the loop wants to
    stimulate all the time) under one or more sequence limits that bind."""
    g = np.random.default_rng(seed)
    n, p = int(g.integers(2, 4)), int(g.integers(1, 3))
    A = random_network(n, density=0.6, seed=g, scale=float(g.uniform(0.5, 0.9)), self_weight=0.3, signed=False)
    freq = ["250 Hz", "125 Hz", "500 Hz"][seed % 3]
    m = _mapping(250.0, {"a": {"kind": "electrical", "phase_width": "90 us", "frequency": freq,
                               "contact_area": str(g.choice(["0.06 cm^2", "2e-5 cm^2"]))}})
    site = {"amplitude_max_ua": float(g.uniform(50, 400)), "injection_limit_uc_per_cm2": 200.0}
    bound = compile_limits(PhysicalLimits.from_dict({"sites": {"a": site}}), m).amplitude_max[0]
    f = m.sites[0].frequency_hz
    table = {"sites": {"a": site}}
    kinds = [("charge", "energy", "train", "duty")[k] for k in g.permutation(4)[:int(g.integers(1, 4))]]
    table["window_s"] = float(g.uniform(0.05, 0.3))
    if "charge" in kinds or "energy" not in kinds:
        table["charge_rate_max_uc_per_s"] = float(g.uniform(0.2, 0.8)) * bound * 90e-6 * f
        if seed % 7 == 0:  # a budget a single pulse at the amplitude bound just fits
            table["charge_rate_max_uc_per_s"] = 1.01 * bound * 90e-6 / table["window_s"]
    if "energy" in kinds:
        site["impedance_ohm"] = 1000.0
        full = (bound * 1e-6) ** 2 * 1000.0 * 180e-6 * f * table["window_s"] * 1e6  # µJ of the full train
        table["window_energy_max_uj"] = float(g.uniform(0.1, 0.6)) * full
    if "train" in kinds:
        site["train_length_max_s"] = float(g.uniform(0.02, 0.1))
    if "duty" in kinds:
        site["duty_cycle_max_fraction"], site["duty_window_s"] = float(g.uniform(0.2, 0.7)), float(g.uniform(0.1, 0.3))
    c = compile_limits(PhysicalLimits.from_dict(table), m)
    c = dataclasses.replace(c, stim_limits=dataclasses.replace(c.stim_limits, input_names=None))  # plant: "u0"
    plant = LinearNetworkPlant(A, np.abs(g.normal(size=(n, 1))) * 0.05, np.abs(g.normal(size=(p, n))),
                               measurement_noise_std=0.01, seed=int(g.integers(1 << 30)))
    return g, m, c, table, plant, g.uniform(20.0, 100.0, size=p)


def _controller(seed, g, c, plant):
    if seed % 2 == 0:
        ss = StateSpaceModel(A=plant.A, B=plant.B, C=plant.C, past_steps=plant.A.shape[0])
        return ModelPredictiveController(model=ss, limits=c.stim_limits, horizon_steps=6, input_weight=1e-6).fit()
    from stimsteer.sysid.datadriven import LsqPredictor

    lo, hi = c.stim_limits.input_bounds()
    sess = record_session(plant, g.uniform(lo, hi, size=(300, 1)), seed=seed)
    pred = LsqPredictor(past_steps=plant.A.shape[0], horizon_steps=6).fit(sess)
    return DataPredictiveController(predictor=pred, limits=c.stim_limits, input_weight=1e-6).fit()


@pytest.mark.slow
def test_closed_loops_on_both_routes_never_break_a_sequence_limit():
    # >= 100 closed loops of 200 steps, model and data routes, fast path on and off: the pulses decoded from the
    # applied inputs are checked against every declared limit, continuous-time windows included
    used = []
    for seed in range(100):
        g, m, c, table, plant, target = _loop_case(seed)
        ctrl = _controller(seed, g, c, plant)
        loop = run_closed_loop(ctrl, plant, n_steps=200, target=target, seed=seed, use_fast_path=bool(seed % 3))
        assert breaks(loop.inputs, m, table) == [], seed
        assert not any(loop.violations.values()), (seed, loop.violations)
        if "charge_rate_max_uc_per_s" in table:
            pulses = decode_plan(loop.inputs, m)
            q = _window_sums(pulses["onset_s"].to_numpy(), pulses["charge_per_phase_uc"].to_numpy(), table["window_s"])
            used.append((m.sites[0].frequency_hz, np.max(q, initial=0) / (table["window_s"] *
                                                                          table["charge_rate_max_uc_per_s"])))
    at_rate = [u for f, u in used if f >= 250.0]
    # the linear window budget is exact for a train at (or above) the sample rate: the loop fills it
    assert len(at_rate) >= 20 and np.median(at_rate) > 0.98


# ------------------------------------------------------------------------------------------- infeasible
@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(seed=st.integers(0, 2**31 - 1), kind=st.sampled_from(["charge", "energy", "duty"]))
def test_an_applied_past_that_breaks_a_window_is_reported_infeasible_never_relaxed(seed, kind):
    g = np.random.default_rng(seed)
    m = _mapping(250.0, {"a": {"kind": "electrical", "phase_width": "90 us", "frequency": "250 Hz",
                               "contact_area": "0.06 cm^2"}})
    site = {"amplitude_max_ua": 200.0, "impedance_ohm": 1000.0}
    table = {"window_s": float(g.uniform(0.1, 0.3)), "sites": {"a": site}}
    if kind == "charge":
        table["charge_rate_max_uc_per_s"] = float(g.uniform(1.0, 3.0))
    elif kind == "energy":
        table["window_energy_max_uj"] = float(g.uniform(0.02, 0.05))
    else:
        table["charge_rate_max_uc_per_s"] = 1e3
        site.update(duty_cycle_max_fraction=float(g.uniform(0.1, 0.5)), duty_window_s=table["window_s"])
    c = compile_limits(PhysicalLimits.from_dict(table), m)
    lim = dataclasses.replace(c.stim_limits, input_names=None)
    ctrl = ModelPredictiveController(model=StateSpaceModel(A=[[0.9]], B=[[1.0]], C=[[1.0]], past_steps=1),
                                     limits=lim, horizon_steps=8).fit()
    past = np.full((100, 1), 200.0)  # full-amplitude pulses for 0.4 s: every window above is already over
    plan = ctrl.plan(past, np.zeros((100, 1)), target=np.full((8, 1), 50.0))
    assert plan.status == "infeasible" and plan.fallback and not plan.ok
    assert np.all(plan.inputs == 0.0)  # the fallback: no stimulation (no slew limit), nothing relaxed
    assert breaks(plan.inputs, m, table) == []  # the plan adds nothing; the past broke the window


def test_the_first_step_of_a_train_mask_is_exact():
    """Step 0 (what a loop applies) may be on exactly when the applied history allows it."""
    from stimsteer.control.sequence_limits import TrainLimits, count_violations

    train = TrainLimits((4,), (6,), (10,), (1,))
    lim = dataclasses.replace(compile_limits(PhysicalLimits.from_dict(
        {"sites": {"a": {"amplitude_max_ua": 100.0}}}), _mapping(250.0, {"a": {
            "kind": "electrical", "phase_width": "90 us", "frequency": "250 Hz", "contact_area": "0.06 cm^2"}})
    ).stim_limits, train_limits=train, input_names=None)
    rng = np.random.default_rng(3)
    for _ in range(300):
        past = (rng.random((12, 1)) < 0.5) * 1.0
        if any(count_violations(lim, past).values()):
            continue
        allowed = bool(on_mask(train, past, 5)[0, 0])
        on_now = not any(count_violations(lim, np.ones((1, 1)), history=past).values())
        assert allowed == on_now


# ------------------------------------------------------------------------------------------- outside checks
def test_energy_of_a_biphasic_pulse_in_a_resistive_impedance():
    # Joule's law (common practice, no source): 1 mA through 1 kΩ for two 100 µs phases: 2 x 1e-6 x 1e3 x 1e-4 J =
    # 0.2 µJ per pulse; 130 Hz for 1 s: 26 µJ
    from stimsteer.control.physical_limits import pulse_energy_uj

    site = _mapping(1000.0, {"a": {"kind": "electrical", "phase_width": "100 us", "frequency": "130 Hz"}}).sites[0]
    assert float(pulse_energy_uj(site, 1000.0, 1000.0)) == pytest.approx(0.2)
    m = _mapping(1000.0, {"a": {"kind": "electrical", "phase_width": "100 us", "frequency": "130 Hz",
                                "amplitude_unit": "mA", "contact_area": "0.06 cm^2"}})
    c = compile_limits(PhysicalLimits.from_dict({"window_s": 1.0, "window_energy_max_uj": 26.0, "sites": {
        "a": {"amplitude_max_ma": 1.0, "impedance_kohm": 1.0}}}), m)
    _, checks = safety_checks(np.full((1000, 1), 1.0), m, c)
    row = next(r for r in checks if r["rule"] == "energy_window")
    assert row["value"] == pytest.approx(26.0, rel=1e-9) and row["passed"]


@pytest.mark.parametrize("extra, match", [
    ({"window_energy_max_uj": 1.0}, r"needs the electrode impedance.*impedance_ohm"),
    ({"window_energy_max_ua": 1.0}, r"unknown key|is not an energy"),
    ({"sites": {"a": {"amplitude_max_ua": 100.0, "duty_cycle_max_fraction": 0.5}}}, r"duty_window_s"),
    ({"window_s": 0.1, "window_energy_max_uj": 1e-6, "sites": {"a": {"amplitude_max_ua": 100.0,
                                                                      "impedance_ohm": 1e3}}}, r"smaller than one pulse"),
    ({"sites": {"a": {"amplitude_max_ua": 100.0, "train_length_max_s": 1e-4}}}, r"shorter than one sample"),
])
def test_bad_sequence_limits_are_refused_in_one_line(extra, match):
    m = _mapping(250.0, {"a": {"kind": "electrical", "phase_width": "90 us", "frequency": "130 Hz",
                               "contact_area": "0.06 cm^2"}})
    table = {"sites": {"a": {"amplitude_max_ua": 100.0}}}
    if "window_energy_max_uj" in extra or "window_energy_max_ua" in extra:
        table["window_s"] = 0.5
    table.update(extra)
    with pytest.raises(LimitsError, match=match) as info:
        compile_limits(PhysicalLimits.from_dict(table), m)
    assert "\n" not in str(info.value)


def test_train_limits_with_a_slew_limit_are_refused():
    from stimsteer.control.limits import StimLimits
    from stimsteer.control.sequence_limits import TrainLimits

    with pytest.raises(LimitsError, match=r"finite slew limit"):
        StimLimits(amplitude_min_ua=[0.0], amplitude_max_ua=[10.0], slew_max_ua=[1.0],
                   train_limits=TrainLimits((3,), (None,), (None,)))


def test_the_live_gate_and_the_fast_step_take_sequence_limits():
    """The live gate checks window budgets and train limits from the delivered history (they were refused before
    issue 20's live part; tests/control/test_live_sequence_limits.py grades its records), and the precomputed fast step
    accepts them (the gate clips its first input)."""
    from stimsteer.control.input_gate import InputGate
    from stimsteer.control.mpc.fast_step import _unsupported

    m = _mapping(250.0, {"a": {"kind": "electrical", "phase_width": "90 us", "frequency": "250 Hz",
                               "contact_area": "0.06 cm^2"}})
    c = compile_limits(PhysicalLimits.from_dict({"window_s": 0.2, "charge_rate_max_uc_per_s": 2.0,
                                                 "sites": {"a": {"amplitude_max_ua": 200.0}}}), m)
    lim = dataclasses.replace(c.stim_limits, input_names=None)
    assert lim.has_sequence_limits
    gate = InputGate(lim)
    sent = np.array([gate.admit([200.0])[0] for _ in range(200)])
    assert not any(lim.violations(sent, np.zeros(1)).values()) and gate.n_reduced > 0
    ctrl = ModelPredictiveController(model=StateSpaceModel(A=[[0.9]], B=[[1.0]], C=[[1.0]], past_steps=1),
                                     limits=lim, horizon_steps=4).fit()
    assert "window budgets or train limits" not in _unsupported(ctrl)


@pytest.mark.parametrize("mode", ["worst", "average"])
def test_a_robust_loop_over_an_ensemble_keeps_charge_windows_and_trains(mode):
    # merge of issues 16 and 19: the robust planner now shares the controllers' limit machinery, so the linear
    # charge-window budget and the train-length mask hold in its loops too; checked on the decoded pulses by the
    # independent checker above
    import warnings

    from stimsteer.control.mpc.robust import RobustPlanner
    from stimsteer.sysid.ensemble import BootstrapEnsemble

    plant = LinearNetworkPlant(np.array([[0.9, 0.2], [-0.15, 0.75]]), np.array([[1.0], [0.5]]),
                               np.array([[1.0, 0.0]]), sample_rate_hz=250.0, process_noise_std=0.05,
                               measurement_noise_std=0.1)
    u = np.random.default_rng(1).uniform(0.0, 100.0, size=(8 * 200, 1))
    s = record_session(plant, u, trials=[(k * 200, (k + 1) * 200) for k in range(8)], seed=1)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        ens = BootstrapEnsemble(method="arx", method_settings={"output_lags": 2, "input_lags": 2,
                                                               "delay_samples": 0, "alphas": (1e-3,)},
                                n_members=5, seed=2).fit(s)
    m = _mapping(250.0, {"u0": {"kind": "electrical", "phase_width": "90 us", "frequency": "250 Hz",
                                "contact_area": "0.06 cm^2"}})
    table = {"window_s": 0.2, "charge_rate_max_uc_per_s": 0.7 * 100.0 * 90e-6 * 250.0,
             "sites": {"u0": {"amplitude_max_ua": 100.0, "train_length_max_s": 0.04}}}

    def loop_under(tab):
        lim = dataclasses.replace(compile_limits(PhysicalLimits.from_dict(tab), m).stim_limits, input_names=None)
        assert lim.has_sequence_limits
        planner = RobustPlanner(ensemble=ens, limits=lim, horizon_steps=6, mode=mode).fit()
        return run_closed_loop(planner, plant, n_steps=120, target=np.array([1e4]), seed=4)

    loop = loop_under(table)
    assert breaks(loop.inputs, m, table) == []
    assert not any(loop.violations.values()), loop.violations
    q = loop.inputs[:, 0] * 90e-6  # charge per phase (µC); the window holds 50 samples
    assert max(q[max(0, j - 49):j + 1].sum() for j in range(q.size)) >= 0.99 * 0.2 * table["charge_rate_max_uc_per_s"]
    # the train limit binds as well: the same loop without it runs trains longer than 0.04 s
    free = loop_under({**table, "sites": {"u0": {"amplitude_max_ua": 100.0}}})
    assert breaks(free.inputs, m, table) == ["train length u0"]
