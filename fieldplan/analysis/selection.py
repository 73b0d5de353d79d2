"""Design helpers: choose a subset of primitives within a budget, and compare actuator designs on the same task.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..contract.actuator import FieldBasis
from ..errors import ActuatorError
from ..world.body import Body
from .counts import count_curve
from .maps import speed_map
from .steerability import RTOL, VelocitySet, axis_directions, basis_function, body_speeds, steerability, subset

__all__ = ['Selection', 'select_primitives', 'DesignComparison', 'compare_designs']

@dataclass
class Selection:
    """A chosen subset of fields and how it scores.

    Attributes
    ----------
    indices : list of int
        Chosen fields (primitive or channel indices), in order of choice.
    names : list of str
    score : float
        m/s, mean worst-direction speed over the sample configurations.
    history : list of float
        Score after each greedy addition.
    random_scores : ndarray
        Scores of random subsets of the same size (for context).
    full_score : float
        m/s, score with every field.
    """

    indices: list
    names: list
    score: float
    history: list
    random_scores: np.ndarray
    full_score: float


class _Scorer:
    """Scores field subsets on sample configurations: (mean speed, coverage) to compare lexicographically.

    ``coverage`` (mean over configurations and a fixed direction set of ``min(h, 0)``,
    normalised) breaks the ties of subsets too small to steer anything, so greedy first picks
    fields that open up the blocked directions.
    """

    def __init__(self, bases, joint, rtol, rng):
        self.bases = list(bases)
        self.joint = joint
        self.rtol = rtol
        self.mode = self.bases[0].mode
        self.K = self.bases[0].size
        for b in self.bases:
            if b.size != self.K or b.mode != self.mode:
                raise ActuatorError("select_primitives: every basis must have the same mode and number of fields.")
        if not joint:
            self.big = FieldBasis(self.mode, np.concatenate([b.fields for b in self.bases], axis=1),
                                  np.concatenate([b.drift for b in self.bases], axis=0), self.bases[0].channels,
                                  self.bases[0].primitives, self.bases[0].idle)
            ang = np.linspace(0, 2 * np.pi, 16, endpoint=False)
            self.dirs = [np.stack([np.cos(ang), np.sin(ang)], axis=1)]
            self.scales = np.maximum(self._body_scales(self.big), 1e-300)
        else:
            self.dirs = []
            self.scales = []
            for b in self.bases:
                D = 2 * b.n_bodies
                g = rng.normal(size=(16, D))
                self.dirs.append(np.vstack([axis_directions(D), g / np.linalg.norm(g, axis=1, keepdims=True)]))
                self.scales.append(max(VelocitySet.from_basis(b).scale, 1e-300))

    @staticmethod
    def _body_scales(b):
        F, d = b.fields, b.drift
        if b.mode == "linear":
            half = 0.5 * (b.upper - b.lower)
            center = d + np.tensordot(0.5 * (b.upper + b.lower), F, axes=1)
            return np.linalg.norm(center, axis=1) + (np.linalg.norm(F, axis=2) * np.abs(half)[:, None]).sum(0)
        return np.linalg.norm(np.concatenate([d[None], d[None] + F]), axis=2).max(axis=0)

    def __call__(self, idx):
        idx = list(idx)
        if not self.joint:
            b = subset(self.big, idx)
            speeds, _ = body_speeds(b, rtol=self.rtol)
            cov = self._coverage_bodies(b)
            return float(speeds.mean()), cov
        spd, cov = [], []
        for b, dirs, sc in zip(self.bases, self.dirs, self.scales):
            sb = subset(b, idx)
            r = steerability(sb, method="auto", rtol=self.rtol)
            spd.append(r.speed if np.isfinite(r.speed) else r.speed_bounds[1])
            vs = VelocitySet.from_basis(sb)
            h = vs.support(dirs) * vs.scale / sc
            cov.append(float(np.minimum(h, 0).mean()))
        return float(np.mean(spd)), float(np.mean(cov))

    def _coverage_bodies(self, b):
        F, d = b.fields, b.drift                          # (k, n, 2), (n, 2)
        C = self.dirs[0]                                  # (m, 2)
        if b.mode == "linear":
            half = 0.5 * (b.upper - b.lower)
            center = d + np.tensordot(0.5 * (b.upper + b.lower), F, axes=1)
            h = C @ center.T + np.abs(np.einsum("md,knd->mkn", C, F * half[:, None, None])).sum(axis=1)
        else:
            pts = np.concatenate([d[None], d[None] + F])
            h = np.einsum("md,jnd->mjn", C, pts).max(axis=1)
        return float((np.minimum(h, 0) / self.scales[None, :]).mean())


def _field_names(basis):
    if basis.mode == "timeshare":
        return [p.name for p in basis.primitives]
    return [c.name for c in basis.channels]


def select_primitives(bases, budget, *, joint=False, swaps=True, n_random=20, rng=0, rtol=RTOL):
    """Choose ``budget`` fields (primitives, or channels in linear mode) that keep steerability best.

    Greedy forward selection on the mean worst-direction speed over sample configurations
    (ties, e.g. before anything is steerable, broken by how much of the blocked directions a
    subset opens up), followed by single swaps while they improve the score.

    Parameters
    ----------
    bases : FieldBasis or sequence of FieldBasis
        Sample configurations (same fields, e.g. one basis per random configuration).
    budget : int
        Number of fields to keep, ``1 <= budget <= K``.
    joint : bool
        False (default): score every body of every basis alone (exact, vectorised; a basis of
        many grid points scores a whole workspace). True: score each basis as one configuration
        of all its bodies with :func:`steerability` (slower).
    swaps : bool
        Improve the greedy result by 1-swaps.
    n_random : int
        Random subsets of the same size scored for comparison (``Selection.random_scores``).
    rng : int or numpy.random.Generator
    rtol : float

    Returns
    -------
    Selection
    """
    if isinstance(bases, FieldBasis):
        bases = [bases]
    bases = list(bases)
    if not bases or not all(isinstance(b, FieldBasis) for b in bases):
        raise ActuatorError("select_primitives: bases must be a FieldBasis or a non-empty list of them.")
    K = bases[0].size
    if not (isinstance(budget, (int, np.integer)) and 1 <= budget <= K):
        raise ActuatorError(f"select_primitives: budget must be an integer in [1, {K}], got {budget!r}.")
    rng = np.random.default_rng(rng)
    score = _Scorer(bases, joint, rtol, rng)
    chosen, history = [], []
    best = None
    for _ in range(int(budget)):
        best, best_k = None, None
        for k in range(K):
            if k in chosen:
                continue
            sc = score(chosen + [k])
            if best is None or sc > best:
                best, best_k = sc, k
        chosen.append(best_k)
        history.append(best[0])
    if swaps and budget < K:
        improved = True
        passes = 0
        while improved and passes < 3:
            improved = False
            passes += 1
            for pos in range(len(chosen)):
                for k in range(K):
                    if k in chosen:
                        continue
                    trial = chosen.copy()
                    trial[pos] = k
                    sc = score(trial)
                    if sc > best:
                        best, chosen, improved = sc, trial, True
    rand = np.array([score(rng.choice(K, size=budget, replace=False))[0] for _ in range(int(n_random))])
    names = _field_names(bases[0])
    return Selection([int(k) for k in chosen], [names[k] for k in chosen], float(best[0]), history, rand,
                     score(range(K))[0])


# -- design: compare variants -------------------------------------------------------------------------
@dataclass
class DesignComparison:
    """Steerability measures of several actuator designs on one workspace.

    Attributes
    ----------
    rows : list of dict
        Per design: ``name``, ``size`` (K), ``mode``, ``mean_speed`` (m/s, single body, over the
        free space), ``dead_fraction``, ``max_steerable`` (largest N steerable in at least half
        the trials), ``fractions`` (dict N -> fraction).
    maps : dict of str -> SpeedMap
    curves : dict of str -> CountCurve
    """

    rows: list
    maps: dict
    curves: dict

    def table(self):
        """Plain-text table, speeds in µm/s."""
        counts = sorted({n for r in self.rows for n in r["fractions"]})
        head = f"{'design':<20} {'K':>4} {'mode':<9} {'mean µm/s':>10} {'dead %':>7} {'N max':>5}  " + \
            " ".join(f"N={n:<3}" for n in counts)
        lines = [head, "-" * len(head)]
        for r in self.rows:
            lines.append(f"{r['name']:<20} {r['size']:>4} {r['mode']:<9} {r['mean_speed'] * 1e6:>10.4g} "
                         f"{100 * r['dead_fraction']:>7.1f} {r['max_steerable']:>5}  " +
                         " ".join(f"{r['fractions'].get(n, float('nan')):<5.2f}" for n in counts))
        return "\n".join(lines)


def compare_designs(designs, bodies, workspace, *, counts=(1, 2, 3, 4), trials=20, shape=(32, 32), rng=0,
                    rtol=RTOL, executor=None, progress=None):
    """Compare actuator variants (coil placements, drive points, electrode layouts) by steerability.

    Parameters
    ----------
    designs : dict of str -> Actuator
    bodies : Body or callable
        The steered body (replicated), or ``bodies(n) -> list of Body``.
    workspace : Workspace
        Its medium is used.
    counts : sequence of int
        N values of the count curve.
    trials : int
    shape : tuple
        Grid of the single-body map.
    rng : int
        Every design sees the same random configurations.
    rtol : float
    executor, progress
        As in :func:`count_curve`.

    Returns
    -------
    DesignComparison
    """
    if not isinstance(designs, dict) or not designs:
        raise ActuatorError("compare_designs: designs must be a non-empty dict of name -> Actuator.")
    if not (isinstance(bodies, Body) or callable(bodies)):
        raise ActuatorError("compare_designs: bodies must be a Body or a callable n -> list of Body "
                            f"(the count curve needs any number of bodies), got {type(bodies).__name__}.")
    rows, maps, curves = [], {}, {}
    for name, act in designs.items():
        fn = basis_function(act, bodies, workspace.medium)
        one = basis_function(act, fn.bodies_for(1)[0], workspace.medium)
        m = speed_map(one, workspace, shape=shape, rtol=rtol)
        c = count_curve(fn, workspace, counts, trials=trials, rng=rng, rtol=rtol, executor=executor,
                        progress=progress)
        maps[name], curves[name] = m, c
        rows.append(dict(name=str(name), size=c.size, mode=c.mode, mean_speed=m.mean_speed,
                         dead_fraction=m.dead_fraction, max_steerable=c.max_steerable(),
                         fractions={int(n): float(f) for n, f in zip(c.counts, c.fraction)}))
    return DesignComparison(rows, maps, curves)
