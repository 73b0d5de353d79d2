"""A tabulated field basis: the actuator's fields on a grid, interpolated, for fast roll-outs.

The horizon planner evaluates the field basis at every predicted position of every candidate
sequence, period by period - tens of evaluations per control period. Exact models (loop fields
by elliptic integrals, plate modes, FFT electrode solutions) cost milliseconds per call, so
:class:`FieldTable` evaluates :meth:`Actuator.basis` once on a regular grid per body kind and
interpolates it bilinearly (error second order in the cell size; the controller re-plans every
period from measured positions, and :func:`fieldplan.plan.plan` and the simulator always use the
exact model). ``PlanSettings.field_table`` turns it off.

Examples
--------
>>> import numpy as np, fieldplan
>>> from fieldplan.testing import SourceArray
>>> act = SourceArray([[0, 0], [1e-3, 0], [0, 1e-3]], force=2e-12)
>>> ws = fieldplan.Workspace((0, 0, 1e-3, 1e-3))
>>> bead = fieldplan.Body("bead", radius=5e-6, density=1050.0)
>>> tab = FieldTable(act, [bead], ws.medium, ws.bounds, 1e-5)
>>> F, d = tab.fields(np.array([[4e-4, 5e-4]]))
>>> exact = act.basis([bead], ws.medium, [[4e-4, 5e-4]]).fields[:, 0]
>>> bool(np.allclose(F[:, 0], exact, rtol=1e-2, atol=1e-3 * np.abs(exact).max()))
True
"""

from __future__ import annotations

import numpy as np

from ..errors import FieldplanError

__all__ = ["FieldTable"]

#: Largest table, grid points per body kind (times K fields): keeps memory bounded.
MAX_POINTS = 40_000


class FieldTable:
    """Fields of ``bodies`` tabulated on a grid over ``bounds``.

    Parameters
    ----------
    actuator : Actuator
    bodies : sequence of Body, length n
        The bodies in planner order (equal bodies share one table).
    medium : Medium
    bounds : tuple (xmin, ymin, xmax, ymax)
        m; the grid covers it with one cell to spare on every side.
    resolution : float
        Cell size, m (coarsened if the grid would exceed :data:`MAX_POINTS` points).

    Attributes
    ----------
    mode : str
        The basis mode.
    """

    def __init__(self, actuator, bodies, medium, bounds, resolution):
        if not resolution > 0:
            raise FieldplanError(f"FieldTable resolution must be > 0 m, got {resolution!r}.")
        xmin, ymin, xmax, ymax = (float(v) for v in bounds)
        res = float(resolution)
        while ((xmax - xmin) / res + 3) * ((ymax - ymin) / res + 3) > MAX_POINTS:
            res *= 1.25
        self.res = res
        self.xs = np.arange(xmin - res, xmax + 1.5 * res, res)
        self.ys = np.arange(ymin - res, ymax + 1.5 * res, res)
        X, Y = np.meshgrid(self.xs, self.ys)
        pts = np.c_[X.ravel(), Y.ravel()]
        self.bodies = list(bodies)
        self._kind = {}
        self._tables = []
        for i, b in enumerate(self.bodies):
            if b not in self._kind:
                B = actuator.basis([b] * len(pts), medium, pts)
                self.mode = B.mode
                F = B.fields.reshape(B.size, len(self.ys), len(self.xs), 2)
                d = B.drift.reshape(len(self.ys), len(self.xs), 2)
                self._kind[b] = len(self._tables)
                self._tables.append((F, d))
        self.index = np.array([self._kind[b] for b in self.bodies])

    def fields(self, xy, gradient=False):
        """Interpolated fields and drift at ``xy`` (C * n, 2) m, rows cycling through the bodies.

        Parameters
        ----------
        xy : ndarray, shape (C * n, 2)
            m.
        gradient : bool
            Also return the spatial derivatives (of the bilinear interpolant, exact within a cell).

        Returns
        -------
        fields : ndarray, shape (K, C * n, 2)
            As :attr:`FieldBasis.fields`.
        drift : ndarray, shape (C * n, 2)
        dfields : ndarray, shape (K, C * n, 2, 2)
            Only with ``gradient``: ``dfields[k, p, c, j] = d fields[k, p, c] / d x_j``, per m.
        ddrift : ndarray, shape (C * n, 2, 2)
            Only with ``gradient``.
        """
        xy = np.atleast_2d(np.asarray(xy, dtype=float))
        n = len(self.bodies)
        if len(xy) % n:
            raise FieldplanError(f"FieldTable.fields: {len(xy)} points is not a multiple of {n} bodies.")
        kind = np.tile(self.index, len(xy) // n)
        fx = np.clip((xy[:, 0] - self.xs[0]) / self.res, 0.0, len(self.xs) - 1.000001)
        fy = np.clip((xy[:, 1] - self.ys[0]) / self.res, 0.0, len(self.ys) - 1.000001)
        ix, iy = np.floor(fx).astype(int), np.floor(fy).astype(int)
        a, b = (fx - ix)[:, None], (fy - iy)[:, None]
        K = self._tables[0][0].shape[0]
        F = np.empty((K, len(xy), 2))
        d = np.empty((len(xy), 2))
        if gradient:
            dF = np.empty((K, len(xy), 2, 2))
            dd = np.empty((len(xy), 2, 2))
        for k, (Ft, dt) in enumerate(self._tables):
            sel = np.flatnonzero(kind == k)
            if not len(sel):
                continue
            i0, j0, aa, bb = ix[sel], iy[sel], a[sel], b[sel]
            w00, w10, w01, w11 = (1 - aa) * (1 - bb), aa * (1 - bb), (1 - aa) * bb, aa * bb
            c00, c10, c01, c11 = Ft[:, j0, i0], Ft[:, j0, i0 + 1], Ft[:, j0 + 1, i0], Ft[:, j0 + 1, i0 + 1]
            F[:, sel] = w00 * c00 + w10 * c10 + w01 * c01 + w11 * c11
            e00, e10, e01, e11 = dt[j0, i0], dt[j0, i0 + 1], dt[j0 + 1, i0], dt[j0 + 1, i0 + 1]
            d[sel] = w00 * e00 + w10 * e10 + w01 * e01 + w11 * e11
            if gradient:
                r = self.res
                dF[:, sel] = np.stack([((1 - bb) * (c10 - c00) + bb * (c11 - c01)) / r,
                                       ((1 - aa) * (c01 - c00) + aa * (c11 - c10)) / r], axis=-1)
                dd[sel] = np.stack([((1 - bb) * (e10 - e00) + bb * (e11 - e01)) / r,
                                    ((1 - aa) * (e01 - e00) + aa * (e11 - e10)) / r], axis=-1)
        if gradient:
            return F, d, dF, dd
        return F, d
