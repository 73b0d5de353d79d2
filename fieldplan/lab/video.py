"""Microscope video to tracks: frames, trackpy features and links, workspace coordinates, the input log.

:func:`track_video` reads frames (TIFF stacks with tifffile, other image stacks and video files with
imageio), locates bodies in each frame with trackpy (``trackpy.locate``: feature diameter, minimum
integrated brightness, separation), links them into tracks (``trackpy.link``, or with
``predictive=True`` trackpy's nearest-velocity predictor, which keeps identities through
crossings), maps pixel positions to the workspace (:class:`~fieldplan.lab.pixels.PixelMap`),
joins the input log (:mod:`fieldplan.lab.inputlog`) so each frame names the input that was on,
and returns (and writes) the tracking CSV that ``fieldplan fit`` reads
(:func:`fieldplan.calibration.tracking.write_tracks`). :func:`tracks_from_table` does the same from a trackpy
results table (CSV or HDF5) a lab already has.

Every frame in which a linked body was not found is written as a row without position, so the
tracking reader reports it (``missing``); the reader's cleaning (:mod:`fieldplan.calibration.tracking`) also
reports gaps, identity swaps (``jump``: a step the neighbouring steps do not explain) and
outliers. :attr:`VideoTracks.report` gathers those per track, with the frames each track was
seen in and whether it was lost before the end of the video.

Defaults from the body (common practice for trackpy, no source beyond its documentation):
feature diameter the smallest odd number of pixels above 3 body radii (trackpy wants odd and "err on
the large side"); search range one body diameter per frame, at least 2 px (a longer step cannot be
told from an identity swap); minimum mass from the first frame (:func:`estimate_minmass`).
"""

from __future__ import annotations

import math
import os
import warnings
from dataclasses import dataclass, field

import numpy as np

from ..calibration.tracking import (
    TrackingData,
    TrackIssue,
    clean_tracks,
    read_primitive_values,
    setting_name,
    write_tracks,
)
from ..errors import FieldplanError
from ..units import to_si
from . import require
from .inputlog import InputLog, read_input_log
from .pixels import PixelMap

__all__ = ["VideoError", "load_trackpy", "VideoTracks", "read_frames", "count_frames", "trackpy_settings", "estimate_minmass",
           "locate", "link", "tracks_from_features", "tracks_from_table", "track_video"]

#: File endings read with tifffile (page by page, so a long stack is never loaded at once).
TIFF_SUFFIXES = (".tif", ".tiff", ".ome.tif", ".ome.tiff")
#: File endings of trackpy results tables accepted by :func:`tracks_from_table`.
TABLE_SUFFIXES = (".csv", ".h5", ".hdf5", ".hdf")


class VideoError(FieldplanError):
    """A video, a features table or a tracking setting is unusable."""


def load_trackpy():
    """The trackpy module, quietened (its per-frame log lines would flood a live run); a clear error if missing."""
    tp = require("trackpy", what="locating and linking bodies in video")
    tp.quiet()
    return tp


# ---------------------------------------------------------------------------------------------
# frames
# ---------------------------------------------------------------------------------------------
def _gray(frame, path, index, channel):
    a = np.asarray(frame)
    if a.ndim == 3:
        if channel is not None:
            a = a[..., int(channel)]
        else:
            a = a[..., :3].mean(axis=-1) if a.shape[-1] in (3, 4) else a
    if a.ndim != 2:
        raise VideoError(f"{path}: frame {index} has shape {np.shape(frame)}; expected a 2-D grey image "
                         "(or colour, averaged; pick one with channel=).")
    return a.astype(float, copy=False)


