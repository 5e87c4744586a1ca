"""Small example inputs for the commands that start from a user's own files.

``python -m replay.examples datasets/examples`` writes them (the same bytes every time):

``ir-front.pairs.csv``
    A bench calibration of the cold-store-dock rig's IR triangulation ranger: a target
    set at 36 ranges from 0.03 m to 0.80 m, the voltage read once at each, with the
    unit's own noise (``volts_sigma``). For ``rangefuse calibrate``.
``dock-approach.csv`` with ``dock-approach.rig.toml``
    40 s to 55 s of the cold-store-dock demo log (the cart closing from 1.2 m to 0.55 m,
    inside both rangers' spans) written as the text log a logger
    that cannot write HDF5 would produce (docs/log-format.md, "The same log as CSV"),
    air temperature and ground truth included. For ``rangefuse import``.

All of it is made from the demo scenarios of this project; none of it is measured.
"""
from __future__ import annotations

import argparse
import io
import os
import sys

import numpy as np

from fusion.errors import RangefuseError
from fusion.rig import Rig

from ._io import write_atomic
from .demo import demo_log
from .logfile import open_log

__all__ = ["write_examples", "EXAMPLES"]

EXAMPLES = ("ir-front.pairs.csv", "dock-approach.csv", "dock-approach.rig.toml")
_FROM_S, _TO_S = 40.0, 55.0
_SEED = 2024


def _pairs_csv(rig: Rig) -> str:
    ir = rig.sensors["ir_front"]
    rng = np.random.default_rng(_SEED)
    r = np.round(np.linspace(0.03, 0.80, 36), 4)
    v = ir.curve.volts(r - ir.offset_m) + ir.volts_sigma * rng.standard_normal(r.size)
    out = io.StringIO()
    out.write("range_m,volts\n")
    for a, b in zip(r, v):
        out.write(f"{a:.4f},{b:.4f}\n")
    return out.getvalue()


def _readings_csv(log, rig: Rig) -> str:
    rows = []  # (t, order, text)
    for k, name in enumerate(log.sensors):
        s = log.read_sensor(name)
        keep = (s.t_s >= _FROM_S) & (s.t_s < _TO_S)
        ping = s.ping_t_s if s.ping_t_s is not None else None
        for i in np.flatnonzero(keep):
            raw = s.raw[i]
            if not isinstance(raw, str):
                raw = str(int(raw)) if float(raw).is_integer() else repr(float(raw))
            p = "" if ping is None or not np.isfinite(ping[i]) else repr(float(ping[i]))
            rows.append((float(s.t_s[i]), k, f"{float(s.t_s[i])!r},{name},{raw},{p}"))
    for stream in (rig.air.stream, rig.air.humidity_stream):
        if stream and stream in log.environments:
            t, v = log.environment(stream)
            m = (t >= _FROM_S - 1.0) & (t < _TO_S)  # a sample before the first reading
            for a, b in zip(t[m], v[m]):
                rows.append((float(a), -1, f"{float(a)!r},{stream},{float(b)!r},"))
    for d in log.truth_directions:
        t, r = log.truth(d)
        m = (t >= _FROM_S) & (t < _TO_S)
        for a, b in zip(t[m], r[m]):
            rows.append((float(a), 99, f"{float(a)!r},truth.{d},{float(b)!r},"))
    rows.sort(key=lambda x: (x[0], x[1]))
    return "t_s,sensor,raw,ping_t_s\n" + "".join(text + "\n" for _t, _k, text in rows)


def write_examples(folder) -> list:
    """Write the example files into `folder` (created if needed); returns their paths."""
    folder = os.fspath(folder)
    os.makedirs(folder, exist_ok=True)
    with open_log(demo_log("cold-store-dock")) as log:
        rig_toml = log.rig_toml
        rig = Rig.from_toml(rig_toml, where="cold-store-dock.h5:/rig")
        texts = {"ir-front.pairs.csv": _pairs_csv(rig),
                 "dock-approach.csv": _readings_csv(log, rig),
                 "dock-approach.rig.toml": rig_toml}
    paths = []
    for name in EXAMPLES:
        path = os.path.join(folder, name)
        write_atomic(path, texts[name])
        paths.append(path)
    return paths


def main(argv=None) -> int:
    p = argparse.ArgumentParser(prog="python -m replay.examples",
                                description=__doc__.splitlines()[0])
    p.add_argument("folder", help="where to write them (the checkout's datasets/examples)")
    args = p.parse_args(argv)
    try:
        for path in write_examples(args.folder):
            print(f"{path}: {os.path.getsize(path)} bytes")
    except RangefuseError as exc:
        print(f"examples: error: {exc.one_line()}", file=sys.stderr)
        return 2
    return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
