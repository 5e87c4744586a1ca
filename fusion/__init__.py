"""rangefuse runtime library: sensor models, noise models, estimators and the fuser.

Fused ranges are not a safety-rated protective function; defer to local codes,
standards and licensed practice wherever people are near a machine.
"""
__version__ = "0.1.0"

from .errors import RangefuseError, ConfigError, LogFormatError, InputError, CalibrationError  # noqa: E402,F401
from .sensors.air import speed_of_sound, echo_range  # noqa: E402,F401
