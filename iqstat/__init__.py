"""iqstat: Eb/N0, error rate and margin of noncoherent FSK/OOK links from IQ captures."""

from iqstat.capture import Capture
from iqstat.errors import CaptureError, IqstatError, MeasurementError, ParameterError, ProfileError

__version__ = "0.1.0"

__all__ = [
    "Capture",
    "CaptureError",
    "IqstatError",
    "MeasurementError",
    "ParameterError",
    "ProfileError",
    "__version__",
]