def read_frames(path, *, start=0, stop=None, step=1, channel=None):
    """Iterate over the frames of a TIFF stack or video file as 2-D float arrays.

    Frames are read one at a time (memory stays at one frame whatever the file's length).

    Parameters
    ----------
    path : str or os.PathLike
        ``.tif``/``.tiff`` stacks are read with tifffile page by page; anything else (``.avi``,
        ``.mp4``, ``.gif``, a PNG) with ``imageio.v3.imiter``.
    start, stop, step : int
        Frame range, as in ``range``.
    channel : int, optional
        Colour channel to use (default: the mean of red, green and blue).

    Yields
    ------
    (index, ndarray (H, W))
    """
    path = os.fspath(path)
    if not os.path.exists(path):
        raise VideoError(f"{path}: video file not found.")
    if start < 0 or step < 1 or (stop is not None and stop < start):
        raise VideoError(f"frame range start={start}, stop={stop}, step={step} is not a forward range.")
    if path.lower().endswith(TIFF_SUFFIXES):
        tifffile = require("tifffile", what="reading TIFF stacks")
        with tifffile.TiffFile(path) as tif:
            pages = tif.pages
            n = len(pages)
            shaped = tif.series[0].shape if tif.series else ()
            if n == 1 and len(shaped) == 3:
                # One page holding a whole stack (some writers): memory-map it.
                stack = tif.asarray(out="memmap")
                for i in range(start, min(len(stack), stop if stop is not None else len(stack)), step):
                    yield i, _gray(stack[i], path, i, channel)
                return
            for i in range(start, min(n, stop if stop is not None else n), step):
                yield i, _gray(pages[i].asarray(), path, i, channel)
        return
    iio = require("imageio.v3", what="reading video files")
    try:
        it = iio.imiter(path)
        for i, frame in enumerate(it):
            if stop is not None and i >= stop:
                break
            if i >= start and (i - start) % step == 0:
                yield i, _gray(frame, path, i, channel)
    except (OSError, ValueError) as exc:
        raise VideoError(f"{path}: cannot read frames ({exc}). Video files need an imageio plug-in "
                         "(e.g. pip install imageio-ffmpeg or av); TIFF stacks need tifffile.") from None


def count_frames(path):
    """Number of frames in a TIFF stack (cheap) or video (read through once)."""
    path = os.fspath(path)
    if path.lower().endswith(TIFF_SUFFIXES):
        tifffile = require("tifffile", what="reading TIFF stacks")
        with tifffile.TiffFile(path) as tif:
            n = len(tif.pages)
            if n == 1 and tif.series and len(tif.series[0].shape) == 3:
                return int(tif.series[0].shape[0])
            return n
    return sum(1 for _ in read_frames(path))


# ---------------------------------------------------------------------------------------------
# trackpy settings from the body
# ---------------------------------------------------------------------------------------------
def trackpy_settings(radius, pixel_size, *, diameter=None, search_range=None, separation=None):
    """trackpy ``diameter``, ``search_range`` and ``separation`` in pixels from the body radius.

    Parameters
    ----------
    radius : float or str
        Body radius, m.
    pixel_size : float or str
        m per pixel in the sample plane.
    diameter, search_range, separation : float, optional
        Given values win (px); ``diameter`` is rounded up to an odd whole number.

    Returns
    -------
    dict
        ``diameter`` (odd int, px), ``search_range`` (px), ``separation`` (px).

    Examples
    --------
    >>> trackpy_settings("1 um", "0.5 um")
    {'diameter': 7, 'search_range': 4.0, 'separation': 8.0}
    """
    r = to_si(radius, "m", name="body radius")
    s = to_si(pixel_size, "m", name="pixel size")
    if not (r > 0 and s > 0):
        raise VideoError(f"body radius and pixel size must be > 0 m, got {radius!r} and {pixel_size!r}.")
    r_px = r / s
    if diameter is None:
        d = max(int(math.ceil(3.0 * r_px)), 5)
    else:
        d = int(math.ceil(float(diameter)))
        if d < 3:
            raise VideoError(f"feature diameter must be >= 3 px, got {diameter!r}.")
    d += (d % 2 == 0)
    sr = float(search_range) if search_range is not None else max(2.0 * r_px, 2.0)
    sep = float(separation) if separation is not None else float(d + 1)
    if not (sr > 0 and sep > 0):
        raise VideoError(f"search range and separation must be > 0 px, got {sr} and {sep}.")
    return {"diameter": d, "search_range": sr, "separation": sep}


