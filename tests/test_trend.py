"""Trend charts: individuals-chart limits and the Western Electric run rules (1956).

Outside references: the moving-range estimate of sigma with d2 = 1.128 for ranges of two
(Shewhart individuals chart, e.g. Montgomery, Introduction to Statistical Quality Control;
value from memory, equal to 2 / sqrt(pi)), computed by hand below; the four run rules of the
Western Electric Statistical Quality Control Handbook (1956), each on a series built to fire
it and on series that must not.
"""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from topoclass.errors import TopoclassError
from topoclass.trend import (
    D2_RANGE_OF_TWO,
    RUN_RULES,
    ControlLimits,
    individuals_limits,
    read_score_tables,
    run_rule_flags,
    trend_table,
    write_trend,
)

REPO = Path(__file__).resolve().parents[1]
UNIT = ControlLimits(centre=0.0, sigma=1.0, lower=-3.0, upper=3.0, n_reference=20)


def test_limits_equal_the_hand_computation():
    # x = 10, 12, 11, 15, 13: moving ranges 2, 1, 4, 2, mean 2.25; sigma = 2.25 / 1.128
    # = 1.994681; mean 12.2; limits 12.2 -+ 5.984043 = 6.215957 and 18.184043 (by hand).
    limits = individuals_limits([10, 12, 11, 15, 13])
    assert D2_RANGE_OF_TWO == pytest.approx(2 / np.sqrt(np.pi), abs=5e-4)
    assert limits.centre == pytest.approx(12.2)
    assert limits.sigma == pytest.approx(1.994681, abs=1e-6)
    assert limits.lower == pytest.approx(6.215957, abs=1e-6)
    assert limits.upper == pytest.approx(18.184043, abs=1e-6)
    assert limits.n_reference == 5
    with pytest.raises(ValueError, match="at least 2"):
        individuals_limits([1.0, np.nan])


def _fired(values) -> dict[str, list[int]]:
    flags = run_rule_flags(np.asarray(values, dtype=float), UNIT)
    return {rule: np.flatnonzero(flags[rule].to_numpy()).tolist() for rule in RUN_RULES}


@pytest.mark.parametrize(("values", "rule", "where"), [
    ([0.2, -0.3, 3.5, 0.1], "beyond_3s", [2]),
    ([0.2, -0.3, -3.2, 0.1], "beyond_3s", [2]),
    ([0.2, 2.5, 0.5, 2.4, -0.2], "two_of_three_2s", [3]),
    ([-0.2, -2.2, -2.6, 0.3], "two_of_three_2s", [2]),
    ([1.5, 1.2, 0.2, 1.4, 1.6, -0.5], "four_of_five_1s", [4]),
    ([0.5] * 8 + [-0.1], "eight_one_side", [7]),
    ([-0.3] * 9, "eight_one_side", [7, 8]),
])
def test_each_rule_fires_on_its_series(values, rule, where):
    fired = _fired(values)
    assert fired[rule] == where
    # The series were built so that no other rule fires (1.5 sigma points stay below 2 sigma,
    # runs stay shorter than eight, and so on).
    assert all(not hits for r, hits in fired.items() if r != rule), fired


@pytest.mark.parametrize("values", [
    [0.5, -0.5] * 15,                       # in control, alternating
    [2.5, -2.5, 0.0, 2.5, -2.5, 0.0],       # beyond 2 sigma, never twice in 3 on one side
    [1.5, -1.5, 1.5, -1.5, 1.5, -1.5],      # beyond 1 sigma, alternating sides
    [0.4] * 7 + [-0.4] * 7,                 # runs of seven only
    [2.9, 0.0, 0.0, 2.9, 0.0, 0.0, -2.9],   # near the limit, no pattern
])
def test_no_rule_fires_on_series_that_should_not(values):
    assert all(not hits for hits in _fired(values).values())


def _run(n=40, shift_from=None, shift=0.0, seed=0) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    v = rng.normal(10.0, 0.5, n)
    if shift_from is not None:
        v[shift_from:] += shift
    return pd.DataFrame({
        "image": [f"img_{i:03d}.tif" for i in range(n)],
        "status": "ok",
        "predicted": np.where(v > 10.5, "vacancies", "ordered"),
        "p_ordered": 0.5, "p_vacancies": 0.5,
        "vacancies_per_1000": v,
        "acquired": pd.date_range("2026-01-05 08:00", periods=n, freq="7min")[::-1].astype(str),
    })


