"""Tests of the benchmark report: its content (control/report.py), its figures (control/figures/bench.py) and the
folder the bench command writes (control/commands/bench.py): files, self-containment, atomic output, generated
summary."""

import dataclasses
import json
import re

import numpy as np
import pandas as pd
import pytest

from stimsteer.control.cli import CAUTION
from stimsteer.control.commands.bench import check_out_dir, write_bench
from stimsteer.control.evaluation import BenchSettings, ControlSettings, MethodSpec, run_bench
from stimsteer.control.figures import bench as figures_module
from stimsteer.control.figures.bench import fig_closed_loop, fig_predictions, method_colours, report_figures
from stimsteer.control.plants import LinearNetworkPlant, record_session
from stimsteer.control.report import RESULTS_FILE, summarize
from stimsteer.sysid.exceptions import StimsteerError

_PNG = b"\x89PNG\r\n\x1a\n"  # the PNG file signature (PNG specification, section 5.2)


@pytest.fixture(scope="module")
def bench_seed():
    """The suite's seed (tests/conftest.py), for the module-scoped benchmark run below."""
    return 20261201


@pytest.fixture(scope="module")
def result(bench_seed):
    """One benchmark run shared by the module's tests (the tests only read it)."""
    seed = bench_seed
    rng = np.random.default_rng(seed)
    A = rng.standard_normal((3, 3))
    A *= 0.7 / np.max(np.abs(np.linalg.eigvals(A)))
    plant = LinearNetworkPlant(A, rng.standard_normal((3, 2)), rng.standard_normal((2, 3)), process_noise_std=0.02,
                               measurement_noise_std=0.05, sample_rate_hz=100.0, output_names=("ch_1", "ch_2"),
                               seed=seed)
    session = record_session(plant, rng.uniform(-1, 1, (480, 2)), trials=[(i * 80, (i + 1) * 80) for i in range(6)],
                             output_units="mV")
    st = BenchSettings(methods=(MethodSpec("indirect", "arx", {"alphas": (1e-6, 1e-3)}),
                                MethodSpec("direct", "lsq", {"alphas": (1e-6, 1e-3)})),
                       past_steps=3, horizon_steps=5, n_splits=2, control=ControlSettings(n_steps=30),
                       train_trials=(2,), noise_scales=(2.0,), horizons=(3,), max_windows=100)
    return run_bench(session, st, plant=plant, n_workers=1, progress=False)


@pytest.mark.slow
def test_report_folder_holds_page_tables_and_figures(result, tmp_path):
    out = tmp_path / "run"
    files = write_bench(result, out)
    page = (out / "report.html").read_text(encoding="utf-8")
    assert files["report"] == out / "report.html" and CAUTION in page
    # self-contained: every image is embedded, nothing is fetched from elsewhere
    assert page.count("src='data:image/png;base64,") == len([k for k in files if k.startswith("figure:")]) == 8
    assert not re.search(r"(src|href)=['\"](https?:|file:|/)", page)
    for name, table in result.tables().items():
        path = out / "tables" / f"{name}.csv"
        assert path.is_file()
        if not table.empty:
            back = pd.read_csv(path)
            assert list(back.columns) == list(table.columns) and len(back) == len(table)
    payload = json.loads((out / RESULTS_FILE).read_text(encoding="utf-8"))
    assert payload["caution"] == CAUTION and payload["summary"] == summarize(result)
    assert payload["provenance"]["session"]["content_hash"] == result.provenance["session"]["content_hash"]
    assert len(payload["tables"]["control"]) == len(result.control)
    for name in ("predictions", "accuracy_vs_steps", "closed_loop", "tracking_vs_energy", "training_data", "noise",
                 "horizon", "compute_time"):
        assert (out / "figures" / f"{name}.png").read_bytes().startswith(_PNG)


def test_an_existing_run_is_refused_unless_forced_and_then_replaced_whole(result, tmp_path, monkeypatch):
    monkeypatch.setattr(figures_module, "figure_makers", lambda _result: {"one": _tiny})  # figures are not tested here
    out = tmp_path / "run"
    write_bench(result, out)
    run_id = json.loads((out / RESULTS_FILE).read_text())["run_id"]
    with pytest.raises(StimsteerError, match=f"already holds another run \\(benchmark run {run_id}\\)"):
        write_bench(result, out)
    (out / "stray.txt").write_text("not ours")
    write_bench(result, out, force=True)
    assert not (out / "stray.txt").exists() and (out / "report.html").is_file()
    with pytest.raises(StimsteerError, match="exists and is a file"):
        check_out_dir(out / "report.html")