def estimate_minmass(frame, diameter, *, count=None, separation=None):
    """Minimum integrated brightness separating bodies from noise in one frame.

    With ``count`` (bodies expected) the threshold is 30 % of the median mass of the ``count``
    brightest features; without it, the median plus 8 robust deviations (MAD) of all local maxima
    (noise maxima vastly outnumber bodies). Both are common practice, no source.
    """
    tp = load_trackpy()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        f = tp.locate(frame, diameter, minmass=0, separation=separation)
    m = np.sort(np.asarray(f["mass"], dtype=float))[::-1]
    if len(m) == 0:
        raise VideoError("no feature at all in the first frame: is the video blank?")
    if count:
        return float(0.3 * np.median(m[: int(count)]))
    med = float(np.median(m))
    mad = float(np.median(np.abs(m - med))) * 1.4826
    return med + 8.0 * max(mad, 1e-12 * max(med, 1.0))


# ---------------------------------------------------------------------------------------------
# locate and link
# ---------------------------------------------------------------------------------------------
def locate(frames, *, diameter, minmass=None, separation=None, count=None, progress=False, **locate_options):
    """trackpy features of each frame: a pandas DataFrame with ``frame``, ``x``, ``y`` (px), ``mass``.

    Parameters
    ----------
    frames : iterable of (index, ndarray) or of ndarray
        From :func:`read_frames`, a camera, or a 3-D array (frames first).
    diameter : int
        Odd, px.
    minmass : float, optional
        Default :func:`estimate_minmass` on the first frame.
    separation : float, optional
        px (trackpy's default diameter + 1).
    count : int, optional
        Bodies expected (sharpens the minmass estimate).
    progress : bool
        tqdm bar.
    **locate_options
        Passed to ``trackpy.locate`` (``percentile``, ``noise_size``, ``preprocess``, ...).
    """
    tp = load_trackpy()
    pd = require("pandas", what="trackpy tables")
    out = []
    it = frames
    if progress:
        from tqdm import tqdm  # noqa: PLC0415

        it = tqdm(frames, desc="locating", unit="frame")
    for k, item in enumerate(it):
        idx, img = item if isinstance(item, tuple) else (k, item)
        img = np.asarray(img, dtype=float)
        if minmass is None:
            minmass = estimate_minmass(img, diameter, count=count, separation=separation)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            f = tp.locate(img, diameter, minmass=minmass, separation=separation, **locate_options)
        f["frame"] = int(idx)
        out.append(f)
    if not out:
        raise VideoError("no frames to locate bodies in.")
    feats = pd.concat(out, ignore_index=True)
    feats.attrs["minmass"] = float(minmass)
    return feats


def link(features, search_range, *, memory=3, predictive=True, adaptive_stop=None):
    """Link features into tracks with trackpy: adds a ``particle`` column.

    Parameters
    ----------
    features : DataFrame
        ``frame``, ``x``, ``y`` (px).
    search_range : float
        Largest step between frames, px.
    memory : int
        Frames a body may vanish and keep its identity.
    predictive : bool
        Link against each track's own velocity (``trackpy.predict.NearestVelocityPredict``):
        keeps identities when bodies cross; plain nearest-neighbour linking otherwise.
    adaptive_stop : float, optional
        See ``trackpy.link``.
    """
    tp = load_trackpy()
    if len(features) == 0:
        raise VideoError("no features to link (raise the sensitivity: lower minmass).")
    opts = {"memory": int(memory)}
    if adaptive_stop is not None:
        opts.update(adaptive_stop=adaptive_stop, adaptive_step=0.95)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        if predictive:
            linked = tp.predict.NearestVelocityPredict().link_df(features.copy(), search_range, **opts)
            # trackpy's velocity predictor does not carry a vanished body across frames (memory);
            # close those gaps here with the same prediction.
            return _close_gaps(linked, search_range, int(memory))
        return tp.link(features.copy(), search_range, **opts)


