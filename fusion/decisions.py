"""Decision codes: every reading in gets exactly one of these out.

Codes below `FIRST_REJECT` mean the reading was used by the estimator; the others say
why it was not. The numbers are part of the track-file format: never renumber.
"""
from __future__ import annotations

import numpy as np

__all__ = ["ACCEPTED", "AMBIGUOUS", "REACQUIRED", "FIRST_REJECT", "HELD", "DROPOUT",
           "OUT_OF_RANGE", "CROSSTALK", "GATED", "INVALID", "LATE", "UNKNOWN_SENSOR", "STUCK",
           "CLOCK_AHEAD",
           "NAMES", "name_of", "code_of", "is_accepted",
           "FLAG_TEMP_FALLBACK", "FLAG_CROSSTALK_SUSPECT", "FLAG_R_INFLATED", "FLAG_NO_TARGET",
           "FLAG_NAMES"]

ACCEPTED = 0        # fused
AMBIGUOUS = 1       # fused, two range candidates kept as separate hypotheses
REACQUIRED = 2      # fused after restarting a track that consistent readings contradicted
FIRST_REJECT = 3
HELD = 3            # a repeat of a sample the sensor was still holding (counted once)
DROPOUT = 4         # the sensor reported no echo / no target
OUT_OF_RANGE = 5    # outside the sensor's valid span (blanking, beyond maximum, above peak)
CROSSTALK = 6       # another echo ranger's ping, by ping timing or by gate
GATED = 7           # innovation beyond the chi-square gate
INVALID = 8         # NaN, infinite, negative time, malformed text frame
LATE = 9            # older than the estimator's time by more than the allowed lag
UNKNOWN_SENSOR = 10 # a sensor the rig does not describe
STUCK = 11          # one raw value for longer than the sensor's noise allows: output stuck
CLOCK_AHEAD = 12    # stamped ahead of every other sensor by a jump of its own clock

NAMES = ("accepted", "ambiguous", "reacquired", "held", "dropout", "out_of_range",
         "crosstalk", "gated", "invalid", "late", "unknown_sensor", "stuck", "clock_ahead")

# Bit flags that qualify a decision (several may be set).
FLAG_TEMP_FALLBACK = 1      # air temperature stale or missing: fallback value, widened sigma
FLAG_CROSSTALK_SUSPECT = 2  # another unit pinged inside this reading's listening window
FLAG_R_INFLATED = 4         # host samples faster than the sensor updates: R inflated
FLAG_NO_TARGET = 8          # IR ranger out of range low: nothing inside its valid span
FLAG_NAMES = {FLAG_TEMP_FALLBACK: "temp_fallback", FLAG_CROSSTALK_SUSPECT: "crosstalk_suspect",
              FLAG_R_INFLATED: "r_inflated", FLAG_NO_TARGET: "no_target"}


def name_of(code) -> str:
    return NAMES[int(code)]


def code_of(name: str) -> int:
    return NAMES.index(name)


def is_accepted(codes) -> np.ndarray:
    return np.asarray(codes) < FIRST_REJECT