def test_trend_table_flags_a_drift_and_uses_the_baseline():
    run = _run(shift_from=25, shift=3.0)
    result = trend_table(run, charts=["vacancies_per_1000"], baseline=20)
    first = individuals_limits(run["vacancies_per_1000"].head(20))
    lim = result.limits.iloc[0]
    assert lim["centre"] == pytest.approx(first.centre) and lim["upper"] == pytest.approx(
        first.upper)
    flags = result.table["vacancies_per_1000_flags"]
    assert flags.iloc[25:].str.contains("beyond_3s").mean() > 0.8  # a 6-sigma shift
    assert not flags.iloc[:20].str.contains("beyond_3s").any()
    assert result.table["flagged"].iloc[25:].all()


def test_trend_reference_ordering_and_errors(tmp_path):
    run = _run()
    ref = _run(seed=1).assign(vacancies_per_1000=lambda f: f["vacancies_per_1000"] + 50)
    result = trend_table(run, charts=["vacancies_per_1000"], reference=ref)
    assert result.limits.iloc[0]["n_reference"] == len(ref)
    assert result.table["flagged"].all()  # every point far below the reference's limits
    # Ordered by acquisition time (the column runs backwards): the last row comes first.
    ordered = trend_table(run, charts=["vacancies_per_1000"], by="acquired")
    assert ordered.table["image"].iloc[0] == run["image"].iloc[-1]
    with pytest.raises(TopoclassError, match="no column 'shift_id'"):
        trend_table(run, by="shift_id")
    with pytest.raises(TopoclassError, match="no column nonsense"):
        trend_table(run, charts=["nonsense"])
    default = trend_table(run)
    assert default.charts == ["vacancies_per_1000", "p_ordered", "p_vacancies"]


def test_two_batches_from_files_and_the_command(tmp_path):
    a, b = tmp_path / "monday.csv", tmp_path / "tuesday.csv"
    _run(n=25).to_csv(a, index=False)
    bad = _run(n=15, seed=2)
    bad.loc[3, "status"] = "error"
    bad.to_csv(b, index=False)
    table = read_score_tables([a, b])
    assert table["batch"].tolist() == ["monday"] * 25 + ["tuesday"] * 15
    result = trend_table(table, charts=["vacancies_per_1000"])
    assert len(result.table) == 39  # the error row is not charted
    assert result.batches["batch"].tolist() == ["monday", "tuesday"]
    assert result.batches["images"].tolist() == [25, 14]
    written = write_trend(result, tmp_path / "out")
    assert [p.name for p in written] == ["trend.csv", "trend_limits.csv", "trend_batches.csv",
                                         "trend.png"]
    back = pd.read_csv(written[0])
    assert len(back) == 39 and "vacancies_per_1000_flags" in back.columns
    with pytest.raises(TopoclassError, match="no such scores file"):
        read_score_tables([tmp_path / "missing.csv"])

    env = dict(os.environ, PYTHONPATH=str(REPO), MPLBACKEND="Agg")
    done = subprocess.run([sys.executable, "-m", "topoclass", "trend", str(a), str(b), "--out",
                           str(tmp_path / "cli"), "--charts", "vacancies_per_1000"],
                          capture_output=True, text=True, env=env, timeout=120)
    assert done.returncode == 0, done.stderr
    assert (tmp_path / "cli" / "trend.png").is_file()
    assert "lab's own process control" in done.stdout and "Re-validate" in done.stdout
    wrong = subprocess.run([sys.executable, "-m", "topoclass", "trend", str(a), "--out",
                            str(tmp_path / "cli"), "--by", "shift_id"],
                           capture_output=True, text=True, env=env, timeout=120)
    assert wrong.returncode == 2 and len(wrong.stderr.strip().splitlines()) == 1