def _close_gaps(linked, search_range, memory):
    """Join a track that ends to one that starts 2 to ``memory + 1`` frames later, where the first,
    extrapolated at its end velocity (mean step over its last three steps), lands within
    ``search_range`` px of the second's start. Pairs are taken greedily by distance, one to one
    (gap closing as in most tracking software; common practice)."""
    if memory <= 0 or len(linked) == 0:
        return linked
    frame = linked["frame"].to_numpy(dtype=int)
    pid = linked["particle"].to_numpy(dtype=int)
    xy = linked[["x", "y"]].to_numpy(dtype=float)
    order = np.lexsort((frame, pid))
    p_sorted = pid[order]
    first = np.r_[0, np.flatnonzero(np.diff(p_sorted)) + 1]
    last = np.r_[first[1:] - 1, len(order) - 1]
    ids = p_sorted[first]
    f_start, f_end = frame[order[first]], frame[order[last]]
    x_start, x_end = xy[order[first]], xy[order[last]]
    back = np.maximum(last - 3, first)
    span = np.maximum(f_end - frame[order[back]], 1)
    vel = (x_end - xy[order[back]]) / span[:, None]
    starts_at = {}
    for k, f in enumerate(f_start):
        starts_at.setdefault(int(f), []).append(k)
    pairs = []
    for a in range(len(ids)):
        for lag in range(2, memory + 2):
            cand = starts_at.get(int(f_end[a]) + lag)
            if not cand:
                continue
            cand = np.asarray(cand)
            d = np.linalg.norm(x_end[a] + vel[a] * lag - x_start[cand], axis=1)
            for b in cand[(d <= search_range) & (cand != a)]:
                pairs.append((float(d[cand == b][0]), a, int(b)))
    if not pairs:
        return linked
    pairs.sort()
    used_end, used_start, join = set(), set(), {}
    for _, a, b in pairs:
        if a not in used_end and b not in used_start:
            used_end.add(a)
            used_start.add(b)
            join[int(ids[b])] = int(ids[a])

    def root(p):
        seen = set()
        while p in join and p not in seen:
            seen.add(p)
            p = join[p]
        return p

    out = linked.copy()
    out["particle"] = [root(int(p)) for p in pid]
    return out


# ---------------------------------------------------------------------------------------------
# tracks
# ---------------------------------------------------------------------------------------------
@dataclass
class VideoTracks:
    """Tracks from a video or a trackpy table, in workspace units, joined to the input log.

    Attributes
    ----------
    data : TrackingData
        Cleaned by :mod:`fieldplan.calibration.tracking` (segments, issues), as ``fieldplan fit`` will see it.
    raw : TrackingData
        Every frame of every kept track, lost frames as NaN rows (what :attr:`path` holds).
    features : DataFrame or None
        trackpy's table (px), with ``particle``.
    report : list of dict
        Per track: ``track``, ``first_frame``, ``last_frame``, ``frames_seen``, ``frames_missing``,
        ``lost`` (ended before the last frame), ``gaps``, ``swaps`` (identity jumps), ``outliers``,
        ``unlogged`` (frames outside the input log).
    issues : list of TrackIssue
        Those of the cleaning plus ``stub`` (tracks too short, dropped) and ``unlogged``.
    settings : dict
        trackpy settings used (px) and the pixel map.
    path : str or None
        The tracking CSV written.
    frames : int
        Frames in the video (or the table).
    """

    data: TrackingData
    raw: TrackingData
    features: object = None
    report: list = field(default_factory=list)
    issues: list = field(default_factory=list)
    settings: dict = field(default_factory=dict)
    path: str | None = None
    frames: int = 0

    def summary(self):
        """Counts: frames, tracks, lost tracks, missing frames, swaps, as one dict."""
        return {"frames": self.frames, "tracks": len(self.report),
                "lost_tracks": sum(r["lost"] for r in self.report),
                "missing_frames": sum(r["frames_missing"] for r in self.report),
                "swaps": sum(r["swaps"] for r in self.report), "issues": self.data.summary()["issues"]}


