"""``rangefuse demo``: the main job on the bundled demo data."""
from __future__ import annotations

import argparse
import os

from fusion.errors import InputError

__all__ = ["demo_dir", "demo_log", "register"]

DEMO_LOGS = ("cold-store-dock", "shelf-pass", "tuning-run")


def demo_dir() -> str:
    """Folder holding the bundled demo logs (the checkout's ``datasets/`` or the
    installed copy)."""
    here = os.path.dirname(os.path.abspath(__file__))
    for cand in (os.path.join(here, "datasets"), os.path.join(os.path.dirname(here), "datasets")):
        if os.path.isfile(os.path.join(cand, DEMO_LOGS[0] + ".h5")):
            return cand
    try:
        from importlib.resources import files
        cand = str(files("replay.datasets"))
        if os.path.isfile(os.path.join(cand, DEMO_LOGS[0] + ".h5")):
            return cand
    except (ModuleNotFoundError, TypeError):
        pass
    raise InputError("the bundled demo logs are missing; regenerate them with "
                     "'python -m replay.simulate --regenerate datasets'", field="datasets")


def demo_log(name: str = DEMO_LOGS[0]) -> str:
    path = os.path.join(demo_dir(), name + ".h5")
    if not os.path.isfile(path):
        raise InputError(f"no demo log {name!r}; choose one of {', '.join(DEMO_LOGS)}",
                         field="--log")
    return path


def register(sub):
    p = sub.add_parser(
        "demo", help="replay a bundled demo log: track, figures and summary",
        description="The main job on the bundled demo data: replay a demo log through the "
                    "fusion core with smoothing, write the track file and figures, and "
                    "print the summary (RMSE against truth, rejections by reason, "
                    "ambiguity resolutions, NIS consistency).",
        epilog="example:\n  rangefuse demo --out demo-out\n  rangefuse demo --log shelf-pass",
        formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--out", default="rangefuse-demo", metavar="DIR",
                   help="folder for the outputs (default ./rangefuse-demo)")
    p.add_argument("--log", default=DEMO_LOGS[0], choices=DEMO_LOGS, help="which demo log")
    p.set_defaults(func=_main)


def _main(args) -> int:
    from .run import run
    from .plots import plot_diagnostics

    log = demo_log(args.log)
    if os.path.exists(args.out) and not os.path.isdir(args.out):
        raise InputError("--out must name a folder", file=args.out, field="--out")
    os.makedirs(args.out, exist_ok=True)
    track = os.path.join(args.out, args.log + ".track.h5")
    res = run(log, out=track, smooth=True)
    print(res.summary())
    fig = os.path.join(args.out, args.log + ".png")
    res.plot(fig)
    diag = os.path.join(args.out, args.log + ".diagnostics.png")
    plot_diagnostics(track, out=diag)
    print(f"\nwrote {track}\n      {fig}\n      {diag}")
    return 0
