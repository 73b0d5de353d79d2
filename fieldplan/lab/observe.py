"""Live observation from a camera: an ``observe()`` for :func:`fieldplan.planning.live.run_live`.

:class:`CameraObserver` takes frames from any callable or iterator (camera SDKs differ: a
``grab()`` method, a generator, a queue's ``get``), locates bodies in each frame with
``trackpy.locate``, maps them to the workspace, and keeps identities by *predictive linking*: each
body's expected position is the controller's own prediction
(``controller.predict(last_estimate, segments_played_since)``) and detections are assigned to
bodies by least total distance (``scipy.optimize.linear_sum_assignment``) inside a gate around
each prediction. It returns

* positions, shape (n, 2), m, when every body is assigned unambiguously;
* a row of NaN for a body with no detection inside its gate (run_live dead-reckons it);
* ``None`` for a frame it cannot assign unambiguously (two detections nearly equally close to one
  body's prediction, or one detection claimed by two bodies), or when no frame came.

The observer must see what was played: wrap the driver with :meth:`CameraObserver.wrap`
(``run_live(ctrl, obs, obs.wrap(driver))``).
"""

from __future__ import annotations

import warnings
from collections.abc import Iterator

import numpy as np
from scipy.optimize import linear_sum_assignment

from ..errors import FieldplanError
from .pixels import PixelMap
from .video import load_trackpy, estimate_minmass, trackpy_settings

__all__ = ["CameraObserver", "camera_observer"]


