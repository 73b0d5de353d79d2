"""Camera pixels to workspace coordinates: an affine map from scale and rotation, reference marks, or a matrix.

Image coordinates are ``(x, y)`` in pixels with ``x`` along a row and ``y`` down the rows (the
convention of trackpy and of every image library); workspace coordinates are metres. A map is
``xy_m = A @ xy_px + b`` with ``A`` (2, 2) in m/px and ``b`` (2,) in m. Reference marks (features
of known workspace position visible in the image: pillar centres, electrode corners, a graticule)
are the robust way to get it: two marks fix scale, rotation and offset; three or more give a full
affine map (shear and mirror included) by least squares, with the residual reported.
"""

from __future__ import annotations

import csv
import os
from dataclasses import dataclass

import numpy as np

from ..calibration.tracking import column_unit_factor, parse_column_header
from ..errors import FieldplanError
from ..units import to_si

__all__ = ["PixelMap", "PixelMapError", "read_marks"]


class PixelMapError(FieldplanError):
    """A pixel-to-workspace map cannot be built from what was given."""


@dataclass(frozen=True)
class PixelMap:
    """Affine map from camera pixels to workspace metres, ``xy_m = matrix[:, :2] @ xy_px + matrix[:, 2]``.

    Parameters
    ----------
    matrix : array_like, shape (2, 3)
        m/px in the first two columns, m in the last.
    residual : float
        RMS distance between the mapped reference marks and their stated positions, m (0 when the
        map was given, not fitted).

    Examples
    --------
    >>> pm = PixelMap.from_scale("0.5 um", offset=("10 um", 0))
    >>> pm([[2.0, 4.0]]) * 1e6
    array([[11.,  2.]])
    >>> marks = PixelMap.from_marks([[0, 0], [100, 0]], [[0, 0], [0, 5e-5]])   # 90 degrees, 0.5 um/px
    >>> [round(float(v) * 1e6, 6) + 0.0 for v in marks([[0, 10]])[0]]
    [-5.0, 0.0]
    """

    matrix: np.ndarray
    residual: float = 0.0

    def __post_init__(self):
        m = np.asarray(self.matrix, dtype=float)
        if m.shape == (3, 3):
            if not np.allclose(m[2], [0, 0, 1]):
                raise PixelMapError(f"a 3x3 pixel map must have last row [0, 0, 1], got {m[2].tolist()}.")
            m = m[:2]
        if m.shape != (2, 3) or not np.all(np.isfinite(m)):
            raise PixelMapError(f"pixel map matrix must be a finite 2x3 (or 3x3 homogeneous) array in m/px and m, "
                                f"got shape {np.shape(self.matrix)}.")
        if abs(np.linalg.det(m[:, :2])) < 1e-30:
            raise PixelMapError("pixel map matrix is singular: two pixel directions map to one workspace direction.")
        object.__setattr__(self, "matrix", m)

    # -- construction ------------------------------------------------------------------------
    @classmethod
    def from_scale(cls, pixel_size, *, rotation=0.0, offset=(0.0, 0.0), flip_y=False):
        """Map from the pixel size, a rotation and the workspace position of pixel (0, 0).

        Parameters
        ----------
        pixel_size : float or str
            Side of one pixel in the sample plane, m (or ``"0.65 um"``): camera pixel / magnification.
        rotation : float
            Counter-clockwise angle of the image x axis in the workspace, rad.
        offset : pair of float or str
            Workspace position of pixel (0, 0), m.
        flip_y : bool
            Mirror the image rows (image y grows down; a workspace drawn with y up, seen from the
            same side, needs this).
        """
        s = to_si(pixel_size, "m", name="pixel size")
        if not s > 0:
            raise PixelMapError(f"pixel size must be > 0 m, got {pixel_size!r}.")
        c, n = np.cos(float(rotation)), np.sin(float(rotation))
        A = s * np.array([[c, -n], [n, c]]) @ np.diag([1.0, -1.0 if flip_y else 1.0])
        b = [to_si(v, "m", name="offset") for v in offset]
        return cls(np.column_stack([A, b]))

    @classmethod
    def from_marks(cls, pixels, workspace, *, affine=None, max_residual=None):
        """Fit the map to reference marks seen at ``pixels`` whose workspace positions are known.

        Parameters
        ----------
        pixels : array_like, shape (k, 2)
            Mark positions in the image, px.
        workspace : array_like, shape (k, 2)
            The same marks in the workspace, m.
        affine : bool, optional
            Fit a full affine map (needs k >= 3, not all on a line). Default: True for k >= 3,
            else a similarity (scale, rotation, offset; k = 2 is exact).
        max_residual : float or str, optional
            Refuse the fit when the RMS residual exceeds this, m (a mark entered wrongly).

        Returns
        -------
        PixelMap
            With ``residual`` the RMS misfit of the marks, m.
        """
        p = np.asarray(pixels, dtype=float)
        w = np.asarray(workspace, dtype=float)
        if p.ndim != 2 or p.shape[1] != 2 or p.shape != w.shape:
            raise PixelMapError(f"reference marks: pixels and workspace must both be (k, 2), got {p.shape} and "
                                f"{w.shape}.")
        k = len(p)
        if k < 2:
            raise PixelMapError(f"reference marks: need at least 2 marks, got {k}.")
        if not (np.all(np.isfinite(p)) and np.all(np.isfinite(w))):
            raise PixelMapError("reference marks must be finite numbers.")
        affine = k >= 3 if affine is None else bool(affine)
        if affine:
            if k < 3:
                raise PixelMapError(f"an affine map needs at least 3 reference marks, got {k}.")
            X = np.column_stack([p, np.ones(k)])
            if np.linalg.matrix_rank(X) < 3:
                raise PixelMapError("the reference marks lie on one line; an affine map needs three marks not in a line.")
            sol, *_ = np.linalg.lstsq(X, w, rcond=None)
            M = sol.T
        else:
            # Similarity by least squares (Umeyama 1991, without reflection): complex form w = a p + b.
            pc, wc = p - p.mean(0), w - w.mean(0)
            zp = pc[:, 0] + 1j * pc[:, 1]
            zw = wc[:, 0] + 1j * wc[:, 1]
            den = np.vdot(zp, zp).real
            if den <= 0:
                raise PixelMapError("the reference marks are all at one pixel position.")
            a = np.vdot(zp, zw) / den
            A = np.array([[a.real, -a.imag], [a.imag, a.real]])
            M = np.column_stack([A, w.mean(0) - A @ p.mean(0)])
        res = float(np.sqrt(np.mean(np.sum((p @ M[:, :2].T + M[:, 2] - w) ** 2, axis=1))))
        out = cls(M, res)
        if max_residual is not None:
            lim = to_si(max_residual, "m", name="max_residual")
            if res > lim:
                raise PixelMapError(f"reference marks fit with an RMS residual of {res * 1e6:.3g} um, above the "
                                    f"allowed {lim * 1e6:.3g} um: check the mark positions.")
        return out

    @classmethod
    def from_matrix(cls, matrix):
        """Map from a 2x3 (or homogeneous 3x3) matrix, m/px and m; text ``"a,b,c,d,e,f"`` is read row-wise."""
        if isinstance(matrix, str):
            try:
                vals = [float(v) for v in matrix.replace(";", ",").split(",") if v.strip()]
            except ValueError:
                raise PixelMapError(f"affine matrix: expected 6 (or 9) comma-separated numbers, got {matrix!r}.") from None
            if len(vals) not in (6, 9):
                raise PixelMapError(f"affine matrix: expected 6 (or 9) numbers, got {len(vals)}.")
            matrix = np.reshape(vals, (-1, 3))
        return cls(np.asarray(matrix, dtype=float))

    # -- use -----------------------------------------------------------------------------------
    def __call__(self, xy_px):
        """Workspace positions, m, shape (N, 2), of pixel positions ``xy_px`` (N, 2)."""
        q = np.asarray(xy_px, dtype=float).reshape(-1, 2)
        return q @ self.matrix[:, :2].T + self.matrix[:, 2]

    def inverse(self, xy_m):
        """Pixel positions, px, of workspace positions ``xy_m`` (N, 2) in m."""
        q = np.asarray(xy_m, dtype=float).reshape(-1, 2)
        return np.linalg.solve(self.matrix[:, :2], (q - self.matrix[:, 2]).T).T

    @property
    def pixel_size(self):
        """Geometric-mean side of one pixel in the workspace, m."""
        return float(np.sqrt(abs(np.linalg.det(self.matrix[:, :2]))))

    def describe(self):
        A = self.matrix[:, :2]
        ang = np.degrees(np.arctan2(A[1, 0], A[0, 0]))
        return (f"{self.pixel_size * 1e6:.4g} um/px, x axis at {ang:.3g} deg, pixel (0, 0) at "
                f"({self.matrix[0, 2] * 1e6:.4g}, {self.matrix[1, 2] * 1e6:.4g}) um"
                + (f", marks residual {self.residual * 1e6:.3g} um" if self.residual else ""))