def _frame_times(frame_index, fps, times):
    if times is not None:
        times = np.asarray(times, dtype=float)
        if np.any(frame_index >= len(times)):
            raise VideoError(f"frame times: {len(times)} given but frame {int(frame_index.max())} is used.")
        if np.any(np.diff(times) <= 0):
            raise VideoError("frame times must increase.")
        return times[frame_index]
    fps = to_si(fps, "Hz", name="frame rate") if fps is not None else None
    if not fps or not fps > 0:
        raise VideoError("give the frame rate (fps, e.g. 50 or '50 Hz') or the frame times.")
    return frame_index / fps


def tracks_from_features(features, pixel_map, *, fps=None, times=None, settings=None, min_length=5, kind=None,
                         n_frames=None, out=None, comment=None, warn=True):
    """Turn linked trackpy features into tracking data in workspace units, joined to the input log.

    Parameters
    ----------
    features : DataFrame
        ``frame``, ``x``, ``y`` (px), ``particle``.
    pixel_map : PixelMap
    fps : float or str, optional
        Frame rate, Hz; frame ``k`` is at ``k / fps`` s. Or give ``times``.
    times : array_like, optional
        s, time of every frame index.
    settings : str or InputLog
        The input log (path or read), on the video's clock (use :meth:`InputLog.shifted`).
    min_length : int
        Tracks seen in fewer frames are dropped (reported as ``stub``).
    kind : str, optional
        Body kind written in every row (matches :attr:`fieldplan.Body.name` in a scenario).
    n_frames : int, optional
        Frames in the video (default: one past the last frame in ``features``).
    out : str, optional
        Write the tracking CSV here (atomically).
    comment : str, optional
        ``#`` lines at the top of the CSV.
    warn : bool
        One :class:`fieldplan.calibration.tracking.TrackingWarning` summarising the issues.

    Returns
    -------
    VideoTracks
    """
    if settings is None:
        raise VideoError("the input log (settings) is required: which primitive was on in each frame.")
    log = settings if isinstance(settings, InputLog) else read_input_log(settings)
    for c in ("frame", "x", "y", "particle"):
        if c not in features.columns:
            raise VideoError(f"features table has no {c!r} column; columns are {list(features.columns)}.")
    frame = np.asarray(features["frame"], dtype=int)
    pid = np.asarray(features["particle"], dtype=int)
    xy_px = np.column_stack([np.asarray(features["x"], float), np.asarray(features["y"], float)])
    n_frames = int(frame.max()) + 1 if n_frames is None else int(n_frames)
    last_frame = n_frames - 1
    issues = []
    tr, xy, fr = [], [], []
    report = []
    for p in np.unique(pid):
        sel = pid == p
        f = frame[sel]
        order = np.argsort(f)
        f = f[order]
        name = f"p{int(p)}"
        if len(np.unique(f)) != len(f):
            raise VideoError(f"track {name}: two features in one frame; the linking is inconsistent.")
        if len(f) < min_length:
            issues.append(TrackIssue("stub", name, float(f[0]), None,
                                     f"seen in {len(f)} frame(s) only (fewer than {min_length}); dropped"))
            continue
        span = np.arange(f[0], f[-1] + 1)
        pos = np.full((len(span), 2), np.nan)
        pos[f - f[0]] = pixel_map(xy_px[sel][order])
        tr.append(np.full(len(span), name))
        fr.append(span)
        xy.append(pos)
        report.append({"track": name, "first_frame": int(f[0]), "last_frame": int(f[-1]),
                       "frames_seen": int(len(f)), "frames_missing": int(len(span) - len(f)),
                       "lost": bool(f[-1] < last_frame), "gaps": 0, "swaps": 0, "outliers": 0, "unlogged": 0})
    if not tr:
        raise VideoError(f"no track is {min_length} frames or longer (search range too small, minmass too high, "
                         "or the bodies move too fast for the frame rate).")
    track = np.concatenate(tr)
    frames = np.concatenate(fr)
    pos = np.vstack(xy)
    t = _frame_times(frames, fps, times)
    j = log.at(t)
    unlogged = j < 0
    by_track = {r["track"]: r for r in report}
    for name in np.unique(track[unlogged]):
        k = int(np.sum(unlogged & (track == name)))
        by_track[str(name)]["unlogged"] = k
        issues.append(TrackIssue("unlogged", str(name), float(t[unlogged & (track == name)][0]), None,
                                 f"{k} frame(s) outside the input log (before its first row or after its end); dropped"))
    keep = ~unlogged
    if not keep.any():
        raise VideoError(f"no frame falls inside the input log ({log.source}): frames span "
                         f"{t.min():.4g}-{t.max():.4g} s, the log {log.times[0]:.4g}-{log.end:.4g} s. Shift the log "
                         "with its offset to the video clock.")
    track, t, pos, j = track[keep], t[keep], pos[keep], j[keep]
    values = log.values[j]
    if log.primitive is not None:
        prim = np.array([log.primitive[k] for k in j], dtype=object).astype(str)
    else:
        prim = np.array([setting_name(log.channels, v) for v in values], dtype=object).astype(str)
    prim_values = read_primitive_values(prim, values, log.channels,
                                    log.lines[j] if log.lines is not None else np.zeros(len(j), int), log.source)
    kinds = np.full(len(t), kind, dtype=object)
    raw = TrackingData(track, t, pos, prim, kinds, np.zeros(len(t), dtype=int), np.zeros(len(t), dtype=int),
                       tuple(log.channels), prim_values, [], None)
    with warnings.catch_warnings(record=True) as rec:
        warnings.simplefilter("always")
        data = clean_tracks(track, t, pos, prim, kinds, np.zeros(len(t), dtype=int), tuple(log.channels), prim_values,
                      out, warn=True)
    data.issues = list(data.issues) + issues
    for i in data.issues:
        row = by_track.get(i.track)
        if row is not None:
            key = {"gap": "gaps", "jump": "swaps", "outlier": "outliers"}.get(i.kind)
            if key:
                row[key] += 1
    if out is not None:
        write_tracks(out, raw, comment=comment)
    if warn and rec:
        for w in rec:
            warnings.warn(w.message, w.category, stacklevel=2)
    return VideoTracks(data, raw, features, report, data.issues, {}, os.fspath(out) if out else None, n_frames)