def test_batch_report_charts_the_batch_with_limits_from_the_individuals_rule(tmp_path):
    # Reference: the individuals-chart rule as published (Shewhart; Montgomery, Introduction to
    # Statistical Quality Control): centre = mean, sigma = mean moving range / d2 with
    # d2 = 1.128 for ranges of two (value from memory), limits centre ± 3 sigma. Computed here
    # with numpy from the CSV, independently of topoclass.trend.
    import re
    import sys

    sys.path.insert(0, str(Path(__file__).parent))
    from _report_data import CLASSES, scores_fixture

    from topoclass.report import write_batch_report

    scores, rows = scores_fixture(tmp_path / "batch", n_ok=12)
    page = write_batch_report(scores, details=0).read_text(encoding="utf-8")
    svg = page[page.index("<svg"):page.index("</svg>")]
    ok = [r for r in rows if r["status"] == "ok"]
    assert svg.count("<circle") == len(CLASSES) * len(ok)
    for c in CLASSES:
        v = np.array([float(r[f"p_{c}"]) for r in ok])
        centre, sigma = v.mean(), np.abs(np.diff(v)).mean() / 1.128
        block = svg[svg.index(f">p_{c}<"):]
        num = r"([-+.\de]+)"
        shown = re.search(f"limits {num} – {num}, centre {num}<", block).groups()
        np.testing.assert_allclose([float(x) for x in shown],
                                   [centre - 3 * sigma, centre + 3 * sigma, centre], rtol=1e-3)
    assert "first 12 images" in page


def test_batch_report_says_why_a_small_batch_has_no_charts(tmp_path):
    import sys

    sys.path.insert(0, str(Path(__file__).parent))
    from _report_data import scores_fixture

    from topoclass.report import write_batch_report

    scores, _ = scores_fixture(tmp_path / "batch", n_ok=4)
    page = write_batch_report(scores, details=0).read_text(encoding="utf-8")
    assert "<svg" not in page.split("id='trend'")[1][:400]
    assert "4 scored images: control charts need at least 10" in page


def test_limits_from_a_models_training_images_of_one_class(small_model, small_dataset, tmp_path):
    # The model folder keeps its training images' amounts; `trend --model --reference-class`
    # sets the limits from those of one class. Reference: the individuals-chart rule computed
    # by hand with numpy on that class's rows (d2 = 1.128, value from memory).
    from topoclass.trend import REFERENCE_FILE, read_model_reference

    folder = small_model.directory
    table = pd.read_csv(folder / REFERENCE_FILE)
    labels = sorted(set(table["label"]))
    sheet = pd.read_csv(small_dataset)  # one row per labelled image, none rescaled
    assert len(table) == len(sheet) - len(small_model.failures)
    assert sorted(table["label"]) == sorted(sheet["label"].astype(str))
    ref = read_model_reference(folder, labels[0])
    assert set(ref["label"]) == {labels[0]} and len(ref) == (table["label"] == labels[0]).sum()
    scores = tmp_path / "scores.csv"
    pd.DataFrame({"image": [f"img{i}.png" for i in range(12)], "status": "ok",
                  "vacancies_per_1000": np.linspace(0.0, 30.0, 12)}).to_csv(scores, index=False)
    out = tmp_path / "trend"
    done = subprocess.run([sys.executable, "-m", "topoclass", "trend", str(scores), "--out",
                           str(out), "--model", str(folder), "--reference-class", labels[0]],
                          capture_output=True, text=True, env={**os.environ, "PYTHONPATH": str(
                              Path(__file__).resolve().parents[1])})
    assert done.returncode == 0, done.stderr
    limits = pd.read_csv(out / "trend_limits.csv").set_index("chart")
    v = ref["vacancies_per_1000"].to_numpy(dtype=float)
    v = v[np.isfinite(v)]
    sigma = np.abs(np.diff(v)).mean() / 1.128
    assert limits.loc["vacancies_per_1000", "centre"] == pytest.approx(v.mean(), rel=1e-5)
    assert limits.loc["vacancies_per_1000", "upper"] == pytest.approx(v.mean() + 3 * sigma,
                                                                     rel=1e-5, abs=1e-9)
    assert f"labelled {labels[0]}" in done.stdout


def test_model_reference_names_the_missing_file_and_class(small_model, tmp_path):
    from topoclass.trend import read_model_reference

    with pytest.raises(TopoclassError, match="train the model again"):
        read_model_reference(tmp_path)
    with pytest.raises(TopoclassError, match="choose one of"):
        read_model_reference(small_model.directory, "no-such-class")
