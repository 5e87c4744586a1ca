"""Accuracy on the demo logs: fused against the best single ranger, branch choice,
crosstalk, good readings lost, and the honesty of sigma.

Each bundled log in ``datasets/`` is replayed with the rig embedded in it
(`replay.run.run`), and once more per sensor with a copy of the log that holds only that
sensor's readings (plus the air and the truth) and a rig reduced to that sensor, with the
same estimator settings: the fair single-ranger figure. From the fused run's track file
(one decision row per reading) and the simulator's per-reading labels:

RMSE by zone
    ``replay``'s figure: the filtered track (every row of the track file, one per fused
    reading) against truth, by the truth's zone in the full rig (near: below the IR
    peak; overlap; far: beyond the IR span), for the single rangers too.
    Fused is compared with the best single ranger in each zone (a single ranger with
    fewer than `MIN_ZONE_N` track rows in a zone does not compete there). The rows of
    different runs fall at different times (the fused track has a row at every fused
    reading of either sensor), so the comparison that decides the target is made on a
    common clock, paired: at every truth sample, the latest estimate carried forward at
    its rate (at most 1 s old), which is what a consumer of the track holds at that
    instant, over the samples where both the fused run and the single ranger hold one (a
    single ranger that has lost its track is not excused from samples fused must answer).
    A zone that only one ranger sees is reported but not judged: fusion has nothing to
    add there, and fused equals that ranger.
Near-zone branch
    IR readings labelled genuine and not decided ``held``, with two range candidates,
    whose truth (at the reading time minus latency) is below that unit's peak, while an
    echo reading is
    *valid*: the latest reading of an echo ranger facing the same direction, at most
    `VALID_ECHO_S` before, is labelled genuine by the simulator (a direct echo of the
    target). Correct = the fused reading took the near branch.
Crosstalk rejected
    Readings labelled crosstalk that were decided anything but accepted, ambiguous or
    reacquired. Judged on every labelled reading; printed beside it, not judged, for
    the spikes alone: the crosstalk readings more than 3 sigma of their own noise from
    the truth (a foreign sound arriving with the unit's own echo reads the true range).
Good readings rejected
    Readings labelled genuine decided anything but accepted, ambiguous or reacquired,
    not counting ``held`` (a genuine repeat of the unit's held output, counted once by
    design), over the genuine readings not decided held.
2-sigma coverage
    Fraction of fused track rows with ``|range - truth| <= 2 sigma``.

Nothing is tuned here: the logs are replayed with the rigs they carry.

Run: ``python bench/accuracy.py [--quick]`` (``--quick``: two logs). Figures only.
"""
from __future__ import annotations

import argparse
import glob
import json
import math
import os
import time

import h5py
import numpy as np

import _common as C
from fusion import decisions as D
from replay import metrics as M
from replay.logfile import SensorStream, open_log, write_log
from replay.run import run

MIN_ZONE_N = 100
VALID_ECHO_S = 0.25
GENUINE, CROSSTALK_LABEL = 0, 1


def _reduced_log(src, name, out_dir):
    """A copy of log `src` with only sensor `name` (and the environment and truth of its
    direction); returns ``(path, rig)``."""
    with open_log(src) as log:
        from fusion.rig import Rig
        rig = Rig.from_toml(log.rig_toml, where=src)
        s = rig.sensors[name]
        st = log.read_sensor(name)
        env = {}
        for e, info in log.environments.items():
            t, v = log.environment(e)
            env[e] = (info.quantity, t, v)
        truth = {s.direction: log.truth(s.direction)} if log.truth(s.direction) else None
    one = rig.replace(sensors={name: s}, directions=(s.direction,))
    path = os.path.join(out_dir, f"{os.path.basename(src)[:-3]}-{name}.h5")
    if os.path.exists(path):
        os.remove(path)
    write_log(path, one.to_toml(), [SensorStream(name, st.kind, st.output, st.t_s, st.raw,
                                                 st.ping_t_s, st.label)], env, truth,
              created_utc="2000-01-01T00:00:00+00:00")
    return path, one


