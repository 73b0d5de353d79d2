import numpy as np
import pytest
import scipy.linalg

from fieldplan import Actuator, Body, Channel, Schedule, Segment, Simulator, Workspace, WorkspaceError, rollout, water
from fieldplan.contract.testing import SourceArray
from fieldplan.world.physics import diffusion_coefficient


class AffineFlow(Actuator):
    """dx/dt = A (x - c) + b * u: an affine test field with a known exact solution."""

    tags = frozenset({"affine_in_input"})

    def __init__(self, A, c, b):
        self.A, self.c, self.b = np.asarray(A), np.asarray(c), np.asarray(b)

    @property
    def channels(self):
        return (Channel("u", "1", -1, 1),)

    def _velocity(self, body, medium, xy, u):
        return (xy - self.c) @ self.A.T + self.b * u[0]


def test_rollout_matches_matrix_exponential():
    """Affine field against scipy.linalg.expm of the augmented matrix (exact solution), 1e-6 relative."""
    A = np.array([[-0.1, -1.0], [1.0, -0.1]])
    c = np.array([5e-4, 5e-4])
    b = np.array([2e-5, 1e-5])
    act = AffineFlow(A, c, b)
    ws = Workspace((0, 0, 1e-3, 1e-3))
    body = Body("tracer", radius=1e-6, density=1000.0)
    x0 = np.array([7e-4, 5e-4])
    segs = [Segment(0, 1.3, [1.0]), Segment(0, 1.7, [-0.5])]
    s = Schedule.from_segments(act.channels, segs)
    r = rollout(s, act, [body], ws, [x0], brownian=False, max_displacement=2e-7)
    # exact: d/dt [y; 1] = [[A, b u], [0, 0]] [y; 1] with y = x - c, per segment
    y = np.append(x0 - c, 1.0)
    for seg in segs:
        M = np.zeros((3, 3))
        M[:2, :2] = A
        M[:2, 2] = b * seg.values[0]
        y = scipy.linalg.expm(M * seg.duration) @ y
    exact = y[:2] + c
    np.testing.assert_allclose(r.positions[-1, 0], exact, rtol=1e-6)
    assert r.times[-1] == pytest.approx(3.0)


@pytest.mark.parametrize("height_ratio", [2.0, 1e5])
def test_brownian_msd_matches_einstein(height_ratio):
    """MSD of 2000 free bodies equals 4 D t in the plane (Einstein 1905), D from Stokes-Einstein
    with the Faxen factor (Happel & Brenner). Mean of 2000 samples of r^2: relative s.d. 1/sqrt(2000)
    = 2.2 %; we allow 4 s.d. (9 %)."""
    n = 2000
    act = SourceArray([[0, 0], [1, 0]], force=0.0)
    ws = Workspace((-1e-2, -1e-2, 1e-2, 1e-2))
    body = Body("bead", radius=0.5e-6, density=1050.0, height=height_ratio * 0.5e-6)
    rng = np.random.default_rng(7)
    start = rng.uniform(-5e-3, 5e-3, (n, 2))
    sim = Simulator(act, [body] * n, ws, start, rng=11, contacts=False)
    t = 2.0
    sim.advance([0.0, 0.0], t)
    msd = np.mean(np.sum((sim.positions - start) ** 2, axis=1))
    D = diffusion_coefficient(body, water())
    assert msd == pytest.approx(4 * D * t, rel=0.09)
    if height_ratio == 2.0:
        # Exact torque-free wall mobility at h/r = 2 (O'Neill 1964 / Dean & O'Neill 1963, see
        # fieldplan.world.physics): 0.72322; Faxen's series gives 0.72144. abs=0: approx's default 1e-12
        # absolute tolerance would accept any D of this size.
        assert D == pytest.approx(0.72322 * 0.42875e-12, rel=1e-3, abs=0)


