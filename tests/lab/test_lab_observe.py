"""fieldplan.lab.observe: the live loop steered from synthetic camera frames located with trackpy.

The "camera" renders Gaussian spots (tests/lab/_lab_frames.py, invented frames) at the simulator's true
positions; the observer must find them, keep identities by predictive linking against the
controller's model, and report ambiguous frames as None.
"""

from __future__ import annotations

import numpy as np
import pytest

pytest.importorskip("trackpy")

from _lab_frames import render  # noqa: E402

from fieldplan import Body, Workspace  # noqa: E402
from fieldplan.contract.actuator import Segment  # noqa: E402
from fieldplan.contract.testing import SourceArray  # noqa: E402
from fieldplan.lab.observe import camera_observer  # noqa: E402
from fieldplan.lab.pixels import PixelMap  # noqa: E402
from fieldplan.planning import make_controller  # noqa: E402
from fieldplan.planning.live import run_live  # noqa: E402
from fieldplan.world.simulate import Simulator  # noqa: E402

BEAD = Body("bead", radius=5e-6, density=1050.0)
WS = Workspace((0, 0, 1e-3, 1e-3))
XS = (np.arange(4) + 0.5) / 4 * 1e-3
MODEL = SourceArray(np.array([(x, y) for x in XS for y in XS]), force=2e-12, core=0.0625e-3)
STARTS = np.array([[2e-4, 2e-4], [2e-4, 8e-4]])
GOALS = np.array([[8e-4, 3e-4], [6e-4, 7e-4]])
CAM = PixelMap.from_scale("4 um", offset=("-40 um", "-40 um"))      # 270 x 270 px field of view
SHAPE = (272, 272)


def test_live_loop_from_camera_frames_reaches_the_goals():
    sim = Simulator(MODEL, [BEAD] * 2, WS, STARTS, rng=1, brownian=True)
    rng = np.random.default_rng(2)

    truth_at_grab = []

    def grab():
        truth_at_grab.append(sim.positions.copy())
        return render(SHAPE, CAM.inverse(sim.positions), sigma=1.2, amplitude=180, noise=4, rng=rng)

    ctrl = make_controller(MODEL, [BEAD] * 2, WS, GOALS)
    obs = camera_observer(grab, ctrl, CAM, initial=STARTS)
    seen_err = []

    def observe():
        got = obs()
        if got is not None:
            seen_err.append(np.nanmax(np.linalg.norm(got - truth_at_grab[-1], axis=1)))
        return got

    res = run_live(ctrl, observe, obs.wrap(sim.apply))
    err = np.linalg.norm(sim.positions - ctrl.goals, axis=1)
    print(f"\ncamera loop: {len(res.step_times)} periods, {obs.frames_seen} frames, {obs.ambiguous} ambiguous, "
          f"{obs.lost} lost; worst estimate error {max(seen_err) * 1e6:.2f} um; final true error "
          f"{err.max() * 1e6:.2f} um")
    assert res.success, res.message
    assert np.all(err <= 1.5 * BEAD.radius)        # the truth, not just the estimate, arrived
    assert max(seen_err) < 0.2 * BEAD.radius         # identities never swapped; sub-radius location
    assert obs.frames_seen == len(res.step_times) + 1


def test_ambiguous_and_lost_frames():
    ctrl = make_controller(MODEL, [BEAD] * 2, WS, GOALS)
    frames = iter([
        render(SHAPE, CAM.inverse(STARTS), rng=3),                                 # clean
        render(SHAPE, CAM.inverse(STARTS + [[0, 0], [5e-6, 0]]) , rng=4),          # fine: small moves
        render(SHAPE, CAM.inverse(np.vstack([STARTS[0] - [16e-6, 0], STARTS[0] + [16e-6, 0],
                                             STARTS[1]])), rng=5),                 # two spots, equally near body 0
        render(SHAPE, CAM.inverse(STARTS[:1]), rng=6),                             # body 1 gone
    ])
    obs = camera_observer(frames, ctrl, CAM, initial=STARTS, gate=20e-6, ambiguity=5e-6)
    a = obs()
    np.testing.assert_allclose(a, STARTS, atol=0.5e-6)
    b = obs()
    np.testing.assert_allclose(b[1], STARTS[1] + [5e-6, 0], atol=0.5e-6)
    assert obs() is None and obs.ambiguous == 1          # two spots 16 um either side of body 0's prediction
    d = obs()
    assert np.all(np.isfinite(d[0])) and np.all(np.isnan(d[1])) and obs.lost == 1
    assert obs() is None and obs.no_frame == 1           # the iterator ran out: no frame


def test_prediction_goes_through_the_played_segments():
    """A body that moved by the commanded motion is matched to the model's prediction, not its old place."""
    ctrl = make_controller(MODEL, [BEAD], WS, GOALS[:1])
    options = [Segment(0.0, 10.0, np.eye(16)[k] * MODEL.channels[k].upper, "pull") for k in range(16)]
    seg = max(options, key=lambda sg: float(np.linalg.norm(ctrl.predict(STARTS[:1], [sg]) - STARTS[:1])))
    moved = ctrl.predict(STARTS[:1], [seg])
    shift = float(np.linalg.norm(moved - STARTS[:1]))
    assert shift > 20e-6                                   # farther than the gate: plain nearest-neighbour fails
    frames = iter([render(SHAPE, CAM.inverse(STARTS[:1]), rng=7), render(SHAPE, CAM.inverse(moved), rng=8)])
    obs = camera_observer(frames, ctrl, CAM, initial=STARTS[:1])
    obs()
    obs.wrap(lambda s: None)(seg)
    got = obs()
    np.testing.assert_allclose(got, moved, atol=0.5e-6)