def _track_errors(track_path, direction, truth, edges) -> dict:
    """Zone table (`replay.metrics.ErrorStats.table`) of a track file's filtered track
    against truth, zoned by `edges` (the full rig's: a rig reduced to an echo ranger has
    no IR peak or span to zone by)."""
    with h5py.File(track_path, "r") as f:
        g = f[f"track/{direction}"]
        t, r, sg = g["t_s"][:], g["range_m"][:], g["sigma_m"][:]
    tt, rr = truth
    ok = np.isfinite(tt) & np.isfinite(rr)
    tr = np.interp(t, tt[ok], rr[ok], left=np.nan, right=np.nan)
    st = M.ErrorStats()
    st.add(r - tr, sg, M.zone_of(tr, edges))
    return st.table()


def _clock_samples(track_path, direction, truth, edges, max_age_s=1.0):
    """The estimate a consumer holds at every truth sample: the latest track row, carried
    forward at its rate, if at most `max_age_s` old. Returns ``(error, zone)`` per truth
    sample (error NaN where the run holds no estimate)."""
    with h5py.File(track_path, "r") as f:
        g = f[f"track/{direction}"]
        t, r, v = g["t_s"][:], g["range_m"][:], g["rate_mps"][:]
    tt, rr = truth
    ok = np.isfinite(tt) & np.isfinite(rr)
    tt, rr = tt[ok], rr[ok]
    if not t.size:
        return np.full(tt.shape, np.nan), M.zone_of(rr, edges)
    j = np.searchsorted(t, tt, side="right") - 1
    jj = np.maximum(j, 0)
    age = tt - t[jj]
    use = (j >= 0) & (age <= max_age_s)
    return np.where(use, r[jj] + v[jj] * age - rr, np.nan), M.zone_of(rr, edges)


def _paired(err_a, err_b, zone, z):
    """RMSE of two runs over the truth samples of zone `z` where both hold an estimate."""
    m = (zone == z) & np.isfinite(err_a) & np.isfinite(err_b)
    n = int(m.sum())
    if n == 0:
        return None
    return {"n": n, "rmse_m": float(np.sqrt(np.mean(err_a[m] ** 2))),
            "single_rmse_m": float(np.sqrt(np.mean(err_b[m] ** 2)))}


def _decisions(track_path):
    with h5py.File(track_path, "r") as f:
        names = json.loads(f.attrs["sensor_names"])
        g = f["decisions"]
        cols = {k: g[k][:] for k in ("sensor", "row", "t_s", "direction", "decision", "branch",
                                     "z_far_m", "z_near_m", "sigma_far_m", "flags")}
    return names, cols


def _labels(src):
    with open_log(src) as log:
        out = {n: log.read_sensor(n).label for n in log.sensors}
        truth = {d: log.truth(d) for d in log.truth_directions}
    return out, truth


