"""In the lab: microscope video to tracks and calibration, live camera observation, instrument drivers.

=====================================  ==================================================================
:mod:`~fieldplan.lab.pixels`           :class:`PixelMap`: camera pixels to workspace metres (scale,
                                       rotation, offset; reference marks; an affine matrix)
:mod:`~fieldplan.lab.inputlog`         the input log (which primitive or channel values were on when),
                                       read, written by the drivers, joined to frame times
:mod:`~fieldplan.lab.video`            frames (TIFF stacks, video files) -> trackpy features and tracks
                                       -> the tracking CSV ``fieldplan fit`` reads (:func:`track_video`)
:mod:`~fieldplan.lab.observe`          :func:`camera_observer`: an ``observe()`` for
                                       :func:`fieldplan.planning.live.run_live` with predictive linking
:mod:`~fieldplan.lab.drivers`          ``apply(segment)`` adapters: PyVISA tone generator, serial line,
                                       analog-output waveforms (NI-DAQmx behind the ``daq`` extra)
:mod:`~fieldplan.lab.pacing`           wall-clock real-time play: latency, jitter, overrun warnings,
                                       dry runs against the simulator
:mod:`~fieldplan.lab.play`             playing a saved schedule on a driver (``fieldplan play``)
=====================================  ==================================================================

The third-party libraries (trackpy, imageio, tifffile, pyvisa, pyserial; nidaqmx) are optional
extras: ``pip install 'fieldplan[lab]'`` (and ``'fieldplan[daq]'``). They are imported when first
used, and a missing one raises :class:`LabDependencyError` naming the extra to install.
"""

from __future__ import annotations

import importlib

__all__ = ["LabDependencyError", "require", "PixelMap", "read_marks", "InputLog", "read_input_log", "track_video",
           "tracks_from_table", "VideoTracks", "CameraObserver", "camera_observer", "open_driver", "load_profile",
           "InstrumentProfile", "ToneGenerator", "SerialLine", "WaveformDriver", "RealTimeClock", "run_realtime",
           "dry_run", "PlayReport", "load_for_play"]


class LabDependencyError(ImportError):
    """An optional library of the lab stack is not installed (the message names the extra)."""


def require(module, extra="lab", what=None):
    """Import ``module`` or raise :class:`LabDependencyError` saying which extra installs it.

    Parameters
    ----------
    module : str
        Importable module name, e.g. ``"trackpy"``.
    extra : str
        The fieldplan extra that installs it.
    what : str, optional
        What needs it, for the message.
    """
    try:
        return importlib.import_module(module)
    except ImportError as exc:
        need = f" for {what}" if what else ""
        raise LabDependencyError(
            f"the Python package {module!r} is needed{need} but cannot be imported ({exc}); install it with "
            f"pip install 'fieldplan[{extra}]'.") from None



# The public surface, imported on first use (PEP 562): building the `fieldplan` command's parser
# imports this package, and must not pay for scipy.signal, pandas or trackpy.
_EXPORTS = {
    "PixelMap": "pixels", "read_marks": "pixels", "InputLog": "inputlog", "read_input_log": "inputlog",
    "track_video": "video", "tracks_from_table": "video", "VideoTracks": "video",
    "CameraObserver": "observe", "camera_observer": "observe",
    "open_driver": "drivers", "load_profile": "drivers", "InstrumentProfile": "drivers",
    "ToneGenerator": "drivers", "SerialLine": "drivers", "WaveformDriver": "drivers",
    "RealTimeClock": "pacing", "run_realtime": "pacing", "dry_run": "pacing",
    "PlayReport": "play", "load_for_play": "play",
}


def __getattr__(name):
    if name in _EXPORTS:
        mod = importlib.import_module(f".{_EXPORTS[name]}", __name__)
        return getattr(mod, name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


def __dir__():
    return sorted(list(globals()) + list(_EXPORTS))
