"""Plots: the data they draw (not their pixels) and where their parts sit.

The data come from small functions (``simulation_curves``, ``headroom_rows``,
``time_label``) and the figures from ``*_figure`` functions, inspected through
matplotlib's artists; the numbers are checked against the JSON documents.
"""

import numpy as np
import pytest

from sweepgen import plots
from sweepgen.planner import plan
from sweepgen.playback import prepare
from sweepgen.scenario import load_scenario
from sweepgen.simulate import simulate

from conftest import make_scenario

pytestmark = pytest.mark.slow          # figures and simulations: a second or more each

# a pulsed beam, slow enough to simulate quickly, whose target has an aperture (test data)
PULSED = {"source": {"model": "gaussian", "mean_velocity": "150 m/s", "velocity_spread": "20 m/s",
                     "pulse_time": "0 ms", "temperature": None, "divergence": "5 mrad"},
          "target": {"aperture": "3 mm"},
          "chirp": {"hold": "0 ms", "period": "100 ms"}}


@pytest.fixture(scope="module")
def pulsed_result():
    return simulate(make_scenario(**PULSED), atoms=600, seed=4)


def test_every_histogram_is_a_share_of_all_atoms_and_the_captured_ones_add_up(pulsed_result):
    """The captured atoms are shown apart from the rest, normalised to all atoms emitted: their bars add
    up to the JSON's captured_fraction in every panel (also the arrival times, whose bins reach the
    last captured atom)."""
    r = pulsed_result
    doc = r.to_json()
    data = plots.simulation_curves(r)
    assert data["atoms"] == doc["atoms"] == 600
    assert 0 < doc["captured_fraction"] < 1 and doc["lost_by_reason"]["left_aperture"] > 0
    for panel in ("velocity", "slow", "arrival"):
        captured = {c.key: c for c in data[panel]}["captured"]
        assert captured.values.sum() == pytest.approx(doc["captured_fraction"], abs=1e-12), panel
        assert len(captured.edges) == len(captured.values) + 1
    curves = {c.key: c for c in data["velocity"]}
    assert curves["source"].values.sum() == pytest.approx(1.0)
    crossed = float(np.mean(np.isfinite(r.flight.final_velocity)))      # in or out of the aperture
    assert curves["final"].values.sum() == pytest.approx(crossed)
    # more atoms cross the target plane slow enough than are captured: the aperture keeps some out
    slow = {c.key: c for c in data["slow"]}
    assert slow["final"].values.sum() > slow["captured"].values.sum()


def test_atoms_that_never_reach_the_target_still_count_in_every_share():
    """Some atoms of the test scenario are turned back and never cross the target plane: the shares
    are still of every atom emitted (normalised to the atoms that arrived, the captured bars would
    add up to more than captured_fraction)."""
    r = simulate(make_scenario(), atoms=600, seed=4)
    doc = r.to_json()
    turned_back = doc["lost_by_reason"]["turned_back"]
    assert turned_back > 0.05
    data = plots.simulation_curves(r)
    for panel in ("velocity", "slow", "arrival"):
        captured = {c.key: c for c in data[panel]}["captured"]
        assert captured.values.sum() == pytest.approx(doc["captured_fraction"], abs=1e-12), panel
    curves = {c.key: c for c in data["velocity"]}
    assert curves["source"].values.sum() == pytest.approx(1.0)
    assert curves["final"].values.sum() == pytest.approx(1.0 - turned_back)


def test_the_simulation_figure_says_what_it_shows(pulsed_result):
    fig = plots.simulation_figure(pulsed_result)
    ax, axs, axt = fig.axes[:3]
    assert all("fraction of all 600 emitted" in a.get_ylabel() for a in (ax, axs, axt))
    assert axt.get_yscale() == "log" and "after the trigger" in axt.get_xlabel()
    doc = pulsed_result.to_json()
    assert f"captured {100 * doc['captured_fraction']:.2f} % of 600 atoms" in ax.get_title()
    assert f"{doc['final_velocity_mean']:.3g} m/s on average" in axs.get_title()
    # the captured bars drawn are the captured atoms, in % of all atoms
    drawn = [p for p in ax.patches if p.get_label() == "captured, with the sweep"]
    assert len(drawn) == 1
    heights = drawn[0].get_data().values
    assert heights.sum() == pytest.approx(100 * doc["captured_fraction"])
    legend = ax.get_legend()
    assert "in or out of the aperture" in legend.get_title().get_text()
    plots._pyplot().close(fig)


def _beside(fig, ax):
    """Whether the axes' legend lies wholly to the right of the axes (so it covers no data)."""
    fig.canvas.draw()
    box = ax.get_legend().get_window_extent()
    return box.x0 >= ax.get_window_extent().x1


@pytest.mark.parametrize("key", ["rb87-chopped-oven", "na23-continuous-focused"])
def test_the_sweep_plot_keeps_its_legends_off_the_sweep_and_names_its_time_axis(key):
    sc = load_scenario(key)
    p = plan(sc)
    fig = plots.plan_figure(p)
    ax, axv = fig.axes[:2]
    assert _beside(fig, ax) and _beside(fig, axv)
    label = axv.get_xlabel()
    if sc.pulsed:
        assert label == "time after the trigger (ms)"
    else:                      # a continuous beam has no trigger: its period starts with the chirp
        assert "trigger" not in label and "from the chirp start" in label
        assert p.chirp_start == 0.0
    # the return is drawn (and so visible beside the legend)
    assert "return" in [a.get_label() for a in ax.patches]
    plots._pyplot().close(fig)


def test_the_drive_plot_names_its_limits_and_time_axis():
    report = prepare(load_scenario("na23-continuous-focused")).report
    fig = plots.drive_figure(report)
    ax = fig.axes[0]
    assert _beside(fig, ax) and "trigger" not in ax.get_xlabel()
    labels = [t.get_text() for t in ax.get_legend().get_texts()]
    lim = report.laser.limits
    assert f"actuator safe input range ({lim.input_min:g} to {lim.input_max:g} V)" in labels
    plots._pyplot().close(fig)


def test_headroom_bars_are_the_findings_in_the_order_and_numbers_of_check_json():
    report = prepare(load_scenario("caf-buffer-gas")).report
    doc = report.to_json()
    rows = plots.headroom_rows(report)
    with_room = [f for f in doc["findings"] if f["headroom"] is not None]
    assert [r[1] for r in rows] == pytest.approx([100 * f["headroom"] for f in with_room])
    assert [r[2] for r in rows] == [f["status"] for f in with_room]
    assert rows[0][2] == "warn"                                      # the warning comes first
