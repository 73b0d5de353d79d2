"""In the lab: microscope video to tracks and calibration, live camera observation, instrument drivers.

=====================================  ==================================================================
:mod:`~fieldplan.lab.pixels`           :class:`PixelMap`: camera pixels to workspace metres (scale,
                                       rotation, offset; reference marks; an affine matrix)
:mod:`~fieldplan.lab.inputlog`         the input log (which primitive or channel values were on when),
                                       read, written by the drivers, joined to frame times
:mod:`~fieldplan.lab.video`            frames (TIFF stacks, video files) -> trackpy features and tracks
                                       -> the tracking CSV ``fieldplan fit`` reads (:func:`track_video`)
:mod:`~fieldplan.lab.observe`          :func:`camera_observer`: an ``observe()`` for
                                       :func:`fieldplan.live.run_live` with predictive linking
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


# The public surface (imported after require(): the modules below use it).
from .drivers import InstrumentProfile, SerialLine, ToneGenerator, WaveformDriver, load_profile, open_driver  # noqa: E402
from .inputlog import InputLog, read_input_log  # noqa: E402
from .observe import CameraObserver, camera_observer  # noqa: E402
from .pacing import RealTimeClock, dry_run, run_realtime  # noqa: E402
from .pixels import PixelMap, read_marks  # noqa: E402
from .play import PlayReport, load_for_play  # noqa: E402
from .video import VideoTracks, track_video, tracks_from_table  # noqa: E402