def _pixel_map(pixel_map, pixel_size):
    if pixel_map is not None:
        if not isinstance(pixel_map, PixelMap):
            raise VideoError(f"pixel_map must be a fieldplan.lab.PixelMap, got {type(pixel_map).__name__}.")
        return pixel_map
    if pixel_size is None:
        raise VideoError("give the pixel size (e.g. '0.65 um') or a pixel map (reference marks or a matrix).")
    return PixelMap.from_scale(pixel_size)


def track_video(video, *, settings, fps=None, times=None, pixel_size=None, pixel_map=None, radius=None,
                diameter=None, minmass=None, search_range=None, separation=None, memory=3, predictive=True,
                count=None, min_length=5, kind=None, frames=None, out=None, progress=False, warn=True,
                **locate_options):
    """Microscope video -> tracks in workspace units joined to the input log -> tracking CSV.

    Parameters
    ----------
    video : str or os.PathLike
        TIFF stack or video file (:func:`read_frames`).
    settings : str or InputLog
        The input log on the video's clock.
    fps : float or str, optional
        Frame rate, Hz (or ``times``: s per frame).
    pixel_size : float or str, optional
        m per pixel, when no ``pixel_map`` is given (then pixel (0, 0) is the workspace origin).
    pixel_map : PixelMap, optional
    radius : float or str, optional
        Body radius, m: the trackpy defaults follow from it (:func:`trackpy_settings`). Required
        unless ``diameter`` and ``search_range`` are given.
    diameter, minmass, search_range, separation : optional
        trackpy settings (px; minmass in trackpy's brightness units).
    memory : int
        Frames a body may vanish and keep its identity.
    predictive : bool
        Predictive (velocity) linking; see :func:`link`.
    count : int, optional
        Bodies expected in view (for the minmass estimate).
    min_length : int
        Shortest track kept, frames.
    kind : str, optional
        Body kind for every track.
    frames : iterable, optional
        Frames to use instead of reading ``video`` (a 3-D array or an iterator; ``video`` then
        only names the source in messages).
    out : str, optional
        Tracking CSV to write.
    progress, warn : bool
    **locate_options
        Passed to ``trackpy.locate``.

    Returns
    -------
    VideoTracks
    """
    pm = _pixel_map(pixel_map, pixel_size)
    if radius is not None:
        tps = trackpy_settings(radius, pm.pixel_size, diameter=diameter, search_range=search_range,
                               separation=separation)
    else:
        if diameter is None or search_range is None:
            raise VideoError("give the body radius (defaults follow from it) or both diameter and search_range (px).")
        tps = trackpy_settings(1.0, 1.0, diameter=diameter, search_range=search_range, separation=separation)
    src = frames if frames is not None else read_frames(video)
    seen = [0]

    def counted(it):
        for k, item in enumerate(it):
            seen[0] = (item[0] if isinstance(item, tuple) else k) + 1
            yield item

    feats = locate(counted(src), diameter=tps["diameter"], minmass=minmass, separation=tps["separation"],
                   count=count, progress=progress, **locate_options)
    n_frames = seen[0]
    linked = link(feats, tps["search_range"], memory=memory, predictive=predictive)
    comment = f"tracked by fieldplan.lab.video from {os.path.basename(os.fspath(video)) if video else 'frames'}"
    res = tracks_from_features(linked, pm, fps=fps, times=times, settings=settings, min_length=min_length, kind=kind,
                               n_frames=n_frames, out=out, comment=comment, warn=warn)
    res.settings = dict(tps, minmass=feats.attrs.get("minmass"), memory=memory, predictive=predictive,
                        pixel_map=pm.matrix.tolist(), pixel_size_m=pm.pixel_size)
    return res