def test_seeded_rollouts_are_reproducible():
    act = SourceArray([[0, 0], [1e-3, 0], [5e-4, 1e-3]], force=2e-12)
    ws = Workspace((0, 0, 1e-3, 1e-3))
    bodies = [Body("bead", 2e-6, 1050.0)] * 3
    starts = [[3e-4, 3e-4], [5e-4, 5e-4], [7e-4, 3e-4]]
    s = Schedule.from_segments(act.channels, [Segment(0, 5.0, [1, -1, 0.5])])
    a = rollout(s, act, bodies, ws, starts, rng=5)
    b = rollout(s, act, bodies, ws, starts, rng=5)
    np.testing.assert_array_equal(a.positions, b.positions)
    c = rollout(s, act, bodies, ws, starts, rng=6)
    assert not np.array_equal(a.positions, c.positions)


def test_contacts_prevent_interpenetration_and_are_counted():
    # Two bodies pulled into the same source collide and must stay apart; a third is pushed into a wall.
    act = SourceArray([[5e-4, 5e-4], [0, 5e-4]], force=5e-11, core=2e-5)
    ws = Workspace((0, 0, 1e-3, 1e-3))
    b = Body("bead", 5e-6, 1050.0)
    starts = [[4.6e-4, 5e-4], [5.4e-4, 5e-4], [2e-5, 9e-4]]
    s = Schedule.from_segments(act.channels, [Segment(0, 20.0, [1.0, 0.0])])
    r = rollout(s, act, [b] * 3, ws, starts, goals=[[5e-4, 5e-4]] * 3, rng=0)
    gap = np.linalg.norm(r.positions[:, 0] - r.positions[:, 1], axis=1) - 2 * b.radius
    assert gap.min() > -1e-9
    assert r.metrics["contacts"] >= 1
    assert r.metrics["min_separation"] == pytest.approx(gap.min(), abs=1e-12)
    # a negative input on the source at x = 0 pushes the body into the wall at x = 1 mm
    s2 = Schedule.from_segments(act.channels, [Segment(0, 20.0, [0.0, -1.0])])
    r2 = rollout(s2, act, [b], ws, [[9.7e-4, 5e-4]], rng=0)
    assert r2.metrics["wall_contacts"] >= 1
    assert ws.contains(r2.positions[:, 0], b.radius).all()


def test_metrics_and_message():
    act = SourceArray([[0, 0], [1e-3, 0]], force=1e-12)
    ws = Workspace((0, 0, 1e-3, 1e-3))
    b = Body("bead", 5e-6, 1050.0)
    s = Schedule.from_segments(act.channels, [Segment(0, 2.0, [0.0, 1.0])])
    r = rollout(s, act, [b], ws, [[5e-4, 5e-4]], goals=[[1e-4, 1e-4]], brownian=False)
    assert not r.success and "body 0 (bead)" in r.message
    assert r.metrics["input_energy"]["source_2"] == pytest.approx(2.0)
    assert r.metrics["path_length"][0] == pytest.approx(np.linalg.norm(r.positions[-1, 0] - r.positions[0, 0]), rel=1e-3)


def test_observe_with_latency_and_noise():
    act = SourceArray([[0, 0], [1e-3, 0]], force=1e-12)
    ws = Workspace((0, 0, 1e-3, 1e-3))
    b = Body("bead", 5e-6, 1050.0)
    sim = Simulator(act, [b], ws, [[5e-4, 5e-4]], brownian=False, latency=0.5, dt_max=0.01)
    sim.advance([0.0, 1.0], 2.0)
    past = sim.true_positions(1.5)
    np.testing.assert_allclose(sim.observe(), past)
    assert sim.observe()[0, 0] < sim.positions[0, 0]
    noisy = Simulator(act, [b], ws, [[5e-4, 5e-4]], brownian=False, tracking_noise=1e-6, rng=1)
    obs = np.array([noisy.observe()[0] for _ in range(500)])
    assert obs.std(axis=0) == pytest.approx([1e-6, 1e-6], rel=0.15)


def test_bad_placement_names_the_body():
    act = SourceArray([[0, 0], [1e-3, 0]])
    ws = Workspace((0, 0, 1e-3, 1e-3))
    b = Body("bead", 5e-6, 1050.0)
    with pytest.raises(WorkspaceError, match=r"body 1 \(bead\)"):
        Simulator(act, [b, b], ws, [[5e-4, 5e-4], [2e-3, 5e-4]])
    with pytest.raises(WorkspaceError, match="overlap"):
        Simulator(act, [b, b], ws, [[5e-4, 5e-4], [5.05e-4, 5e-4]])