def evaluate(src, tmp):
    """All figures for one log; returns a dict."""
    base = os.path.basename(src)[:-3]
    fused_path = os.path.join(tmp, f"{base}.track.h5")
    if os.path.exists(fused_path):
        os.remove(fused_path)
    res = run(src, out=fused_path)
    rig = res.rig
    labels, truth = _labels(src)
    edges = {d: M.zone_edges(rig, d) for d in rig.directions}
    out = {"name": base, "n": res.n_readings, "dirs": {}, "seconds": res.seconds}
    # single rangers, zoned by the full rig's edges
    singles = {}
    for name in rig.sensors:
        d = rig.sensors[name].direction
        path, one = _reduced_log(src, name, tmp)
        tp = os.path.join(tmp, f"{base}-{name}.track.h5")
        if os.path.exists(tp):
            os.remove(tp)
        run(path, rig=one, out=tp)
        singles[name] = (_track_errors(tp, d, truth[d], edges[d]),
                         _clock_samples(tp, d, truth[d], edges[d]))
    for d in rig.directions:
        fused_rows = _track_errors(fused_path, d, truth[d], edges[d])
        f_err, zone = _clock_samples(fused_path, d, truth[d], edges[d])
        out["dirs"][d] = {"cover": fused_rows["all"]}
        mine = [s for s in singles if rig.sensors[s].direction == d]
        # replay's figure: every track row of each run (different instants per run)
        zones = {}
        for z in M.ZONES:
            cands = [(s, singles[s][0][z]) for s in mine if singles[s][0].get(z)
                     and singles[s][0][z]["n"] >= MIN_ZONE_N]
            best = min(cands, key=lambda c: c[1]["rmse_m"]) if cands else None
            zones[z] = {"fused": fused_rows.get(z), "best": best, "alone": len(cands) == 1,
                        "all": {s: singles[s][0].get(z) for s in mine}}
        out["dirs"][d]["zones"] = zones
        # common clock, paired: fused and each single ranger on the truth samples where
        # both hold an estimate; the best single ranger is the one with the lowest RMSE
        zones = {}
        for zi, z in enumerate(M.ZONES):
            pairs = {s: _paired(f_err, singles[s][1][0], zone, zi) for s in mine}
            cands = [(s, p) for s, p in pairs.items() if p and p["n"] >= MIN_ZONE_N]
            best = min(cands, key=lambda c: c[1]["single_rmse_m"]) if cands else None
            alone = len(cands) == 1
            fz = None if best is None else {"n": best[1]["n"], "rmse_m": best[1]["rmse_m"]}
            zones[z] = {"fused": fz, "alone": alone,
                        "best": None if best is None else
                        (best[0], {"n": best[1]["n"], "rmse_m": best[1]["single_rmse_m"]}),
                        "all": {s: None if not p else {"n": p["n"], "rmse_m": p["single_rmse_m"]}
                                for s, p in pairs.items()}}
        out["dirs"][d]["clock"] = zones

    # per-reading figures from the fused run's decisions and the simulator's labels
    names, dec = _decisions(fused_path)
    lab = np.full(dec["sensor"].size, -1, np.int64)
    for si, n in enumerate(names):
        m = dec["sensor"] == si
        if labels.get(n) is not None:
            lab[m] = labels[n][dec["row"][m]]
    code = dec["decision"].astype(np.int64)
    fused = code < D.FIRST_REJECT
    xt = lab == CROSSTALK_LABEL
    good = (lab == GENUINE) & (code != D.HELD)
    out["crosstalk"] = (int((xt & ~fused).sum()), int(xt.sum()))
    out["good_rejected"] = (int((good & ~fused).sum()), int(good.sum()))
    reasons = np.bincount(code[good & ~fused], minlength=len(D.NAMES))
    out["good_rejected_by"] = {D.NAMES[c]: int(reasons[c]) for c in range(len(D.NAMES))
                               if reasons[c]}
    reasons = np.bincount(code[xt & fused], minlength=len(D.NAMES))
    out["crosstalk_fused_as"] = {D.NAMES[c]: int(reasons[c]) for c in range(len(D.NAMES))
                                 if reasons[c]}
    # diagnostic: how many of the fused crosstalk readings screening had flagged suspect
    out["crosstalk_fused_flagged"] = int((xt & fused & ((dec["flags"] & D.FLAG_CROSSTALK_SUSPECT)
                                                        != 0)).sum())
    # diagnostic: how far the fused crosstalk readings lay from truth (a crosstalk echo
    # can land on the true range; then no screen can tell it and it does no harm)
    err = []
    for i in np.flatnonzero(xt & fused):
        s = rig.sensors[names[dec["sensor"][i]]]
        if truth.get(s.direction) is not None:
            tr = np.interp(dec["t_s"][i] - s.latency_s, *truth[s.direction])
            err.append(abs(dec["z_far_m"][i] - tr))
    out["crosstalk_fused_err_mm"] = (1e3 * float(np.median(err)), 1e3 * float(np.max(err))) \
        if err else None
    # Of the crosstalk readings, the spikes: those more than 3 sigma of the reading's own
    # noise from the truth (no decoded range or no truth counts as a spike). The others
    # read the target's range within the sensor's noise (a foreign sound that arrived
    # with the unit's own echo): no screen can tell them from a good reading.
    near = np.zeros(xt.shape, bool)
    for i in np.flatnonzero(xt):
        s = rig.sensors[names[dec["sensor"][i]]]
        if truth.get(s.direction) is not None:
            tr = np.interp(dec["t_s"][i] - s.latency_s, *truth[s.direction])
            near[i] = abs(dec["z_far_m"][i] - tr) <= 3.0 * dec["sigma_far_m"][i]
    spike = xt & ~near
    out["crosstalk_spikes"] = (int((spike & ~fused).sum()), int(spike.sum()))

    # near-zone branch
    br = {"n_cand": 0, "n_valid": 0, "fused": 0, "correct": 0, "rejected": 0,
          "rejected_by": np.zeros(len(D.NAMES), np.int64)}
    for si, n in enumerate(names):
        s = rig.sensors[n]
        if s.kind != "triangulation" or truth.get(s.direction) is None:
            continue
        # genuine new measurements (a held repeat is counted once, by design)
        m = ((dec["sensor"] == si) & (lab == GENUINE) & (code != D.HELD)
             & np.isfinite(dec["z_far_m"]) & np.isfinite(dec["z_near_m"]))
        t_meas = dec["t_s"][m] - s.latency_s
        tr = np.interp(t_meas, *truth[s.direction], left=np.nan, right=np.nan)
        below = tr < s.curve.peak_range_m + s.offset_m
        # the latest echo reading of this direction before each IR reading
        echo_idx = [ei for ei, en in enumerate(names) if rig.sensors[en].kind == "echo"
                    and rig.sensors[en].direction == s.direction]
        em = np.isin(dec["sensor"], echo_idx)
        et, el = dec["t_s"][em], lab[em]
        o = np.argsort(et, kind="stable")
        et, el = et[o], el[o]
        j = np.searchsorted(et, dec["t_s"][m], side="right") - 1
        have = j >= 0
        jj = np.maximum(j, 0)
        valid = have & (dec["t_s"][m] - et[jj] <= VALID_ECHO_S) & (el[jj] == GENUINE) \
            if et.size else np.zeros(m.sum(), bool)
        sel = below & valid
        br["n_cand"] += int(below.sum())
        br["n_valid"] += int(sel.sum())
        f_ = fused[m][sel] & (dec["branch"][m][sel] >= 0)
        br["fused"] += int(f_.sum())
        br["correct"] += int((f_ & (dec["branch"][m][sel] == 1)).sum())
        br["rejected"] += int((~fused[m][sel]).sum())
        br["rejected_by"] += np.bincount(code[m][sel][~fused[m][sel]], minlength=len(D.NAMES))
    br["rejected_by"] = {D.NAMES[c]: int(k) for c, k in enumerate(br["rejected_by"]) if k}
    out["branch"] = br
    return out


