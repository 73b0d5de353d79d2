"""Run figures (fieldplan.plots): one axis-label style, identical bodies distinguishable, no mean of a
discrete tone channel, hardware outlines drawn (issue 16 item 13)."""

import re

import numpy as np
import pytest
import shapely

from fieldplan import Body, Channel, HardwareLimits, Schedule, Segment, Workspace, water
from fieldplan.contract.testing import SourceArray
from fieldplan.plots import axis_label, plot_inputs, plot_primitive_fields, plot_timeline, plot_workspace

WS = Workspace((0, 0, 1e-3, 1e-3), medium=water())
BEAD = Body("bead", 5e-6, 1050.0)
SOURCES = [(0, 0), (1e-3, 0), (1e-3, 1e-3), (0, 1e-3)]
OLD_STYLE = re.compile(r"\((µm|um|mm|m|1|-|s|m/s|µm/s|um/s|V|A|Hz)\)")


class PaddedSources(SourceArray):
    """SourceArray with two 'pads' to outline (the optional outlines() hook of fieldplan.plots)."""

    def outlines(self):
        return [shapely.box(1e-4, 1e-4, 3e-4, 3e-4), shapely.box(6e-4, 6e-4, 9e-4, 9e-4)]


def labels_of(fig):
    out = []
    for ax in fig.axes:
        out += [ax.get_xlabel(), ax.get_ylabel()]
    return [t for t in out if t]


def test_axis_label_style():
    assert axis_label("x", "µm") == "x [µm]"
    assert axis_label("fraction", "1") == axis_label("fraction", "") == "fraction [1]"


def test_every_run_figure_uses_one_label_style():
    act = SourceArray(SOURCES, force=3e-12)
    t = np.linspace(0, 10, 50)
    pos = np.stack([np.c_[np.linspace(2e-4, 8e-4, 50), np.full(50, 3e-4)],
                    np.c_[np.linspace(2e-4, 8e-4, 50), np.full(50, 7e-4)]], axis=1)
    goals = pos[-1]
    ch = act.channels
    sched = Schedule.from_segments(ch, [Segment(0, 0.5, [0.5] * len(ch)), Segment(0, 0.5, [-0.5] * len(ch))])
    figs = [plot_workspace(WS, [BEAD, BEAD], pos[0], goals, trajectories=[("t", pos)], actuator=act),
            plot_timeline(t, pos, goals, [BEAD, BEAD], extent=WS.bounds),
            plot_inputs(sched, limits=HardwareLimits.from_channels(ch)),
            plot_primitive_fields(act, BEAD, WS.medium, WS, max_panels=2, n=6, resolution=16)]
    for fig in figs:
        for lab in labels_of(fig):
            assert not OLD_STYLE.search(lab), lab
            assert "[" in lab or lab in ("primitive played", "channel"), lab


def test_identical_bodies_stay_distinguishable_in_the_timeline():
    """Two bodies on the same x(t): their x curves differ in width and dash pattern."""
    t = np.linspace(0, 1, 20)
    x = np.linspace(2e-4, 8e-4, 20)
    pos = np.stack([np.c_[x, np.full(20, 3e-4)], np.c_[x, np.full(20, 7e-4)]], axis=1)
    fig = plot_timeline(t, pos, pos[-1] + 1e-5, [BEAD, BEAD], extent=WS.bounds)
    lines = [ln for ln in fig.axes[0].get_lines() if len(ln.get_xdata()) == 20]
    assert len(lines) == 2
    a, b = lines
    np.testing.assert_array_equal(a.get_ydata(), b.get_ydata())   # the same curve ...
    assert a.get_linewidth() > b.get_linewidth() + 1.0            # ... drawn wider underneath
    assert a.get_linestyle() == "-" and b.get_linestyle() != "-"  # ... and dashed on top
    assert a.get_zorder() < b.get_zorder()


def test_discrete_tone_channel_has_no_mean_line():
    """A plate's frequency channel takes a set of tones: its summary shows the tone held longest per
    bin and the range, never a time-average of tones (a frequency never played)."""
    tones = tuple(float(f) for f in np.linspace(200, 1400, 12))
    ch = (Channel("frequency", "Hz", 150, 1500, tones[0], tones), Channel("amplitude", "V", 0, 10))
    rng = np.random.default_rng(0)
    segs = [Segment(0, 0.1, [tones[rng.integers(12)], rng.uniform(0, 10)]) for _ in range(400)]
    fig = plot_inputs(Schedule.from_segments(ch, segs))
    legend = [t.get_text() for ax in fig.axes if ax.get_legend() for t in ax.get_legend().get_texts()]
    assert not any(t.startswith("frequency: mean") for t in legend), legend
    assert any(t.startswith("frequency: held longest") for t in legend)
    assert any(t.startswith("amplitude: mean") for t in legend)
    freq_ax = next(ax for ax in fig.axes if ax.get_ylabel() == "frequency [Hz]")
    held = [ln for ln in freq_ax.get_lines() if ln.get_marker() == "_"]
    assert held and set(np.round(held[0].get_ydata(), 9)) <= set(np.round(tones, 9))


def test_outlines_are_drawn_in_workspace_and_field_figures():
    act = PaddedSources(SOURCES, force=3e-12)

    def has_box(ax, x0, x1, f=1e6):
        for ln in ax.get_lines():
            xs = np.asarray(ln.get_xdata(), dtype=float)
            if xs.size == 5 and np.isclose(xs.min(), x0 * f) and np.isclose(xs.max(), x1 * f):
                return True
        return False

    fig = plot_workspace(WS, [BEAD], [[5e-4, 5e-4]], [[5e-4, 4e-4]], actuator=act, backdrop_points=16)
    assert has_box(fig.axes[0], 1e-4, 3e-4) and has_box(fig.axes[0], 6e-4, 9e-4)
    legend = [t.get_text() for t in fig.axes[0].get_legend().get_texts()]
    assert any("outline" in t for t in legend)
    fig = plot_primitive_fields(act, BEAD, WS.medium, WS, max_panels=1, n=6, resolution=16)
    assert has_box(fig.axes[0], 1e-4, 3e-4)
    # without outlines() nothing extra is drawn
    fig = plot_workspace(WS, [BEAD], [[5e-4, 5e-4]], [[5e-4, 4e-4]], actuator=SourceArray(SOURCES),
                         backdrop_points=16)
    assert not has_box(fig.axes[0], 1e-4, 3e-4)


def test_electrode_array_outlines_are_its_pads():
    from fieldplan.actuators.dielectric import ElectrodeArray
    from fieldplan.actuators.electrostatics import pad_array

    lay = pad_array(2, 2, 80e-6, 20e-6)
    arr = ElectrodeArray(lay, [1e5], voltage_limit=2.0)
    assert tuple(arr.outlines()) == tuple(arr.layout.polygons) and len(arr.outlines()) == 4


@pytest.mark.parametrize("n", [1, 3])
def test_timeline_legend_matches_the_curves(n):
    t = np.linspace(0, 1, 10)
    pos = np.zeros((10, n, 2)) + 5e-4
    fig = plot_timeline(t, pos, pos[-1], [BEAD] * n, extent=WS.bounds)
    handles = fig.axes[0].get_legend().legend_handles[:n]
    curves = [ln for ln in fig.axes[0].get_lines() if len(ln.get_xdata()) == 10]
    for h, c in zip(handles, curves):
        assert h.get_linewidth() == c.get_linewidth() and h.get_linestyle() == c.get_linestyle()