def tracks_from_table(table, *, settings, fps=None, times=None, pixel_size=None, pixel_map=None, min_length=5,
                      kind=None, key=None, out=None, warn=True):
    """A trackpy results table (CSV or HDF5: ``frame``, ``x``, ``y`` in px, ``particle``) -> tracking data.

    Parameters
    ----------
    table : str or DataFrame
        File (``.csv``; ``.h5``/``.hdf5`` need the ``tables`` package, as pandas' HDF5 reader does)
        or a DataFrame.
    key : str, optional
        HDF5 key (default: the only one in the file).
    Other parameters as :func:`tracks_from_features`.
    """
    pd = require("pandas", what="trackpy tables")
    pm = _pixel_map(pixel_map, pixel_size)
    src = None
    if isinstance(table, (str, os.PathLike)):
        src = os.fspath(table)
        if not os.path.exists(src):
            raise VideoError(f"{src}: trackpy table not found.")
        low = src.lower()
        if low.endswith(".csv"):
            df = pd.read_csv(src, comment="#")
        elif low.endswith((".h5", ".hdf5", ".hdf")):
            require("tables", what="reading HDF5 trackpy tables (pandas.read_hdf)")
            df = pd.read_hdf(src, key=key)
        else:
            raise VideoError(f"{src}: a trackpy table must be .csv or .h5/.hdf5.")
    else:
        df = table
    df = df.reset_index(drop=df.index.name in df.columns if df.index.name else True)
    for c in ("frame", "x", "y", "particle"):
        if c not in df.columns:
            raise VideoError(f"{src or 'table'}: no {c!r} column; a trackpy results table has frame, x, y (px) and "
                             f"particle; the columns are {list(df.columns)}.")
    bad = ~np.isfinite(df[["frame", "x", "y", "particle"]].to_numpy(dtype=float)).all(axis=1)
    if bad.any():
        raise VideoError(f"{src or 'table'}: row {int(np.argmax(bad)) + 1} of the table has a non-finite frame, x, y "
                         "or particle.")
    comment = f"tracked by trackpy, converted by fieldplan.lab.video from {os.path.basename(src) if src else 'a table'}"
    res = tracks_from_features(df, pm, fps=fps, times=times, settings=settings, min_length=min_length, kind=kind,
                               out=out, comment=comment, warn=warn)
    res.settings = {"pixel_map": pm.matrix.tolist(), "pixel_size_m": pm.pixel_size, "source": src}
    return res
