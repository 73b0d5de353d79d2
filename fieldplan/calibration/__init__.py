"""From lab recordings to models: tracking data, fitted fields, calibrated actuators, grey-box fits.

====================================  ===============================================================
:mod:`~fieldplan.calibration.tracking`   tracking CSV reader and writer, Savitzky–Golay velocity samples
:mod:`~fieldplan.calibration.calibrate`  fitted fields, :class:`CalibratedActuator`, :func:`fit_parameters`
                                         (figures in :mod:`fieldplan.plots.calibration`; the whole
                                         ``fit`` job in :mod:`fieldplan.workflows.fit`)
====================================  ===============================================================
"""

from .calibrate import CalibratedActuator, CalibrationError, fit_field, fit_parameters, load_calibrated
from .tracking import TrackingData, TrackingDataError, read_tracks, velocity_samples, write_tracks

__all__ = ["read_tracks", "write_tracks", "velocity_samples", "TrackingData", "TrackingDataError", "fit_field",
           "CalibratedActuator", "load_calibrated", "fit_parameters", "CalibrationError"]
