"""The IR triangulation ranger as a sensor: raw output to range candidates.

The voltage curve lives in `fusion.sensors.triangulation`; this module adds what a unit
on a robot needs besides: its ADC, its noise, its sample-and-hold cycle and its mount.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from functools import cached_property

import numpy as np
from numba import njit

from .. import decisions as D
from ..errors import ConfigError
from ..measurements import Measurements
from .adc import adc_quantisation_sigma_v, counts_to_volts
from .triangulation import TriangulationCurve

__all__ = ["TriangulationRanger"]

_KEYS = {"name", "kind", "direction", "output", "adc_bits", "adc_vref", "volts_sigma",
         "hold_s", "offset_m", "latency_s", "near_min_m", "gain_sigma", "curve"}


@dataclass(frozen=True)
class TriangulationRanger:
    """One IR triangulation ranger.

    Parameters
    ----------
    name, direction : str
        Sensor name and the rig direction it faces.
    curve : TriangulationCurve
        Voltage versus range of this unit.
    output : {"counts", "volts"}
        What the log holds: ADC counts (decoded with `adc_bits`, `adc_vref`) or volts.
    volts_sigma : float
        Output noise of the unit, volts (one sigma, before the ADC).
    hold_s : float
        The unit's internal measurement cycle: it holds its output in between, so a host
        sampling faster sees one measurement several times (0 = unknown/none).
    offset_m : float
        Mount offset along the measuring axis: range from the direction's reference point
        equals the sensor's range plus `offset_m`.
    latency_s : float
        Time from the measurement to the reading's timestamp.
    near_min_m : float
        Smallest near-side range that is physically possible (housing, window).
    gain_sigma : float
        Relative spread of the output with target reflectivity and angle (a
        proportional voltage term, 1 sigma); 0 for an ideal unit.
    """

    name: str
    direction: str
    curve: TriangulationCurve
    output: str = "counts"
    adc_bits: int = 10
    adc_vref: float = 5.0
    volts_sigma: float = 0.01
    hold_s: float = 0.0
    offset_m: float = 0.0
    latency_s: float = 0.0
    near_min_m: float = 0.01
    gain_sigma: float = 0.0
    kind: str = field(default="triangulation", init=False)

    # --- description -------------------------------------------------------------
    @classmethod
    def from_dict(cls, d: dict, where: str = "") -> "TriangulationRanger":
        name = d.get("name", "?")
        unknown = set(d) - _KEYS
        if unknown:
            key = sorted(unknown)[0]
            raise ConfigError(f"unknown key {key!r}; expected one of "
                              f"{', '.join(sorted(_KEYS))}", file=where,
                              field=f"sensor.{name}.{key}")
        if "curve" not in d:
            raise ConfigError("an IR triangulation ranger needs a [sensor.curve] table",
                              file=where, field=f"sensor.{name}.curve")
        try:
            curve = TriangulationCurve.from_dict(d["curve"], where=where)
        except ConfigError as exc:  # name the table the key is in, not just the key
            sub = f".{exc.field}" if exc.field and exc.field != "curve" else ""
            raise ConfigError(exc.message, file=exc.file, field=f"sensor.{name}.curve{sub}",
                              row=exc.row) from None
        kw = {}
        for key, typ in (("output", str), ("adc_bits", int), ("adc_vref", float),
                         ("volts_sigma", float), ("hold_s", float), ("offset_m", float),
                         ("latency_s", float), ("near_min_m", float), ("gain_sigma", float)):
            if key in d:
                kw[key] = _typed(d[key], typ, where, f"sensor.{name}.{key}")
        obj = cls(name=_typed(d.get("name"), str, where, "sensor.name"),
                  direction=_typed(d.get("direction"), str, where, f"sensor.{name}.direction"),
                  curve=curve, **kw)
        obj._validate(where)
        return obj

    def _validate(self, where):
        f = f"sensor.{self.name}"
        if self.output not in ("counts", "volts"):
            raise ConfigError(f"output must be 'counts' or 'volts', got {self.output!r}",
                              file=where, field=f + ".output")
        if not 1 <= self.adc_bits <= 24:
            raise ConfigError("adc_bits must be 1..24", file=where, field=f + ".adc_bits")
        for key in ("adc_vref", "volts_sigma"):
            v = getattr(self, key)
            if not (np.isfinite(v) and v > 0):
                raise ConfigError(f"{key} must be a positive number, got {v}", file=where,
                                  field=f"{f}.{key}")
        for key in ("hold_s", "latency_s", "near_min_m", "gain_sigma"):
            v = getattr(self, key)
            if not (np.isfinite(v) and v >= 0):
                raise ConfigError(f"{key} must be >= 0, got {v}", file=where, field=f"{f}.{key}")

    def to_dict(self) -> dict:
        return {"name": self.name, "kind": self.kind, "direction": self.direction,
                "output": self.output, "adc_bits": self.adc_bits, "adc_vref": self.adc_vref,
                "volts_sigma": self.volts_sigma, "hold_s": self.hold_s,
                "offset_m": self.offset_m, "latency_s": self.latency_s,
                "near_min_m": self.near_min_m, "gain_sigma": self.gain_sigma,
                "curve": self.curve.to_dict()}

    # --- model ---------------------------------------------------------------------
    def to_volts(self, raw) -> np.ndarray:
        raw = np.asarray(raw, dtype=float)
        if self.output == "counts":
            return counts_to_volts(raw, self.adc_bits, self.adc_vref)
        return raw

    @property
    def total_volts_sigma(self) -> float:
        """Output noise plus ADC quantisation (LSB/sqrt(12)), volts."""
        q = adc_quantisation_sigma_v(self.adc_bits, self.adc_vref) if self.output == "counts" else 0.0
        return float(np.hypot(self.volts_sigma, q))

    def decode(self, raw, t_s, temp_c=None, temp_sigma_c=None, relative_humidity=0.0,
               power_up_temp_c=None) -> Measurements:
        """Raw readings to near/far range candidates with sigma from the curve's slope.

        The far-side candidate goes in column 0, the near-side one in column 1. A reading
        below the voltage at the far end of the valid span is "no target" (out of range);
        one above the peak by more than three sigma is out of range; one within three sigma
        above the peak is placed at the peak. ADC counts take few distinct values, so they
        are decoded through a table computed once per unit.
        """
        raw = np.asarray(raw, dtype=float)
        t_s = np.asarray(t_s, dtype=float)
        if self.output == "counts":
            n = raw.shape[0]
            m = Measurements(t_s=np.empty(n), z_m=np.empty((n, 2)), sigma_m=np.empty((n, 2)),
                             code=np.empty(n, np.int8), flags=np.empty(n, np.int16),
                             tof_s=np.full(n, np.nan), raw_m=np.empty(n))
            _count_lookup(raw, np.broadcast_to(t_s, (n,)), self.latency_s, self.offset_m,
                          *self._count_table, m.t_s, m.z_m, m.sigma_m, m.code, m.flags, m.raw_m)
            return m
        z, sg, code, flags = self._candidates(raw)
        m = Measurements(t_s=t_s - self.latency_s, z_m=z, sigma_m=sg, code=code, flags=flags,
                         tof_s=np.full(raw.shape[0], np.nan), raw_m=z[:, 0] - self.offset_m)
        no_time = ~np.isfinite(t_s)
        m.code[no_time] = D.INVALID
        m.flags[no_time] = 0
        return m

    @cached_property
    def _count_table(self):
        # one row per ADC code, plus a last row for anything that is not a valid code
        top = 2 ** self.adc_bits - 1
        return self._candidates(np.append(np.arange(top + 1, dtype=float), np.nan))

    def _candidates(self, raw):
        n = raw.shape[0]
        z = np.full((n, 2), np.nan)
        sgm = np.full((n, 2), np.nan)
        code = np.zeros(n, np.int8)
        volts = self.to_volts(raw)
        bad = ~np.isfinite(raw) | (raw < 0)
        if self.output == "counts":
            bad |= raw > (2 ** self.adc_bits - 1)
        code[bad] = D.INVALID
        sv = self.total_volts_sigma
        c = self.curve
        vpk = c.peak_volts
        v = np.where(bad, np.nan, volts)
        above = v > vpk + 3 * sv
        near, far = c.ranges(np.minimum(v, vpk))
        no_target = v < c.volts(c.max_range_m) - 3 * sv
        # Beyond the valid span the far side is too flat to use, and "target beyond the
        # span" explains a low voltage far more often than a target in contact does.
        beyond = far > c.max_range_m
        near = np.where(near < self.near_min_m, np.nan, near)
        at_peak = v >= vpk
        far = np.where(at_peak, c.peak_range_m, far)
        near = np.where(at_peak, np.nan, near)
        out = (~bad) & (above | no_target | beyond | (np.isnan(far) & np.isnan(near)))
        code[out] = D.OUT_OF_RANGE
        # "nothing inside my span" is evidence against a track inside it (re-acquisition)
        flags = np.where(out & ~above & (no_target | beyond), D.FLAG_NO_TARGET, 0).astype(np.int16)
        ok = code == D.ACCEPTED
        # Reflectivity and angle of the target scale the return: a proportional term.
        sv = np.hypot(sv, self.gain_sigma * np.where(np.isfinite(v), v, 0.0))
        for col, r in ((0, far), (1, near)):
            r = np.where(ok, r, np.nan)
            with np.errstate(divide="ignore", invalid="ignore"):
                s = sv / np.abs(c.slope(np.where(np.isnan(r), c.peak_range_m, r)))
            # At the peak the slope vanishes: the reading says only "about the peak".
            s = np.minimum(s, max(c.max_range_m, 1.0))
            z[:, col] = r + self.offset_m
            sgm[:, col] = np.where(np.isnan(r), np.nan, s)
        return z, sgm, code, flags


_INVALID = D.INVALID


@njit(cache=True)
def _count_lookup(raw, t, latency, offset, z_tab, sg_tab, code_tab, flag_tab, t_out, z, sg,
                  code, flags, raw_m):
    """ADC counts through the per-code table (its last row: not a valid code), in one
    pass; a reading without a finite time is invalid."""
    top = z_tab.shape[0] - 2
    for i in range(raw.shape[0]):
        r = raw[i]
        k = top + 1
        if r >= 0 and r <= top and r == math.floor(r):  # False for NaN
            k = int(r)
        z[i, 0] = z_tab[k, 0]
        z[i, 1] = z_tab[k, 1]
        sg[i, 0] = sg_tab[k, 0]
        sg[i, 1] = sg_tab[k, 1]
        if math.isfinite(t[i]):
            code[i] = code_tab[k]
            flags[i] = flag_tab[k]
        else:
            code[i] = _INVALID
            flags[i] = 0
        raw_m[i] = z_tab[k, 0] - offset
        t_out[i] = t[i] - latency


def _typed(value, typ, where, fieldname):
    if typ is float and isinstance(value, int) and not isinstance(value, bool):
        value = float(value)
    if not isinstance(value, typ) or isinstance(value, bool) and typ is not bool:
        raise ConfigError(f"expected {typ.__name__}, got {value!r}", file=where, field=fieldname)
    return value