def _mm(row):
    return "-" if not row else f"{1e3 * row['rmse_m']:.2f} ({row['n']})"


def _pct(a, b):
    return math.nan if b == 0 else 100.0 * a / b


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="only the two shortest demo logs")
    args = ap.parse_args(argv)
    C.header("Accuracy on the demo logs", args.quick)
    logs = sorted(glob.glob(os.path.join(C.REPO, "datasets", "*.h5")))
    if args.quick:
        logs = [p for p in logs if "tuning-run" not in p]
    tmp = C.workdir("accuracy")
    t0 = time.perf_counter()
    results = [evaluate(p, tmp) for p in logs]
    print(f"{len(results)} logs, each replayed fused and once per sensor alone, in "
          f"{time.perf_counter() - t0:.1f} s")
    print()

    verdicts = {}
    for key, title in (
            ("zones", "RMSE mm (n) by zone, replay's figure (every track row): fused against "
                      "each single ranger replayed alone"),
            ("clock", "RMSE mm (n) by zone on a common clock, paired (the truth samples where "
                      "both fused and the single ranger hold an estimate, carried forward at "
                      "its rate from at most 1 s before; fused's figure is against the best "
                      "single ranger's samples)")):
        zone_ok, rows = [], []
        for r in results:
            for d, dd in r["dirs"].items():
                for z in M.ZONES:
                    zz = dd[key][z]
                    f, best = zz["fused"], zz["best"]
                    if not f:
                        continue
                    singles = "; ".join(f"{s} {_mm(v)}" for s, v in zz["all"].items())
                    if best is None:
                        verdict = "n/a (no single ranger with enough rows)"
                    elif zz.get("alone"):
                        # one ranger sees this zone: fusion has nothing to add there
                        rel = 100 * (f["rmse_m"] / best[1]["rmse_m"] - 1)
                        verdict = f"n/a, only {best[0]} sees it ({rel:+.1f} %)"
                    else:
                        ok = f["rmse_m"] < best[1]["rmse_m"]
                        zone_ok.append(ok)
                        rel = 100 * (f["rmse_m"] / best[1]["rmse_m"] - 1)
                        verdict = f"{C.verdict(ok)} vs {best[0]} ({rel:+.1f} %)"
                    rows.append([f"{r['name']}/{d}", z, _mm(f), singles, verdict])
        verdicts[key] = zone_ok
        print(title)
        print(C.table(rows, ["log/direction", "zone", "fused", "single rangers",
                             "fused < best"]))
        print()
    zone_ok = verdicts["zones"]

    rows = []
    tot = {"branch": [0, 0, 0, 0, 0], "xt": [0, 0], "spike": [0, 0], "good": [0, 0],
           "cover": [0.0, 0]}
    for r in results:
        b = r["branch"]
        xr, xn = r["crosstalk"]
        gr, gn = r["good_rejected"]
        cn = sum(dd["cover"]["n"] for dd in r["dirs"].values() if dd["cover"])
        cc = sum(dd["cover"]["cover2"] * dd["cover"]["n"] for dd in r["dirs"].values()
                 if dd["cover"])
        for k, v in zip(range(5), (b["n_cand"], b["n_valid"], b["fused"], b["correct"],
                                   b["rejected"])):
            tot["branch"][k] += v
        tot["xt"][0] += xr
        tot["xt"][1] += xn
        tot["spike"][0] += r["crosstalk_spikes"][0]
        tot["spike"][1] += r["crosstalk_spikes"][1]
        tot["good"][0] += gr
        tot["good"][1] += gn
        tot["cover"][0] += cc
        tot["cover"][1] += cn
        rows.append([r["name"],
                     f"{b['correct']}/{b['fused']} ({_pct(b['correct'], b['fused']):.2f} %)",
                     f"{b['n_valid']} of {b['n_cand']}; {b['rejected']} rejected",
                     f"{xr}/{xn} ({_pct(xr, xn):.2f} %)", f"{gr}/{gn} ({_pct(gr, gn):.3f} %)",
                     f"{_pct(cc, cn):.1f} %"])
    print(f"per log (valid echo: the latest echo reading of the direction, at most "
          f"{VALID_ECHO_S:g} s before the IR reading, is labelled genuine):")
    print(C.table(rows, ["log", "near branch correct", "IR readings with a valid echo",
                         "crosstalk rejected", "good rejected", "2-sigma cover"]))
    for r in results:
        if r["good_rejected_by"] or r["crosstalk_fused_as"] or r["branch"]["rejected_by"]:
            print(f"  {r['name']}: good readings rejected as {r['good_rejected_by'] or '-'}; "
                  f"crosstalk fused as {r['crosstalk_fused_as'] or '-'} "
                  f"({r['crosstalk_fused_flagged']} of them flagged suspect"
                  + ("; |reading - truth| median {:.1f} mm, max {:.1f} mm".format(
                      *r["crosstalk_fused_err_mm"]) if r["crosstalk_fused_err_mm"] else "")
                  + "); near-zone IR "
                  f"readings with a valid echo rejected as {r['branch']['rejected_by'] or '-'}")
    print()

    bt = tot["branch"]
    branch = _pct(bt[3], bt[2])
    xt = _pct(*tot["xt"])
    good = _pct(*tot["good"])
    cover = _pct(*tot["cover"])
    print("targets (all logs pooled):")
    print(C.table([
        ["fused RMSE < best single ranger, every zone two see",
         f"{sum(verdicts['clock'])} of {len(verdicts['clock'])} zones",
         C.verdict(all(verdicts["clock"]) and bool(verdicts["clock"]))],
        ["  (every track row, unpaired; not judged)", f"{sum(zone_ok)} of {len(zone_ok)} zones",
         ""],
        ["near-zone branch correct >= 99.5 %", f"{branch:.2f} % ({bt[3]}/{bt[2]})",
         C.verdict(branch >= 99.5) if bt[2] else "n/a"],
        ["crosstalk rejected >= 99 %", f"{xt:.2f} % ({tot['xt'][0]}/{tot['xt'][1]})",
         C.verdict(xt >= 99.0) if tot["xt"][1] else "n/a"],
        ["  (spikes only, |reading - truth| > 3 sigma; not judged)",
         f"{_pct(*tot['spike']):.2f} % ({tot['spike'][0]}/{tot['spike'][1]})", ""],
        ["good readings rejected <= 0.5 %", f"{good:.3f} % ({tot['good'][0]}/{tot['good'][1]})",
         C.verdict(good <= 0.5)],
        ["2-sigma coverage 93-97 %", f"{cover:.1f} %", C.verdict(93.0 <= cover <= 97.0)],
    ], ["target", "measured", "verdict"]))


if __name__ == "__main__":
    main()
