"""Recovery after a stall: other starting guesses for the horizon program.

Sequential convex programming improves the nominal trajectory it starts from; when the bodies'
summed squared time-to-go stops falling, the controller (:class:`fieldplan.planning.Controller`)
asks this module for fresh starting sequences and keeps whichever has the lowest true cost:

* ``greedy``: period by period, the single primitive (timeshare) or single channel at a bound
  (linear) that lowers the summed squared time-to-go most, rolled forward on the model - the classic
  one-step choice, as a seed the program then refines;
* ``lagging``: the same, but for the body furthest from home alone (the others may be pushed a
  little; the program pulls them back if that costs too much);
* ``bracket``: (linear mode) cycles ``+a, +b, -a, -b`` of two channels, whose net motion is the Lie
  bracket of their fields - a direction no single period offers, which is how more bodies than the
  counting rule allows get somewhere; the pairs whose predicted bracket lowers the cost most are
  tried, the program then refines the winner;
* ``random``: a seeded random sequence of mixes, to leave a symmetric dead end.

Each is a whole ``(H, K)`` sequence of weights in the controller's program units.
"""

from __future__ import annotations

import numpy as np

__all__ = ["candidates", "greedy_sequence", "bracket_sequences"]


def _options(ctrl, lower, upper):
    """The one-input options per period: (O, K) weights."""
    K = ctrl.K
    if ctrl.mode == "timeshare":
        opts = np.eye(K) * np.minimum(upper[0], 1.0)[None]
        return opts[upper[0] > 0] if (upper[0] > 0).any() else np.zeros((1, K))
    out = []
    idle = ctrl._idle_rate
    for k in range(K):
        for v in (lower[0, k], upper[0, k]):
            if v != idle[k]:
                w = idle.copy()
                w[k] = v
                out.append(w)
    return np.asarray(out) if out else idle[None].copy()


def greedy_sequence(ctrl, p, lower, upper, focus=None):
    """Greedy one-step sequence over the horizon from positions ``p`` (m).

    Parameters
    ----------
    ctrl : Controller
        Prepared.
    p : ndarray, shape (n, 2)
        m.
    lower, upper : ndarray, shape (H, K)
        Weight bounds per period.
    focus : int, optional
        Lower only this body's time-to-go (default: the sum over all bodies, squared times).

    Returns
    -------
    ndarray, shape (H, K)
    """
    H = ctrl.horizon
    opts = _options(ctrl, lower, upper)
    W = np.empty((H, ctrl.K))
    x = np.asarray(p, dtype=float).copy()
    for h in range(H):
        F, d = ctrl._disp_fields(x[None])
        nxt = x[None] + d[0][None] + np.einsum("ok,kni->oni", opts, F[0])      # (O, n, 2)
        J, _ = ctrl._time_to_go(nxt)
        c = ctrl._body_cost(J) / ctrl.period**2
        score = c[:, focus] if focus is not None else np.sum(ctrl._body_w * c, axis=1)
        score = score + ctrl._rho * ctrl._deficits(nxt) / ctrl.length_unit
        o = int(np.argmin(score))
        W[h] = opts[o]
        x = nxt[o]
    return W


def bracket_sequences(ctrl, p, lower, upper, count=4):
    """Lie-bracket cycles ``+a, +b, -a, -b`` over the horizon for the most promising channel pairs.

    Over one cycle a body moves by about ``D f_b f_a - D f_a f_b`` (fields as per-period displacements,
    ``D`` their Jacobian): second order, but along the bracket direction. Pairs are ranked by the
    predicted first-order change of the summed squared time-to-go along that net motion, and each
    pair's cycle runs in the order that lowers it.

    Returns
    -------
    list of ndarray, shape (H, K)
        Empty in timeshare mode (a primitive cannot be played backwards).
    """
    if ctrl.mode != "linear" or ctrl.K < 2:
        return []
    H, K = ctrl.horizon, ctrl.K
    F, _, dF, _ = ctrl._disp_fields(np.asarray(p, float)[None], gradient=True)
    F, dF = F[0], dF[0]                                   # (K, n, 2), (K, n, 2, 2)
    amp = np.minimum(np.abs(lower[-1]), np.abs(upper[-1]))  # a cycle needs both signs
    J, g = ctrl._time_to_go(np.asarray(p, float)[None])
    grad = (ctrl._body_w * ctrl._body_slope(J[0]))[:, None] * g[0] / ctrl.period**2    # d(cost) / dx, per m
    pairs = [(a, b) for a in range(K) for b in range(a + 1, K) if amp[a] > 0 and amp[b] > 0]
    if not pairs:
        return []
    score = []
    for a, b in pairs:
        net = (np.einsum("nij,nj->ni", dF[b], F[a]) - np.einsum("nij,nj->ni", dF[a], F[b])) * amp[a] * amp[b]
        score.append(float(np.sum(grad * net)))
    order = np.argsort(-np.abs(score))[:count]
    out = []
    for o in order:
        a, b = pairs[o]
        if score[o] > 0:
            a, b = b, a                                    # the reverse cycle moves the other way
        cycle = np.zeros((4, K))
        cycle[0, a], cycle[1, b], cycle[2, a], cycle[3, b] = amp[a], amp[b], -amp[a], -amp[b]
        W = np.tile(ctrl._idle_rate, (H, 1))
        full = (H // 4) * 4
        W[:full] = np.tile(cycle, (H // 4, 1)) + ctrl._idle_rate
        out.append(W)
    return out


def candidates(ctrl, p, lower, upper, rng):
    """Starting sequences to try after a stall: list of ``(name, W (H, K))``."""
    out = [("greedy", greedy_sequence(ctrl, p, lower, upper))]
    out += [("bracket", W) for W in bracket_sequences(ctrl, p, lower, upper)]
    far = ~ctrl.arrived(p)
    if far.any() and ctrl.n > 1:
        J, _ = ctrl._time_to_go(np.asarray(p)[None])
        lag = int(np.argmax(np.where(far, J[0], -np.inf)))
        out.append(("lagging", greedy_sequence(ctrl, p, lower, upper, focus=lag)))
    H, K = ctrl.horizon, ctrl.K
    if ctrl.mode == "timeshare":
        mix = rng.dirichlet(np.full(K, 0.3), size=H) * (upper > 0)
    else:
        mix = rng.uniform(lower, upper)
    out.append(("random", mix))
    return out
