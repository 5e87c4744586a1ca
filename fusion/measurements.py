"""The measurement batch: what a sensor model hands to the estimators.

A sensor model turns raw readings into range candidates with an uncertainty, and a
pre-screen code. Estimators see these, never the sensors.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from . import decisions as D

__all__ = ["Measurements"]


@dataclass(frozen=True)
class Measurements:
    """Range candidates for ``n`` readings of one sensor.

    Attributes
    ----------
    t_s : (n,) float64
        Time the range refers to (reading time minus the sensor latency), seconds.
    z_m : (n, 2) float64
        Range candidates from the direction's reference point (mount offset applied).
        Column 0 is the far-side (or only) candidate, column 1 the near-side candidate of
        an IR reading below the peak; NaN where there is no such candidate.
    sigma_m : (n, 2) float64
        Standard deviation of each candidate, metres.
    code : (n,) int8
        `fusion.decisions` code from screening; ``ACCEPTED`` means "go to the estimator".
    flags : (n,) int16
        `fusion.decisions` FLAG_* bits.
    tof_s : (n,) float64
        Echo round-trip time implied by the reading (NaN for IR rangers); used for
        crosstalk classification.
    raw_m : (n,) float64
        The sensor's own range before mount offset (NaN where none), for plots.
    """

    t_s: np.ndarray
    z_m: np.ndarray
    sigma_m: np.ndarray
    code: np.ndarray
    flags: np.ndarray
    tof_s: np.ndarray
    raw_m: np.ndarray

    @classmethod
    def empty(cls, n: int) -> "Measurements":
        return cls(t_s=np.zeros(n), z_m=np.full((n, 2), np.nan), sigma_m=np.full((n, 2), np.nan),
                   code=np.zeros(n, np.int8), flags=np.zeros(n, np.int16),
                   tof_s=np.full(n, np.nan), raw_m=np.full(n, np.nan))

    def __len__(self) -> int:
        return len(self.t_s)

    def rejected(self) -> np.ndarray:
        return self.code >= D.FIRST_REJECT
