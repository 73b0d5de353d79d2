"""How many bodies: the one-step counting limit and count curves (fraction of random placements steerable, with Wilson intervals).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..contract.actuator import FieldBasis
from ..errors import ActuatorError
from ..progress import progress_bar
from .steerability import RTOL, basis_rank, steerable

__all__ = ['counting_limit', 'CountCurve', 'count_curve']

# -- how many bodies -------------------------------------------------------------------------------
def counting_limit(basis_or_mode, size=None):
    """The one-step counting limit: most bodies a field basis can steer independently in one period.

    * ``linear`` mode, K channels: ``K / 2``. The 2N stacked velocity components are an affine
      image of K inputs, so they cover a neighbourhood of zero only if ``K >= 2N`` (rank).
    * ``timeshare`` mode, M primitives: ``(M - 1) / 2``. The average velocities reachable are the
      cone of the M primitive fields about the idle point, and a set of vectors positively spans
      R^{2N} only if it has at least 2N + 1 members (Davis, "Theory of positive linear dependence",
      Amer. J. Math. 76, 1954), so ``M >= 2N + 1``.

    Both are upper bounds; fewer directions may be available (see ``CountCurve.rank_limit``), and
    more bodies can still be steered over several periods. This function is the single definition
    used by :func:`count_curve`, ``fieldplan inspect`` and the benchmarks.

    Parameters
    ----------
    basis_or_mode : FieldBasis or {"linear", "timeshare"}
    size : int, optional
        K or M; required with a mode string, taken from the basis otherwise.

    Returns
    -------
    float
        Bodies (a half-integer when K or M - 1 is odd).

    Examples
    --------
    >>> counting_limit("linear", 6), counting_limit("timeshare", 63)
    (3.0, 31.0)
    """
    if isinstance(basis_or_mode, FieldBasis):
        mode, size = basis_or_mode.mode, basis_or_mode.size if size is None else size
    else:
        mode = basis_or_mode
    if size is None or int(size) != size or size < 0:
        raise ActuatorError(f"counting_limit: size must be a whole number of fields >= 0, got {size!r}.")
    if mode == "linear":
        return float(size) / 2.0
    if mode == "timeshare":
        return max(float(size) - 1.0, 0.0) / 2.0
    raise ActuatorError(f"counting_limit: mode must be 'linear' or 'timeshare', got {mode!r}.")


def counting_rule(mode):
    """The counting rule as text for labels: ``"K/2"`` (linear) or ``"(M - 1)/2"`` (timeshare)."""
    return "K/2" if mode == "linear" else "(M - 1)/2"


@dataclass
class CountCurve:
    """Fraction of random configurations of N bodies that are steerable, per N.

    Attributes
    ----------
    counts : ndarray of int
    fraction : ndarray
    low, high : ndarray
        95 % Wilson score interval of each fraction.
    trials : int
    size : int
        K, number of fields.
    mode : str
    counting_limit : float
        :func:`counting_limit`: K/2 for K channels (linear), (M - 1)/2 for M primitives (timeshare);
        no basis steers more bodies than this in one step.
    rank_limit : float
        Half the largest rank of the 2N x K field matrix seen in any trial, when that rank fell
        short of 2N at the largest N tried (the fields then span fewer directions than K
        suggests, e.g. a time-shared pair of opposite primitives adds one, not two); else nan.
    """

    counts: np.ndarray
    fraction: np.ndarray
    low: np.ndarray
    high: np.ndarray
    trials: int
    size: int
    mode: str
    counting_limit: float
    rank_limit: float = np.nan

    def max_steerable(self, threshold=0.5):
        """Largest N whose fraction is at least ``threshold`` (0 if none)."""
        ok = self.counts[self.fraction >= threshold]
        return int(ok.max()) if ok.size else 0

    def summary(self):
        """One line: fractions per N and the largest N steerable in at least half the trials."""
        parts = ", ".join(f"N={n}: {f:.2f}" for n, f in zip(self.counts, self.fraction))
        return (f"steerable fraction ({self.trials} random configurations each, "
                f"{'K' if self.mode == 'linear' else 'M'} = {self.size} {self.mode}): "
                f"{parts}; up to N = {self.max_steerable()} in at least half "
                f"(counting limit {counting_rule(self.mode)} = {self.counting_limit:g}"
                + (f", field rank / 2 = {self.rank_limit:g})" if self.rank_limit < self.counting_limit else ")"))


def wilson_interval(k, n, z=1.959963984540054):
    p = k / n
    den = 1 + z * z / n
    mid = (p + z * z / (2 * n)) / den
    half = z * np.sqrt(p * (1 - p) / n + z * z / (4 * n * n)) / den
    # The exact ends at k = 0 and k = n, where round-off would leave them a hair off.
    return np.where(k == 0, 0.0, np.clip(mid - half, 0, 1)), np.where(k == n, 1.0, np.clip(mid + half, 0, 1))


def _curve_trial(basis_at, workspace, n, radius, separation, seed, rtol):
    xy = workspace.sample(n, radius, np.random.default_rng(seed), separation=separation)
    b = basis_at(xy)
    return steerable(b, rtol=rtol), b.size, b.mode, basis_rank(b)[0]


def count_curve(basis_at, workspace, counts, *, trials=40, rng=0, radius=None, separation=None,
                rtol=RTOL, executor=None, progress=None):
    """The "how many bodies can this actuator steer" curve.

    For each N in ``counts``, draws ``trials`` random configurations of N bodies in the free
    space (``workspace.sample``) and records the fraction that is steerable now.

    Parameters
    ----------
    basis_at : callable
        ``xy (N, 2) -> FieldBasis`` (see :class:`basis_function`).
    workspace : Workspace
    counts : sequence of int
    trials : int
    rng : int or numpy.random.Generator
        Seeds every trial (reproducible, also under an executor).
    radius : float, optional
        m; default ``basis_at.radius`` if defined, else 0.
    separation : float, optional
        Minimum centre distance, m; default two radii.
    executor : concurrent.futures.Executor, optional
        Runs the trials (``basis_at`` must then be picklable for process pools).
    progress : bool, optional
        tqdm bar; default on when stderr is a terminal.

    Returns
    -------
    CountCurve
    """
    counts = np.asarray([int(c) for c in counts])
    if counts.size == 0 or counts.min() < 1:
        raise ActuatorError(f"count_curve: counts must be positive integers, got {counts.tolist()}.")
    if int(trials) < 1:
        raise ActuatorError(f"count_curve: trials must be >= 1, got {trials}.")
    if radius is None:
        radius = float(getattr(basis_at, "radius", 0.0))
    if separation is None:
        separation = 2.0 * radius
    seeds = np.random.default_rng(rng).integers(0, 2**63 - 1, size=(len(counts), int(trials)))
    jobs = [(i, int(n), int(seeds[i, t])) for i, n in enumerate(counts) for t in range(int(trials))]
    if executor is None:
        results = (_curve_trial(basis_at, workspace, n, radius, separation, s, rtol) for _, n, s in jobs)
    else:
        futs = [executor.submit(_curve_trial, basis_at, workspace, n, radius, separation, s, rtol) for _, n, s in jobs]
        results = (f.result() for f in futs)
    ok = np.zeros(len(counts))
    size, mode, max_rank = 0, "", 0
    for (i, _, _), (good, size, mode, rank) in zip(jobs, progress_bar(results, len(jobs), progress, "steerable fraction")):
        ok[i] += good
        max_rank = max(max_rank, rank)
    frac = ok / trials
    low, high = wilson_interval(ok, trials)
    rank_limit = max_rank / 2.0 if max_rank < 2 * counts.max() else np.nan
    return CountCurve(counts, frac, low, high, int(trials), int(size), mode, counting_limit(mode, size), rank_limit)
