"""rangefuse runtime library: sensor models, noise models, estimators and the fuser.

Fused ranges are not a safety-rated protective function; defer to local codes,
standards and licensed practice wherever people are near a machine.

The public names are loaded on first use, so ``import fusion`` stays cheap on a robot
that only needs one part of it.
"""
from importlib import import_module as _import

from .errors import RangefuseError, ConfigError, LogFormatError, InputError, CalibrationError  # noqa: F401
from .sensors.air import speed_of_sound, echo_range  # noqa: F401

__version__ = "0.1.0"

_LAZY = {
    "Rig": ".rig", "AirConfig": ".rig", "EstimatorConfig": ".rig", "ScheduleConfig": ".rig",
    "Fuser": ".fuser", "make_fuser": ".fuser", "Estimate": ".fuser", "Decision": ".fuser", "StepBatch": ".fuser",
    "TriangulationCurve": ".sensors.triangulation", "TriangulationRanger": ".sensors.ir",
    "EchoRanger": ".sensors.echo", "RangeGaussian": ".noise", "VoltageGaussian": ".noise",
    "BeamMixture": ".noise", "rts_smooth": ".estimators.smoother",
    "ParticleFuser": ".estimators.particle", "decisions": ".decisions",
}

__all__ = sorted(["RangefuseError", "ConfigError", "LogFormatError", "InputError",
                  "CalibrationError", "speed_of_sound", "echo_range", *_LAZY])


def __getattr__(name):
    if name in _LAZY:
        mod = _import(_LAZY[name], __name__)
        return mod if name == "decisions" else getattr(mod, name)
    raise AttributeError(f"module 'fusion' has no attribute {name!r}")


def __dir__():
    return __all__
