"""The terminal report names every analyte at risk (risk >= 0.5): by its likely partner
when a neighbour pair is at risk, otherwise as at risk with one of several analytes.
Synthetic table; the risk values are arbitrary test numbers."""

from __future__ import annotations

import numpy as np
import pandas as pd
from rich.console import Console

from retpred.report import comparison_figure, name_list, print_report


def _table():
    return pd.DataFrame({
        "name": ["a", "b", "c", "d"], "rt_min": [1.0, 1.05, 3.0, 6.0],
        "rt_low_min": [0.8, 0.8, 2.0, 5.0], "rt_high_min": [1.2, 1.3, 4.0, 7.0],
        "peak_width_min": [0.05] * 4, "resolution_next": [0.25, 19.5, 12.0, float("nan")],
        "coelution_risk": [0.8, 0.8, 0.6, 0.1], "coelutes_with": ["b", "a", "", ""],
        "elution_order": pd.array([1, 2, 3, 4], dtype="Int64"), "logd": [1.0] * 4,
        "species": ["neutral"] * 4, "status": ["ok"] * 4,
    })


def test_report_names_pairs_and_analytes_at_risk_without_a_partner():
    console = Console(record=True, width=200)
    print_report(_table(), "test", [], console)
    text = console.export_text()
    assert "At risk of co-eluting: a / b" in text
    line = next(x for x in text.splitlines() if "one of several analytes" in x)
    assert line.rstrip().endswith(": c")  # c only: a and b have a partner, d is at 0.1


def test_name_list_shows_eight_names_then_marks_the_rest():
    assert name_list(["a", "b"]) == "a, b"
    nine = [f"x{i}" for i in range(9)]
    assert name_list(nine) == ", ".join(nine[:8]) + " ..."
    assert name_list(iter(nine), limit=9) == ", ".join(nine)


def test_comparison_figure_one_panel_per_label_on_one_time_axis():
    early = _table()
    late = _table().assign(rt_min=[2.0, 4.0, 8.0, 12.0], coelution_risk=[0.1] * 4,
                           resolution_next=[9.0, 9.0, 9.0, float("nan")])
    fig = comparison_figure({"early": early, "late": late}, ["late", "early"], "t")
    axes = fig.axes
    assert [ax.get_ylabel() for ax in axes] == ["late", "early"]  # in the order given
    # one time axis, ending 5 % after the last peak's +6 sigma (12 + 6 x 0.05 / 4)
    for ax in axes:
        assert np.isclose(ax.get_xlim()[1], 1.05 * (12.0 + 6 * 0.0125))
    # each trace peaks at the predicted times (equal heights, peaks far apart)
    x, y = axes[0].lines[0].get_data()
    tops = x[1:-1][(y[1:-1] > y[:-2]) & (y[1:-1] >= y[2:]) & (y[1:-1] > 0.5)]
    np.testing.assert_allclose(tops, [2.0, 4.0, 8.0, 12.0], atol=x[1] - x[0])
    # critical peaks shaded: none on "late"; a and b (Rs 0.25, risk 0.8) and c (risk 0.6)
    assert len(axes[0].patches) == 0 and len(axes[1].patches) == 3


def test_comparison_figure_draws_the_outlet_composition_of_each_method():
    from retpred.gradient import build_program

    # two programs differing only in dwell volume (0 and 1 mL at 1 mL/min): the dashed
    # trace of each panel is that program's phi_outlet, so the second starts 1 min later
    fast = build_program([0.0, 10.0], [0.1, 0.9], [1.0, 1.0], dead_time_min=1.0,
                         dwell_volume_ml=0.0)
    slow = build_program([0.0, 10.0], [0.1, 0.9], [1.0, 1.0], dead_time_min=1.0,
                         dwell_volume_ml=1.0)
    fig = comparison_figure({"a": _table(), "b": _table()}, ["a", "b"], "t",
                            {"a": fast, "b": slow})
    twins = [ax for ax in fig.axes if ax.get_ylabel() == "% organic"]
    assert len(twins) == 2
    for ax, prog, delay in zip(twins, (fast, slow), (1.0, 2.0), strict=True):
        x, y = ax.lines[0].get_data()
        np.testing.assert_allclose(y, 100.0 * prog.phi_outlet(x))
        # by hand: 10 % until the delay, then +8 % per min
        on = x > delay
        np.testing.assert_allclose(y[on], 10.0 + 8.0 * (x[on] - delay), atol=1e-9)
        assert np.allclose(y[~on], 10.0)


def test_a_measured_standard_shows_measured_in_place_of_an_interval():
    t = _table()
    t.loc[2, ["rt_low_min", "rt_high_min", "status"]] = [3.0, 3.0, "measured standard"]
    console = Console(record=True, width=200)
    print_report(t, "test", [], console)
    rows = {x.split("│")[2].strip(): x for x in console.export_text().splitlines()
            if x.count("│") > 5}
    assert "measured" in rows["c"] and "3.00-3.00" not in rows["c"]
    assert "0.80-1.20" in rows["a"]
