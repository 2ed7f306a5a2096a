from .calibration import Calibration, CalibrationRow, Shrinkage, size_check  # noqa: F401