def _tiny():
    from matplotlib.figure import Figure

    return Figure(figsize=(0.5, 0.5), dpi=20)


def _broken():
    raise RuntimeError("figure failed")


@pytest.mark.parametrize("processes", [1, 2])
def test_a_failure_while_writing_leaves_nothing(result, tmp_path, monkeypatch, processes):
    # drawn side by side, the failing figure is taken by either process: the error reaches the caller either way
    monkeypatch.setattr(figures_module, "figure_makers",
                        lambda _result: {"a": _tiny, "broken": _broken, "b": _tiny, "c": _tiny})
    with pytest.raises(RuntimeError, match="figure failed"):
        write_bench(result, tmp_path / "run", processes=processes)
    assert list(tmp_path.iterdir()) == []


def test_write_bench_needs_a_bench_result(tmp_path):
    with pytest.raises(StimsteerError, match="needs a BenchResult from run_bench; got dict"):
        write_bench({"prediction": None}, tmp_path / "run")


def _with_splits(result, n):
    """The result as if it had ``n`` splits (the verdicts read the split count; the numbers are kept)."""
    comp = result.comparison.copy()
    comp["n"] = n
    return dataclasses.replace(result, comparison=comp, settings=dataclasses.replace(result.settings, n_splits=n))


def test_summary_is_generated_from_the_numbers(result):
    lines = summarize(result)
    text = "\n".join(lines)
    r2 = result.sweeps[(result.sweeps["sweep"] == "base") & (result.sweeps["metric"] == "r2_last")]
    for _, row in r2.iterrows():
        assert f"{row['label']} {row['mean']:.3f} [{row['ci_low']:.3f}, {row['ci_high']:.3f}]" in text
    assert "ground-truth plant" in text and "hard-limit violation" in text and "Student-t" in text
    # change the numbers and the verdict follows them (with enough splits to tell)
    five = _with_splits(result, 5)
    comp = five.comparison.copy()
    sel = (comp["sweep"] == "base") & (comp["metric"] == "r2_last")
    comp.loc[sel, ["mean_difference", "ci_low", "ci_high", "better"]] = [0.25, 0.125, 0.375, "direct"]
    sweeps = five.sweeps.copy()
    sweeps.loc[(sweeps["sweep"] == "base") & (sweeps["metric"] == "r2_last"), "mean"] = 0.123456
    changed = summarize(dataclasses.replace(five, comparison=comp, sweeps=sweeps))
    assert "direct − indirect 0.25 [0.12, 0.38]: direct route better" in "\n".join(changed)
    H = result.settings.horizon_steps
    assert changed[0].startswith(f"Recommendation: Use the direct (lsq) route for prediction {H} steps ahead (R² ")
    assert "0.123 [" in "\n".join(changed)
    comp.loc[sel, ["ci_low", "better"]] = [-0.125, "neither"]
    neither = summarize(dataclasses.replace(five, comparison=comp))
    assert "0.25 [-0.12, 0.38]: no difference shown (the interval contains 0)" in "\n".join(neither)
    assert "either route for prediction" in neither[0]


def test_below_the_stated_number_of_splits_nothing_is_called_better(result):
    # issue 18: a ΔR² of 0.009 on 3 splits was called "better"; below MIN_SPLITS_TO_TELL the report says so
    from stimsteer.control.evaluation.stats import MIN_SPLITS_TO_TELL

    three = _with_splits(result, 3)
    comp = three.comparison.copy()
    comp.loc[(comp["sweep"] == "base") & (comp["metric"] == "r2_last"),
             ["mean_difference", "ci_low", "ci_high", "better"]] = [0.009, 0.002, 0.016, "direct"]
    lines = summarize(dataclasses.replace(three, comparison=comp))
    assert MIN_SPLITS_TO_TELL == 5
    assert lines[0].startswith("Recommendation: No route can be recommended yet: 3 split(s) are too few to tell")
    assert "0.009 [0.002, 0.016]: too few splits to tell" in "\n".join(lines)
    assert not any("route better" in ln for ln in lines)


def test_intervals_are_shown_as_computed_not_clipped(result):
    # issue 18: "[0, 0.086]" hid that the splits disagreed about the sign
    from stimsteer.control._report_text import fmt_interval
    from stimsteer.control.report import _key_table

    assert fmt_interval(0.83, -3.5, 5.2, "{:.2g}", "s") == "0.83 [-3.5, 5.2] s"
    sweeps = result.sweeps.copy()
    sel = (sweeps["sweep"] == "base") & (sweeps["metric"] == "fit_s")
    sweeps.loc[sel, ["mean", "ci_low", "ci_high"]] = [0.5, -0.25, 1.25]
    table = _key_table(dataclasses.replace(result, sweeps=sweeps))
    assert (table.loc["fit time [s]"] == "0.5 [-0.25, 1.25]").all()