def read_marks(path):
    """Reference marks from a CSV: ``x_px, y_px, x [unit], y [unit]`` (header row required).

    Returns
    -------
    pixels, workspace : ndarray, shape (k, 2)
        px and m.
    """
    path = os.fspath(path)
    if not os.path.exists(path):
        raise PixelMapError(f"{path}: reference-mark file not found.")
    with open(path, newline="", encoding="utf-8-sig") as fh:
        rows = [(i + 1, r) for i, r in enumerate(csv.reader(fh)) if r and not r[0].lstrip().startswith("#")]
    if len(rows) < 2:
        raise PixelMapError(f"{path}: expected a header 'x_px,y_px,x [um],y [um]' and one row per mark.")
    hline, head = rows[0]
    header = parse_column_header(head, path, hline)
    names = [n for n, _ in header]
    need = ["x_px", "y_px", "x", "y"]
    if sorted(names) != sorted(need):
        raise PixelMapError(f"{path}:{hline}: mark columns must be {need} (x and y with a length unit), got {names}.")
    units = dict(header)
    f = {n: column_unit_factor(n, units[n], "m", path) for n in ("x", "y") if units[n]}
    if len(f) < 2:
        raise PixelMapError(f"{path}:{hline}: columns x and y need a length unit, e.g. 'x [um]'.")
    col = {n: j for j, n in enumerate(names)}
    px, ws = [], []
    for ln, r in rows[1:]:
        try:
            px.append([float(r[col["x_px"]]), float(r[col["y_px"]])])
            ws.append([float(r[col["x"]]) * f["x"], float(r[col["y"]]) * f["y"]])
        except (ValueError, IndexError):
            raise PixelMapError(f"{path}:{ln}: expected four numbers, got {r}.") from None
    return np.array(px), np.array(ws)