class CameraObserver:
    """``observe()`` for :func:`fieldplan.planning.live.run_live` from camera frames (see the module docstring).

    Parameters
    ----------
    frames : callable or iterator
        ``frames()`` (or ``next(frames)``) -> 2-D image, or ``None`` when no frame is ready.
    controller : Controller
        Its ``predict(positions, segments)`` gives the expected positions; its bodies give the
        default feature size and gate.
    pixel_map : PixelMap
    initial : array_like, shape (n, 2)
        m, where the bodies are at the first frame (their identities start from this: body ``i``
        is the detection nearest ``initial[i]``).
    diameter : int, optional
        trackpy feature diameter, px (default from the smallest body radius, :func:`trackpy_settings`).
    minmass : float, optional
        Default from the first frame (:func:`estimate_minmass` with ``count = n``).
    gate : float or array_like (n,), optional
        Largest distance from a body's prediction to its detection, m (default two body radii:
        the prediction already carries the commanded motion, so what remains is noise,
        Brownian motion and model error; common practice).
    ambiguity : float or array_like (n,), optional
        A frame is ambiguous when a body's runner-up detection is less than this farther away
        than its assigned one, m (default one body radius).
    **locate_options
        Passed to ``trackpy.locate``.

    Attributes
    ----------
    frames_seen, ambiguous, lost, no_frame : int
        Counters.
    estimate : ndarray (n, 2) or None
        Last positions used as the prediction's start (assigned, or dead-reckoned).
    last_features : ndarray (k, 2)
        Detections of the last frame, m.
    """

    def __init__(self, frames, controller, pixel_map, *, initial, diameter=None, minmass=None, gate=None,
                 ambiguity=None, **locate_options):
        if not isinstance(pixel_map, PixelMap):
            raise FieldplanError(f"pixel_map must be a fieldplan.lab.PixelMap, got {type(pixel_map).__name__}.")
        if callable(frames) and not isinstance(frames, Iterator):
            self._next = frames
        elif isinstance(frames, Iterator) or hasattr(frames, "__iter__"):
            it = iter(frames)
            self._next = lambda: next(it, None)
        else:
            raise FieldplanError("frames must be a callable returning an image, or an iterator of images.")
        self.controller = controller
        self.pixel_map = pixel_map
        n = controller.n
        self.n = n
        init = np.asarray(initial, dtype=float)
        if init.shape != (n, 2) or not np.all(np.isfinite(init)):
            raise FieldplanError(f"initial positions must be finite, shape ({n}, 2) in m, got {init.shape}.")
        self.estimate = init.copy()
        radii = np.array([b.radius for b in controller.bodies], dtype=float)
        self.gate = np.broadcast_to(np.asarray(2.0 * radii if gate is None else gate, float), (n,)).copy()
        self.ambiguity = np.broadcast_to(np.asarray(radii if ambiguity is None else ambiguity, float), (n,)).copy()
        if np.any(self.gate <= 0) or np.any(self.ambiguity < 0):
            raise FieldplanError("gate must be > 0 m and ambiguity >= 0 m.")
        self.diameter = trackpy_settings(float(radii.min()), pixel_map.pixel_size, diameter=diameter)["diameter"]
        self.minmass = minmass
        self.locate_options = locate_options
        self._since = []
        self.frames_seen = self.ambiguous = self.lost = self.no_frame = 0
        self.last_features = np.zeros((0, 2))

    # -- the driver side ------------------------------------------------------------------
    def record(self, segment):
        """Note a segment played since the last frame (the prediction goes through it)."""
        self._since.append(segment)

    def wrap(self, apply):
        """``apply`` that also records each segment here (pass it to run_live)."""
        def applied(segment):
            self.record(segment)
            return apply(segment)

        return applied

    # -- the tracker side -----------------------------------------------------------------
    def detect(self, image):
        """Detections in ``image`` as workspace positions, m, shape (k, 2)."""
        tp = load_trackpy()
        img = np.asarray(image, dtype=float)
        if img.ndim != 2:
            raise FieldplanError(f"camera frame must be a 2-D image, got shape {img.shape}.")
        if self.minmass is None:
            self.minmass = estimate_minmass(img, self.diameter, count=self.n)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            f = tp.locate(img, self.diameter, minmass=self.minmass, **self.locate_options)
        px = np.column_stack([np.asarray(f["x"], float), np.asarray(f["y"], float)])
        return self.pixel_map(px) if len(px) else np.zeros((0, 2))

    def predicted(self):
        """Where the controller's model puts the bodies now, m (n, 2)."""
        if self._since:
            return np.asarray(self.controller.predict(self.estimate, self._since), dtype=float)
        return self.estimate.copy()

    def assign(self, pred, det):
        """Assign detections ``det`` (k, 2) to predictions ``pred`` (n, 2).

        Returns
        -------
        ndarray (n, 2) with NaN rows for lost bodies, or None when ambiguous.
        """
        n = len(pred)
        out = np.full((n, 2), np.nan)
        if len(det) == 0:
            return out
        dist = np.linalg.norm(pred[:, None, :] - det[None, :, :], axis=2)      # (n, k)
        inside = dist <= self.gate[:, None]
        big = 1e6 * float(np.max(self.gate))
        cost = np.where(inside, dist, big)
        rows, cols = linear_sum_assignment(cost)
        assigned = {r: c for r, c in zip(rows, cols) if inside[r, c]}
        for i in range(n):
            near = np.flatnonzero(inside[i])
            if i not in assigned:
                if len(near):
                    return None          # its only candidates went to another body: merged or crossed spots
                continue
            j = assigned[i]
            others = near[near != j]
            if len(others) and np.min(dist[i, others]) - dist[i, j] < self.ambiguity[i]:
                return None
            out[i] = det[j]
        return out

    def __call__(self):
        image = self._next()
        if image is None:
            self.no_frame += 1
            return None
        self.frames_seen += 1
        det = self.detect(image)
        self.last_features = det
        pred = self.predicted()
        got = self.assign(pred, det)
        # Segments up to now are accounted for in `pred`; the next prediction starts here.
        self._since = []
        if got is None:
            self.ambiguous += 1
            self.estimate = pred
            return None
        lost = ~np.all(np.isfinite(got), axis=1)
        self.lost += int(lost.sum())
        self.estimate = np.where(lost[:, None], pred, got)
        return got


def camera_observer(frames, controller, pixel_map, *, initial, **options):
    """Build a :class:`CameraObserver` (see there); ``run_live(ctrl, obs, obs.wrap(apply))``."""
    return CameraObserver(frames, controller, pixel_map, initial=initial, **options)
