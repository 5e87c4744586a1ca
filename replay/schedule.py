"""``rangefuse schedule``: a firing cycle that keeps a rig's echo rangers from hearing
each other."""
from __future__ import annotations

import argparse

from fusion.rig import Rig
from fusion.screening import safe_cycle_s

__all__ = ["firing_plan", "register"]


def firing_plan(rig: Rig, temp_min_c: float = -10.0, margin: float = 1.1):
    """A round-robin plan for the rig's echo rangers.

    Each unit gets a slot as long as the slowest unit's echo window (ring-down plus the
    round trip to its maximum range at the lowest expected air temperature, plus a
    margin for late multipath echoes). Returns a dict with ``slot_s``, ``cycle_s`` (one
    full round), ``rate_hz`` per unit and the ``order`` with each unit's offset.
    """
    order = list(rig.schedule.order) or list(rig.echo_names)
    if not order:
        return {"order": [], "slot_s": 0.0, "cycle_s": 0.0, "rate_hz": 0.0}
    ranges = [rig.sensors[n].max_range_m for n in order]
    slot = safe_cycle_s(ranges, rig.schedule.ring_down_s, temp_min_c, margin)
    cycle = slot * len(order)
    return {"order": [(n, i * slot) for i, n in enumerate(order)], "slot_s": slot,
            "cycle_s": cycle, "rate_hz": 1.0 / cycle}


def register(sub):
    p = sub.add_parser(
        "schedule", help="compute a crosstalk-free firing cycle for the echo rangers",
        description="Compute a round-robin firing schedule for a rig's echo rangers: "
                    "every unit's echo window closes before the next unit fires.",
        epilog="example:\n  rangefuse schedule datasets/shelf-pass.rig.toml --temp-min -20",
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
    print(f"round robin for {len(plan['order'])} echo rangers (sound at {args.temp_min:g} degC, "
          f"margin {args.margin:g}):")
    print(f"  slot {1e3 * plan['slot_s']:.2f} ms, full cycle {1e3 * plan['cycle_s']:.2f} ms, "
          f"{plan['rate_hz']:.1f} readings/s per unit")
    for name, off in plan["order"]:
        print(f"  {name:<16} fires at +{1e3 * off:7.2f} ms   (max range "
              f"{rig.sensors[name].max_range_m:g} m)")
    print("\nrig TOML:\n[schedule]\nmode = \"round_robin\"\n"
          f"cycle_s = {plan['slot_s']:.6f}\norder = [{', '.join(repr(n) for n, _ in plan['order'])}]"
          .replace("'", '"'))
    return 0
