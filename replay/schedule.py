"""``rangefuse schedule``: a firing cycle that keeps a rig's echo rangers from hearing
each other."""
from __future__ import annotations

import argparse
import math
import textwrap

from fusion.errors import InputError
from fusion.rig import Rig
from fusion.screening import _T_MAX_C, _T_MIN_C, safe_cycle_s

from .cli import SAFETY

__all__ = ["firing_plan", "register"]


def _num(x) -> str:
    return f"{x:g}" if isinstance(x, (int, float)) else repr(x)


_MARGIN_MAX = 10.0


def firing_plan(rig: Rig, temp_min_c: float = -10.0, margin: float = 1.1):
    """A round-robin plan for the rig's echo rangers.

    Each unit gets a slot as long as the slowest unit's echo window (ring-down plus the
    round trip to its maximum range at the lowest expected air temperature, plus a
    margin for late multipath echoes). Returns a dict with

    - ``slot_s``: the time between consecutive pings, which is the rig's
      ``[schedule] cycle_s`` (docs/rig.md);
    - ``round_s``: one full round, every unit firing once (``slot_s`` times the number
      of units);
    - ``rate_hz``: readings per second of each unit (``1 / round_s``);
    - ``order``: ``(name, offset_s)`` of each unit within the round.

    Raises `InputError` for a `temp_min_c` outside -60..90 degC or a `margin` outside
    1..10.
    """
    # The air temperatures the speed-of-sound model is used over (fusion.screening takes
    # samples outside them for failed ones); a margin below 1 would let a late echo
    # reach the next unit's window.
    if not (isinstance(temp_min_c, (int, float)) and _T_MIN_C <= temp_min_c <= _T_MAX_C):
        raise InputError(f"expected the lowest air temperature in {_T_MIN_C:g}..{_T_MAX_C:g} "
                         f"degC, got {_num(temp_min_c)}", field="--temp-min")
    if not (isinstance(margin, (int, float)) and math.isfinite(margin) and margin >= 1.0):
        raise InputError(f"expected a factor >= 1 (1.1 leaves 10 % for late echoes), got "
                         f"{_num(margin)}; below 1 the next unit fires before an echo can return",
                         field="--margin")
    if margin > _MARGIN_MAX:
        # a slot ten times the longest echo's round trip is already slower than any rig
        # needs: a larger factor is a slip (an extra digit), not a wish
        raise InputError(f"expected a factor of at most {_MARGIN_MAX:g} (1.1 leaves 10 % for "
                         f"late echoes), got {_num(margin)}", field="--margin")
    order = list(rig.schedule.order) or list(rig.echo_names)
    if not order:
        return {"order": [], "slot_s": 0.0, "round_s": 0.0, "rate_hz": 0.0}
    ranges = [rig.sensors[n].max_range_m for n in order]
    slot = safe_cycle_s(ranges, rig.schedule.ring_down_s, temp_min_c, margin)
    round_s = slot * len(order)
    return {"order": [(n, i * slot) for i, n in enumerate(order)], "slot_s": slot,
            "round_s": round_s, "rate_hz": 1.0 / round_s}


def register(sub):
    p = sub.add_parser(
        "schedule", help="compute a crosstalk-free firing cycle for the echo rangers",
        description="Compute a round-robin firing schedule for a rig's echo rangers:\n"
                    "every unit's echo window closes before the next unit fires.",
        epilog="The printed cycle_s is the rig's [schedule] cycle_s: the time between "
               "consecutive\npings (one slot), not the full round in which every unit "
               "fires once.\n\n"
               "example:\n  rangefuse schedule datasets/shelf-pass.rig.toml --temp-min -20",
        formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("rig", metavar="RIG", help="rig description (TOML)")
    p.add_argument("--temp-min", type=float, default=-10.0, metavar="C",
                   help="lowest air temperature expected, degC (slowest sound; default -10)")
    p.add_argument("--margin", type=float, default=1.1,
                   help="factor on the echo window for late multipath echoes (default 1.1)")
    p.set_defaults(func=_main)


def _main(args) -> int:
    rig = Rig.load(args.rig)
    plan = firing_plan(rig, args.temp_min, args.margin)
    if not plan["order"]:
        print(f"{args.rig}: the rig has no echo rangers; nothing to schedule")
        return 0
    n = len(plan["order"])
    units = "echo ranger" if n == 1 else "echo rangers"
    print(f"round robin for {n} {units} (sound at {args.temp_min:g} degC, "
          f"margin {args.margin:g}):")
    print(f"  time between consecutive pings (one slot; the rig's cycle_s): "
          f"{1e3 * plan['slot_s']:.2f} ms")
    if n == 1:
        print(f"  the unit fires once per slot: {plan['rate_hz']:.1f} readings/s")
    else:
        print(f"  full round, each of the {n} units firing once: {1e3 * plan['round_s']:.2f} ms, "
              f"so {plan['rate_hz']:.1f} readings/s per unit")
    for name, off in plan["order"]:
        print(f"  {name:<16} fires at +{1e3 * off:7.2f} ms   (max range "
              f"{rig.sensors[name].max_range_m:g} m)")
    names = ", ".join(f'"{name}"' for name, _ in plan["order"])
    # rounded up to the microsecond, so the pasted value is never below the safe slot
    cycle_us = math.ceil(plan["slot_s"] * 1e6 - 1e-6)
    caution = "".join(f"# {line}\n" for line in textwrap.wrap(SAFETY, 86))
    print("\nrig TOML:\n" + caution + "[schedule]\nmode = \"round_robin\"\n"
          f"cycle_s = {cycle_us / 1e6:.6f}   # time between consecutive pings (one slot)\n"
          f"order = [{names}]")
    return 0