@pytest.mark.slow
def test_figures_label_axes_with_units(result):
    figs = report_figures(result)
    assert set(figs) >= {"predictions", "closed_loop", "compute_time"}
    # the output unit of the session ("mV") reaches the axis labels of the trace figures
    fig = fig_predictions(result, method_colours(result))
    assert any("[mV]" in ax.get_ylabel() for ax in fig.axes)
    assert all(ax.get_xlabel().endswith("[s]") for ax in fig.axes)
    fig2 = fig_closed_loop(result, method_colours(result))
    assert [ax.get_ylabel() for ax in fig2.axes[1:]] == [f"{n} [µA]" for n in ("u0", "u1")]


def test_figures_draw_direct_routes_dashed_from_the_route_column(result):
    # the line style follows the traces' route column, not the text of a label
    renamed = {"indirect (arx)": "model A", "direct (lsq)": "model B"}
    traces = {k: v.assign(label=v["label"].map(renamed)) for k, v in result.traces.items()}
    fig = fig_closed_loop(dataclasses.replace(result, traces=traces), {"model A": "#000000", "model B": "#111111"})
    styles = {line.get_label(): line.get_linestyle() for line in fig.axes[0].get_lines()}
    assert styles["model A"] == "-" and styles["model B"] == "--"


@pytest.mark.slow
def test_drawing_the_figures_leaves_the_plotting_state_alone(result):
    import matplotlib

    before, backend = dict(matplotlib.rcParams), matplotlib.get_backend()
    report_figures(result)
    assert dict(matplotlib.rcParams) == before and matplotlib.get_backend() == backend


def test_the_summary_leads_with_each_route_by_its_best_method_on_training(seed):
    # issue 13: the route benchmark compared one method per route; now each route is also represented by its best
    from stimsteer.control.evaluation import BenchSettings, ControlSettings, MethodSpec, run_bench
    from stimsteer.control.plants import LinearNetworkPlant, record_session

    rng = np.random.default_rng(seed)
    A = rng.standard_normal((3, 3))
    A *= 0.7 / np.max(np.abs(np.linalg.eigvals(A)))
    plant = LinearNetworkPlant(A, rng.standard_normal((3, 2)), rng.standard_normal((2, 3)), measurement_noise_std=0.05,
                               sample_rate_hz=100.0, seed=seed)
    u = rng.uniform(-1.0, 1.0, (480, 2))
    session = record_session(plant, u, trials=[(i * 80, (i + 1) * 80) for i in range(6)])
    methods = (MethodSpec("indirect", "arx", {"alphas": (1e-6, 1e-3)}), MethodSpec("indirect", "subspace"),
               MethodSpec("direct", "lsq", {"alphas": (1e-6, 1e-3)}), MethodSpec("direct", "hankel"))
    st = BenchSettings(methods=methods, past_steps=3, horizon_steps=5, n_splits=2, control=ControlSettings(n_steps=30),
                       train_trials=(), noise_scales=(), horizons=(), max_windows=100)
    r = run_bench(session, st, plant=plant, n_workers=1, progress=False)
    lines = summarize(r)
    assert lines[0].startswith("Recommendation: ") and " of 2 splits" in lines[0]
    # only each route's representative steers the plant: one closed loop per route and split
    assert len(r.control) == 2 * 2 and set(r.control["route"]) == {"indirect", "direct"}


def test_results_json_holds_every_table_as_pandas_records_one_record_per_line(result):
    from stimsteer.control.report import bench_run_id, results_json

    lines = summarize(result)
    text = results_json(result, lines, bench_run_id(result))
    payload = json.loads(text)
    assert list(payload) == ["run_id", "caution", "summary", "provenance", "limits", "plant", "tables"]
    assert payload["summary"] == lines and payload["limits"] == dict(result.limits)
    for name, table in result.tables().items():
        # outside check: pandas' own records, read by the standard library (pandas DataFrame.to_json, json.loads)
        expected = json.loads(table.to_json(orient="records", double_precision=15)) if not table.empty else []
        assert payload["tables"][name] == expected
        if len(table) > 1:  # one record per line (not one value per line): a 4 MB table stays a few thousand lines
            assert json.dumps(name) + ": [\n  {" in text
    n_records, n_tables = sum(len(t) for t in result.tables().values()), len(result.tables())
    assert text.split('\n "tables": {\n')[1].count("\n") <= n_records + 3 * n_tables + 3
