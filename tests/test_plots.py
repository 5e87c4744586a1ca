"""Figures (replay/plots.py), the `rangefuse plot` command and CSV export (replay/export.py).

Each test replays a small log written here (an IR triangulation ranger and an echo ranger
facing front, an echo ranger facing left, truth for both directions, an air-temperature
stream) through the real replay, then checks the figures and tables against the track
file's own rows and against outside references named beside each check.
"""
import csv
import json
import os
import re

import h5py
import numpy as np
import pytest
from matplotlib.collections import PolyCollection
from matplotlib.lines import Line2D
from scipy.stats import chi2, norm

from fusion import decisions as D
from fusion.errors import InputError, LogFormatError
from fusion.rig import Rig
from replay import cli, export, plots
from replay.export import track_to_csv
from replay.logfile import SensorStream, write_log
from replay.plots import plot_convergence, plot_diagnostics, plot_track
from replay.run import run

# A curve of the usual 10-80 cm IR unit shape (saturating inverse; values from docs/rig.md).
CURVE = {"model": "saturating-inverse", "A_vm": 0.70468, "b_m": 0.069785, "lam_m": 0.10868,
         "p": 1.90063, "offset_v": 0.0, "min_range_m": 0.10, "max_range_m": 0.80}
RIG = {"name": "plot-test", "air": {"stream": "air"},
       "sensor": [
           {"name": "ir_front", "kind": "triangulation", "direction": "front",
            "output": "volts", "volts_sigma": 0.01, "curve": CURVE},
           {"name": "echo_front", "kind": "echo", "direction": "front", "output": "echo_time",
            "min_range_m": 0.05, "max_range_m": 4.0},
           {"name": "echo_left", "kind": "echo", "direction": "left", "output": "echo_time",
            "min_range_m": 0.05, "max_range_m": 4.0}]}
ECHO_ONLY = {"name": "t", "sensor": [{"name": "e1", "kind": "echo", "direction": "front",
                                      "output": "echo_time", "min_range_m": 0.05,
                                      "max_range_m": 4.0}]}
C_20C = 343.2   # speed of sound in dry air at 20 degC, m/s (Cramer 1993, from memory)
PNG_MAGIC = b"\x89PNG\r\n\x1a\n"   # PNG signature (ISO/IEC 15948:2004 §5.2, from memory)
# Indices of the injected echo_front readings (see _make_log)
DROPOUT_ROWS, INVALID_ROWS, BLANKED_ROWS = (30, 31), (45,), (52, 53)


def _make_log(path, duration_s=20.0, seed=0, truth=True, spikes=True):
    rig = Rig.from_dict(RIG)
    rng = np.random.default_rng(seed)
    tt = np.arange(0.0, duration_s, 0.005)
    front = 0.5 + 0.35 * np.sin(2 * np.pi * tt / 10.0)      # 0.15 .. 0.85 m
    left = 1.5 + 0.4 * np.cos(2 * np.pi * tt / 12.0)
    te = np.arange(0.01, duration_s, 0.05)
    et = 2 * np.interp(te, tt, front) / C_20C + rng.normal(0, 1.5e-5, te.size)
    if spikes:
        et[rng.random(te.size) < 0.03] = 2 * 0.5 / C_20C       # a foreign echo at 0.5 m
    et[list(DROPOUT_ROWS)] = 0.0                # no echo (docs/rig.md: raw 0 -> dropout)
    et[list(INVALID_ROWS)] = np.nan             # NaN raw -> invalid (docs/rig.md)
    et[list(BLANKED_ROWS)] = 2 * 0.02 / C_20C   # inside the 0.05 m blanking -> out of range
    ti = np.arange(0.0, duration_s, 0.02)
    vi = rig.sensors["ir_front"].curve.volts(np.interp(ti, tt, front))
    vi = vi + rng.normal(0, 0.01, ti.size)
    tl = np.arange(0.02, duration_s, 0.06)
    el = 2 * np.interp(tl, tt, left) / C_20C + rng.normal(0, 1.5e-5, tl.size)
    streams = [SensorStream("ir_front", "triangulation", "volts", ti, vi),
               SensorStream("echo_front", "echo", "echo_time", te, et),
               SensorStream("echo_left", "echo", "echo_time", tl, el)]
    ta = np.arange(0.0, duration_s, 1.0)
    write_log(path, rig.to_toml(), streams, {"air": ("air_temperature", ta, 20.0 + 0.05 * ta)},
              {"front": (tt, front), "left": (tt, left)} if truth else None,
              created_utc="2024-01-01T00:00:00+00:00")
    return {s.name: len(s) for s in streams}


@pytest.fixture(scope="module")
def replayed(tmp_path_factory):
    d = tmp_path_factory.mktemp("plots")
    log = d / "bench-run.h5"
    counts = _make_log(log)
    track = d / "bench-run.track.h5"
    run(log, out=track, smooth=True)
    return {"dir": d, "log": str(log), "track": str(track), "counts": counts}


@pytest.fixture(scope="module")
def echo_only(tmp_path_factory):
    """The simplest rig (one echo ranger), no truth, no temperature stream."""
    d = tmp_path_factory.mktemp("echo")
    rng = np.random.default_rng(3)
    t = np.arange(0.0, 8.0, 0.05)
    r = 1.0 + 0.2 * t / 8.0
    raw = 2 * r / C_20C + rng.normal(0, 1e-5, t.size)
    log = d / "echo.h5"
    write_log(log, Rig.from_dict(ECHO_ONLY).to_toml(),
              [SensorStream("e1", "echo", "echo_time", t, raw)],
              created_utc="2024-01-01T00:00:00+00:00")
    track = d / "echo.track.h5"
    run(log, out=track)
    return {"dir": d, "log": str(log), "track": str(track), "n": t.size}


def _by_gid(fig, prefix):
    """Plotted artists by the gid plots.py gives them (bars: the list of their patches)."""
    out = {}
    for ax in fig.axes:
        for art in list(ax.lines) + list(ax.collections):
            gid = art.get_gid()
            if gid and gid.startswith(prefix):
                out[gid] = art
        for patch in ax.patches:
            gid = patch.get_gid()
            if gid and gid.startswith(prefix):
                out.setdefault(gid, []).append(patch)
    return out


def _decisions(track):
    with h5py.File(track, "r") as f:
        return {k: f["decisions"][k][:] for k in f["decisions"]}


def _names(track, key):
    with h5py.File(track, "r") as f:
        return json.loads(f.attrs[key])


def _is_png(path):
    with open(path, "rb") as fh:
        return fh.read(8) == PNG_MAGIC


# --------------------------------------------------------------------------------------
# The track figure
# --------------------------------------------------------------------------------------
def test_track_figure_written_as_png_with_units_and_footer(replayed):
    out = replayed["dir"] / "track.png"
    fig = plot_track(replayed["track"], out=out)
    assert _is_png(out)
    assert os.path.getsize(out) > 20_000        # a real picture, not an empty canvas
    # one range axes and one error axes per direction (truth present)
    assert len(fig.axes) == 4
    units = re.compile(r"\((m|mm|°C|s)\)")
    for ax in fig.axes:
        assert units.search(ax.get_ylabel()), ax.get_ylabel()
    assert fig.axes[-1].get_xlabel() == "time (s)"
    assert [ax.get_ylabel() for ax in fig.axes[::2]] == ["front: range (m)", "left: range (m)"]
    texts = [t.get_text() for t in fig.texts] + [fig._supxlabel.get_text()]
    assert "Fused ranges are not a safety-rated protective function." in texts
    assert "bench-run.h5" in fig._suptitle.get_text()
    # no temporary file left beside the figure
    assert not [p for p in os.listdir(replayed["dir"]) if p.endswith(".tmp")]


def test_track_figure_shows_every_reading_and_truth(replayed):
    fig = plot_track(replayed["track"])
    dec = _decisions(replayed["track"])
    names = _names(replayed["track"], "sensor_names")
    assert sorted(names) == ["echo_front", "echo_left", "ir_front"]
    lines = _by_gid(fig, "")
    fused = D.is_accepted(dec["decision"])
    chosen = np.where(dec["branch"] == 1, dec["z_near_m"], dec["z_far_m"])
    for si, sname in enumerate(names):
        d = "left" if sname == "echo_left" else "front"
        m = dec["sensor"] == si
        n_fused = int((m & fused & np.isfinite(chosen)).sum())
        got = lines.get(f"raw:{d}:{sname}:fused")
        assert (len(got.get_xdata()) if got is not None else 0) == n_fused
    # rejected readings: at their range when they have one, on the top strip otherwise
    for code in range(D.FIRST_REJECT, len(D.NAMES)):
        for si, sname in enumerate(names):
            d = "left" if sname == "echo_left" else "front"
            m = (dec["sensor"] == si) & (dec["decision"] == code)
            has = np.isfinite(dec["z_far_m"]) | np.isfinite(dec["z_near_m"])
            for kind, want in (("raw", int((m & has).sum())), ("rug", int((m & ~has).sum()))):
                art = lines.get(f"{kind}:{d}:{sname}:{D.NAMES[code]}")
                assert (len(art.get_xdata()) if art is not None else 0) == want
    # the injected dropouts are on the strip, one marker each
    assert len(lines["rug:front:echo_front:dropout"].get_xdata()) == len(DROPOUT_ROWS)
    # truth, the smoothed range and the error panel are drawn for both directions
    for d in ("front", "left"):
        assert f"truth:{d}" in lines and f"smoothed:{d}" in lines and f"error:{d}" in lines
        with h5py.File(replayed["track"], "r") as f:
            n_track = f[f"track/{d}/t_s"].shape[0]
        assert len(lines[f"fused:{d}"].get_xdata()) == n_track   # below max_points: all


def test_track_figure_never_plots_more_than_max_points(replayed):
    limit = 64
    fig = plot_track(replayed["track"], max_points=limit)
    seen = 0
    for ax in fig.axes:
        for line in ax.lines:
            assert len(line.get_xdata()) <= limit
            seen += 1
        for coll in ax.collections:
            if isinstance(coll, PolyCollection):
                for path in coll.get_paths():
                    assert len(path.vertices) <= limit
    assert seen >= 10
    # the 1000 IR readings really were thinned, not dropped: stride keeps > limit / 2
    ir = _by_gid(fig, "raw:front:ir_front:fused")["raw:front:ir_front:fused"]
    assert limit // 2 < len(ir.get_xdata()) <= limit


def test_track_time_window_and_one_direction(replayed):
    fig = plot_track(replayed["track"], direction="left", t_range=(5.0, 9.0))
    assert len(fig.axes) == 2
    arts = _by_gid(fig, "")
    assert arts and all("left" in g.split(":") for g in arts)
    for gid, art in arts.items():
        if isinstance(art, Line2D):
            x = np.asarray(art.get_xdata())
            assert x.size and x.min() >= 5.0 and x.max() <= 9.0, gid
    assert "t from 5 s to 9 s" in fig._suptitle.get_text()


def test_track_without_truth_shows_temperature(echo_only):
    out = echo_only["dir"] / "echo.svg"
    fig = plot_track(echo_only["track"], out=out)
    with open(out, "rb") as fh:
        assert b"<svg" in fh.read(2000)          # format follows the suffix
    assert len(fig.axes) == 2
    assert fig.axes[1].get_ylabel().endswith("(°C)")
    temp = _by_gid(fig, "temp")["temp"]
    # no air stream in this rig: the echo ranger uses the fallback temperature (docs/rig.md:
    # fallback_temp_c defaults to 20.0)
    assert np.allclose(temp.get_ydata(), 20.0)
    raw = _by_gid(fig, "raw:front:e1:fused")["raw:front:e1:fused"]
    assert len(raw.get_xdata()) == echo_only["n"]


def test_streaming_in_small_slices_gives_the_same_figure(replayed, monkeypatch):
    ref = {g: (np.asarray(a.get_xdata()), np.asarray(a.get_ydata()))
           for g, a in _by_gid(plot_track(replayed["track"], max_points=80), "").items()
           if isinstance(a, Line2D)}
    monkeypatch.setattr(export, "SLICE_ROWS", 37)
    got = {g: (np.asarray(a.get_xdata()), np.asarray(a.get_ydata()))
           for g, a in _by_gid(plot_track(replayed["track"], max_points=80), "").items()
           if isinstance(a, Line2D)}
    assert ref.keys() == got.keys()
    for g in ref:
        np.testing.assert_array_equal(ref[g][0], got[g][0], err_msg=g)
        np.testing.assert_array_equal(ref[g][1], got[g][1], err_msg=g)


# --------------------------------------------------------------------------------------
# Decimation helpers
# --------------------------------------------------------------------------------------
def test_stride_decimation_equals_one_slicing_pass():
    rng = np.random.default_rng(7)
    x = rng.normal(size=10_007)
    s = plots._Stride(500)
    i = 0
    while i < x.size:
        k = int(rng.integers(1, 900))
        s.add(x[i:i + k])
        i += k
    kept = s.result(1)[0]
    # numpy basic slicing as the reference: every k-th sample from the first
    np.testing.assert_array_equal(kept, x[::s.k])
    assert 250 < kept.size <= 500


def test_envelope_keeps_extremes_and_band_edges():
    # Min/max decimation keeps every bucket's extremes, so a one-sample spike survives
    # (common practice for plotting long series, no source).
    rng = np.random.default_rng(11)
    n = 50_000
    t = np.arange(n) * 0.01
    v = np.cumsum(rng.normal(size=n))
    v[12_345] += 500.0
    v[40_001] -= 500.0
    sig = rng.uniform(0.1, 2.0, n)
    env = plots._Envelope(300)
    for a in range(0, n, 4_096):
        env.add(t[a:a + 4_096], v[a:a + 4_096], (v - 2 * sig)[a:a + 4_096],
                (v + 2 * sig)[a:a + 4_096])
    tl, vl = env.line()
    assert tl.size <= 300
    assert np.all(np.diff(tl) >= 0)
    assert vl.max() == v.max() and vl.min() == v.min()
    assert t[np.argmax(v)] in tl and t[np.argmin(v)] in tl
    # every plotted point is a real sample
    idx = np.rint(tl / 0.01).astype(int)
    np.testing.assert_array_equal(v[idx], vl)
    tb, lo, hi = env.band()
    assert lo.min() == (v - 2 * sig).min() and hi.max() == (v + 2 * sig).max()
    assert 2 * tb.size + 3 <= 300


# --------------------------------------------------------------------------------------
# Diagnostics
# --------------------------------------------------------------------------------------
def test_diagnostics_bounds_and_autocorrelation(replayed):
    out = replayed["dir"] / "diag.png"
    fig = plot_diagnostics(replayed["track"], out=out, direction="front")
    assert _is_png(out) and os.path.getsize(out) > 20_000
    assert len(fig.axes) == 4
    for ax in fig.axes:
        assert re.search(r"\(.+\)", ax.get_ylabel()) and re.search(r"\(.+\)", ax.get_xlabel())
    arts = _by_gid(fig, "")
    # chi-square 1 dof, two-sided 95 %: 0.000982 and 5.024 (standard chi-square table, e.g.
    # Abramowitz & Stegun 1964, Table 26.8, from memory)
    (span,) = arts["nis95:front"]
    assert span.get_y() == pytest.approx(0.000982, rel=1e-3)
    assert span.get_y() + span.get_height() == pytest.approx(5.024, rel=1e-3)
    # the normalised innovations of the fused readings, straight from the file
    dec = _decisions(replayed["track"])
    front = _names(replayed["track"], "direction_names").index("front")
    # NIS samples as the replay summary takes them: fused, finite NIS, not re-acquiring
    # (docs/track-format.md: a re-acquiring reading's NIS is against the overturned track)
    m = (D.is_accepted(dec["decision"]) & (dec["decision"] != D.REACQUIRED)
         & (dec["direction"] == front) & np.isfinite(dec["nis"]))
    z = np.sign(dec["innovation_m"][m]) * np.sqrt(dec["nis"][m])
    n = z.size
    # whiteness bound +-1.96/sqrt(N) (Bar-Shalom, Li & Kirubarajan 2001, §5.4)
    assert arts["acfbound:front"].get_ydata()[0] == pytest.approx(1.96 / np.sqrt(n))
    # sample autocorrelation r_k = sum (z_t - m)(z_t+k - m) / sum (z_t - m)^2 (Box & Jenkins
    # 1970, eq. 2.1.12); the streaming estimate differs only by end terms of order k/N
    zc = z - z.mean()
    lags = len(arts["acf:front"].get_ydata())
    assert lags == 10        # the replay summary's Ljung-Box lags (replay.metrics.Whiteness)
    ref = np.array([np.dot(zc[:-k], zc[k:]) for k in range(1, lags + 1)]) / np.dot(zc, zc)
    np.testing.assert_allclose(arts["acf:front"].get_ydata(), ref, atol=0.02)
    # NIS points: one per fused reading (below max_points)
    assert len(arts["nis:front"].get_xdata()) == n
    # histogram is a density: its area is the share inside +-5
    heights = [p.get_height() for p in arts["hist:front"]]
    inside = np.mean(np.abs(z) <= 5.0)
    assert np.sum(heights) * 0.25 == pytest.approx(inside, rel=1e-9)
    # the reference curve is the standard normal density, 1/sqrt(2 pi) at 0
    xs, ys = arts["normal:front"].get_xdata(), arts["normal:front"].get_ydata()
    assert ys[np.argmin(np.abs(xs))] == pytest.approx(1 / np.sqrt(2 * np.pi))
    np.testing.assert_allclose(ys, norm.pdf(xs))


def test_diagnostics_innovation_bounds_are_two_sqrt_s(replayed):
    fig = plot_diagnostics(replayed["track"], direction="left")
    arts = _by_gid(fig, "")
    dec = _decisions(replayed["track"])
    sensor = _names(replayed["track"], "sensor_names").index("echo_left")
    m = (D.is_accepted(dec["decision"]) & (dec["decision"] != D.REACQUIRED)
         & (dec["sensor"] == sensor) & (dec["nis"] > 0))
    nu, nis = dec["innovation_m"][m], dec["nis"][m]
    # NIS = nu^2 / S, so sqrt(S) = |nu| / sqrt(NIS) (Bar-Shalom et al. 2001, §5.4.2, from
    # memory; also docs/track-format.md, column `nis`)
    upper = 2e3 * np.abs(nu) / np.sqrt(nis)
    verts = arts["innovband:left:echo_left"].get_paths()[0].vertices[:, 1]
    assert verts.max() == pytest.approx(upper.max())
    assert verts.min() == pytest.approx(-upper.max())
    np.testing.assert_allclose(arts["innov:left:echo_left"].get_ydata(), 1e3 * nu)


def test_running_mean_bounds_are_those_of_a_mean_of_w(replayed):
    fig = plot_diagnostics(replayed["track"], direction="left")
    arts = _by_gid(fig, "")
    label = [t.get_text() for t in fig.axes[1].get_legend().get_texts()
             if t.get_text().startswith("mean of last")][0]
    w = int(label.split()[-1])
    # a mean of W chi-square(1) values is chi-square(W) / W (Bar-Shalom et al. 2001, §5.4)
    assert arts["nisrunlo:left"].get_ydata()[0] == pytest.approx(chi2.ppf(0.025, w) / w)
    assert arts["nisrunhi:left"].get_ydata()[0] == pytest.approx(chi2.ppf(0.975, w) / w)
    dec = _decisions(replayed["track"])
    left = _names(replayed["track"], "direction_names").index("left")
    m = (D.is_accepted(dec["decision"]) & (dec["decision"] != D.REACQUIRED)
         & (dec["direction"] == left) & np.isfinite(dec["nis"]))
    nis = dec["nis"][m]
    ref = np.convolve(nis, np.ones(w) / w, mode="valid")
    np.testing.assert_allclose(arts["nisrun:left"].get_ydata(), ref, rtol=1e-9)


# --------------------------------------------------------------------------------------
# The figures and the replay summary say the same thing (bundled demo logs)
# --------------------------------------------------------------------------------------
DATASETS = os.path.join(os.path.dirname(os.path.abspath(__file__)), "..", "datasets")


def _summary_numbers(text):
    """Per direction: NIS mean, n, verdict, Ljung-Box p and the 'all' RMSE rows, as the
    replay summary prints them."""
    out, d, table = {}, None, None
    for line in text.splitlines():
        m = re.match(r"direction (\S+):", line)
        if m:
            d = m.group(1)
            out[d] = {"rmse": {}}
        m = re.match(r"\s+time-averaged NIS (\S+) over (\d+) fused readings; .*: (.+)$", line)
        if m:
            out[d].update(nis=m.group(1), n=int(m.group(2)), verdict=m.group(3))
        m = re.search(r"Ljung-Box Q = \S+, p = (\S+)$", line)
        if m:
            out[d]["p"] = m.group(1)
        m = re.match(r"\s+against truth \((\w+)[^)]*\):", line)
        if m:
            table = m.group(1)
        m = re.match(r"\s+all\s+(\d+)\s+(\S+)", line)
        if m:
            out[d]["rmse"][table] = (int(m.group(1)), m.group(2))
    return out


def test_figures_give_the_replay_summary_numbers(tmp_path):
    # shelf-pass has re-acquisitions and crosstalk: the readings whose handling once made
    # the figure say "too large" where the summary said "too small"
    track = tmp_path / "sp.track.h5"
    res = run(os.path.join(DATASETS, "shelf-pass.h5"), out=track, smooth=True)
    want = _summary_numbers(res.summary())
    assert set(want) == {"front", "left"}
    dec = _decisions(track)
    dirs = _names(track, "direction_names")
    diag = plot_diagnostics(track)
    figt = plot_track(track)
    titles = [ax.get_title() for ax in diag.axes]
    track_titles = [ax.get_title(loc="left") for ax in figt.axes]
    for d, w in want.items():
        # the time-averaged NIS straight from the decision rows (Bar-Shalom, Li &
        # Kirubarajan 2001, §5.4: the mean of the NIS samples), re-acquisitions left out
        m = ((dec["direction"] == dirs.index(d)) & D.is_accepted(dec["decision"])
             & (dec["decision"] != D.REACQUIRED) & np.isfinite(dec["nis"]))
        assert w["nis"] == f"{dec['nis'][m].mean():.3f}" and w["n"] == m.sum()
        nis_title = [t for t in titles if t.startswith("time-averaged NIS")
                     and f"over {w['n']:,} readings" in t]
        assert len(nis_title) == 1, titles
        assert nis_title[0].startswith(f"time-averaged NIS {w['nis']} over {w['n']:,} "
                                       f"readings: {w['verdict']}\n"), nis_title[0]
        white = [t for t in titles if t.startswith("whiteness") and f"p = {w['p']})" in t]
        assert len(white) == 1, (w["p"], titles)
        n_all, rmse = w["rmse"]["filtered"]
        n_s, rmse_s = w["rmse"]["smoothed"]
        bit = [t for t in track_titles if t.startswith(f"{d}:")][0]
        assert f"RMSE against truth {rmse} mm over {n_all:,} readings" in bit, bit
        assert f"(smoothed, at track rows: {rmse_s} mm)" in bit, bit
    # and the summary's object, unrounded, against the figure's own accumulation. Not to
    # the last bit: after a rejected reading the estimator's state can differ slightly
    # from its last track row (a gated reading keeps low-weight updated hypotheses, an echo
    # dropout reweights them), and the track file stores no state for rejected readings.
    with export.TrackFile(track) as tf:
        data = plots._collect_track(tf, tf.run(), tf.direction_names, -np.inf, np.inf, 1000)
    for d in ("front", "left"):
        np.testing.assert_allclose(data["dirs"][d]["errors"]["rmse_m"],
                                   res.errors(d)["all"]["rmse_m"], rtol=1e-3)
        assert data["dirs"][d]["errors"]["n"] == res.errors(d)["all"]["n"]


def test_held_ir_readings_drawn_at_the_candidate_nearer_the_track(tmp_path):
    track = tmp_path / "dock.track.h5"
    run(os.path.join(DATASETS, "cold-store-dock.h5"), out=track)
    fig = plot_track(track)
    arts = _by_gid(fig, "")
    held = arts["raw:front:ir_front:held"]
    dec = _decisions(track)
    names = _names(track, "sensor_names")
    with h5py.File(track, "r") as f:
        tt, tr = f["track/front/t_s"][:], f["track/front/range_m"][:]
        truth_t, truth_r = f["truth/front/t_s"][:], f["truth/front/range_m"][:]
    m = (dec["sensor"] == names.index("ir_front")) & (dec["decision"] == D.HELD)
    t, zf, zn = dec["t_s"][m], dec["z_far_m"][m], dec["z_near_m"][m]
    assert np.isfinite(zf).all() and np.isfinite(zn).all()   # below the peak: two candidates
    # the candidate nearer the fused track, interpolated linearly between its rows
    at = np.interp(t, tt, tr)
    chosen = np.where(np.abs(zn - at) < np.abs(zf - at), zn, zf)
    np.testing.assert_array_equal(held.get_xdata(), t)
    np.testing.assert_array_equal(held.get_ydata(), chosen)
    # 100-128 s the target sits at 0.08 m (the log's truth): the held readings are drawn
    # there, not at their far candidate near 0.45 m
    w = (t > 100) & (t < 128)
    assert w.sum() > 100
    truth_at = np.interp(t[w], truth_t, truth_r)
    assert np.median(np.abs(np.asarray(held.get_ydata())[w] - truth_at)) < 0.02
    assert np.median(zf[w] - truth_at) > 0.2        # ...where the old drawing put them
    # held repeats are smaller than the fused readings and under the fused line
    fused_dots = arts["raw:front:ir_front:fused"]
    assert held.get_markersize() < fused_dots.get_markersize()
    assert held.get_zorder() < arts["fused:front"].get_zorder()
    assert held.get_zorder() < arts["truth:front"].get_zorder()
    # the other candidate is drawn in the colour the legend gives it
    other = arts["raw:front:ir_front:other"]
    handle = [h for h in fig.legends[0].legend_handles if h.get_label() == "other IR candidate"]
    assert len(handle) == 1
    assert other.get_color() == handle[0].get_color()
    assert other.get_alpha() == handle[0].get_alpha()


# --------------------------------------------------------------------------------------
# Convergence
# --------------------------------------------------------------------------------------
def test_convergence_figure(tmp_path):
    hist = [{"iteration": i, "loglik": -500.0 + 400 * (1 - 0.6 ** i),
             "params": {"accel_psd": 0.5 * 0.7 ** i + 0.05,
                        "echo_front.sigma_m": 0.003 + 0.01 * 0.5 ** i}}
            for i in range(12)]
    out = tmp_path / "conv.png"
    fig = plot_convergence(hist, out=out)
    assert _is_png(out) and os.path.getsize(out) > 10_000
    ax_l, ax_p = fig.axes
    assert ax_p.get_yscale() == "log"
    assert "(nats)" in ax_l.get_ylabel() and ax_p.get_xlabel() == "iteration"
    arts = _by_gid(fig, "")
    np.testing.assert_allclose(arts["loglik"].get_ydata(), [h["loglik"] for h in hist])
    np.testing.assert_allclose(arts["param:accel_psd"].get_ydata(),
                               [h["params"]["accel_psd"] for h in hist])
    # every parameter named with its unit (accel_psd: a PSD of acceleration, m^2/s^3 for a
    # 1-D constant-velocity model, Bar-Shalom et al. 2001 §6.2, from memory)
    labels = [t.get_text() for t in ax_p.get_legend().get_texts()]
    assert labels == ["accel_psd (m²/s³)", "echo_front.sigma_m (m)"]
    # the end-of-line values do not overlap, and say the last value
    fig.canvas.draw()
    ends = [t for t in ax_p.texts if (t.get_gid() or "").startswith("end:")]
    assert [t.get_text() for t in ends] == [f"{h:.4g}" for h in hist[-1]["params"].values()]
    boxes = [t.get_window_extent() for t in ends]
    assert not boxes[0].overlaps(boxes[1])
    with pytest.raises(InputError) as exc:
        plot_convergence([hist[0], {"iteration": 1, "params": {}}])
    assert exc.value.field == "history[1]" and "loglik" in str(exc.value)
    with pytest.raises(InputError):
        plot_convergence([])


# --------------------------------------------------------------------------------------
# CSV export
# --------------------------------------------------------------------------------------
def test_csv_one_decision_row_per_reading_with_names(replayed, tmp_path):
    prefix = str(tmp_path / "out")
    paths = track_to_csv(replayed["track"], out_prefix=prefix)
    assert paths == [prefix + ".track.csv", prefix + ".decisions.csv"]
    with open(paths[1], newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert list(rows[0]) == list(export.DECISION_CSV_COLUMNS)
    # every reading in gets exactly one decision out (docs/track-format.md: "Every reading
    # of the log has exactly one row")
    assert len(rows) == sum(replayed["counts"].values())
    seen = {(r["sensor"], int(r["row"])) for r in rows}
    assert seen == {(s, i) for s, n in replayed["counts"].items() for i in range(n)}
    assert {r["decision"] for r in rows} <= set(D.NAMES)
    by = {(r["sensor"], int(r["row"])): r for r in rows}
    for i in DROPOUT_ROWS:
        assert by[("echo_front", i)]["decision"] == "dropout"
    for i in INVALID_ROWS:
        assert by[("echo_front", i)]["decision"] == "invalid"
    for i in BLANKED_ROWS:
        assert by[("echo_front", i)]["decision"] == "out_of_range"
    assert {by[("echo_left", i)]["direction"] for i in range(5)} == {"left"}
    # numbers read back exactly; NaN is an empty field
    dec = _decisions(replayed["track"])
    got = np.array([float(r["innovation_m"]) if r["innovation_m"] else np.nan for r in rows])
    np.testing.assert_array_equal(got, dec["innovation_m"])
    flags = {r["flags"] for r in rows}
    assert flags <= {""} | {"|".join(c) for c in _combos(D.FLAG_NAMES.values())}


def _combos(names):
    names = list(names)
    out = []
    for mask in range(1, 1 << len(names)):
        out.append([n for i, n in enumerate(names) if mask >> i & 1])
    return out


def test_csv_track_rows_columns_and_default_prefix(replayed, monkeypatch):
    paths = track_to_csv(replayed["track"])
    base = replayed["track"][: -len(".track.h5")]
    assert paths == [base + ".track.csv", base + ".decisions.csv"]
    with open(paths[0], newline="") as fh:
        rows = list(csv.DictReader(fh))
    with h5py.File(replayed["track"], "r") as f:
        n = {d: f[f"track/{d}/t_s"].shape[0] for d in ("front", "left")}
        cols = set(f["track/front"].keys())
        ranges = f["track/left/range_smoothed_m"][:]
    assert len(rows) == n["front"] + n["left"]
    assert set(rows[0]) == {"direction"} | cols
    assert "range_smoothed_m" in rows[0] and list(rows[0])[:4] == ["direction", "t_s",
                                                                  "range_m", "sigma_m"]
    left = [float(r["range_smoothed_m"]) for r in rows if r["direction"] == "left"]
    np.testing.assert_array_equal(left, ranges)
    # streaming in tiny slices writes the same bytes
    with open(paths[0], "rb") as a, open(paths[1], "rb") as b:
        ref = (a.read(), b.read())
    monkeypatch.setattr(export, "SLICE_ROWS", 29)
    paths2 = track_to_csv(replayed["track"])
    with open(paths2[0], "rb") as a, open(paths2[1], "rb") as b:
        assert (a.read(), b.read()) == ref


def test_csv_of_several_logs_has_a_run_column(tmp_path):
    logs = [tmp_path / "first.h5", tmp_path / "second.h5"]
    counts = [_make_log(logs[0], duration_s=4.0, seed=1),
              _make_log(logs[1], duration_s=3.0, seed=2)]
    track = tmp_path / "both.track.h5"
    run(logs, out=track)
    paths = track_to_csv(track)
    with open(paths[1], newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert list(rows[0])[0] == "run"
    for i, c in enumerate(counts):
        assert sum(r["run"] == str(i) for r in rows) == sum(c.values())
    fig = plot_track(track, run=1)
    assert "second.h5" in fig._suptitle.get_text()
    with pytest.raises(InputError) as exc:
        plot_track(track, run=2)
    assert exc.value.field == "--run"


# --------------------------------------------------------------------------------------
# Errors, through the command line
# --------------------------------------------------------------------------------------
def _cli(capsys, *argv):
    rc = cli.main(["plot", *map(str, argv)])
    err = capsys.readouterr().err
    return rc, err


def test_cli_writes_both_kinds(replayed, capsys):
    for kind in ("track", "diagnostics"):
        out = replayed["dir"] / f"cli-{kind}.png"
        rc = cli.main(["plot", replayed["track"], "-o", str(out), "--kind", kind,
                       "--from", "2", "--to", "15"])
        assert rc == 0 and _is_png(out)
    assert "figure:" in capsys.readouterr().out


def test_cli_help_shows_an_example(capsys):
    with pytest.raises(SystemExit) as exc:
        cli.main(["plot", "--help"])
    assert exc.value.code == 0
    text = capsys.readouterr().out
    assert "example" in text and "rangefuse plot" in text


def test_cli_bad_inputs_give_one_line_and_exit_2(replayed, tmp_path, capsys):
    junk = tmp_path / "junk.h5"
    junk.write_text("not hdf5 at all\n")
    broken = tmp_path / "broken.track.h5"
    with h5py.File(replayed["track"], "r") as src, h5py.File(broken, "w") as dst:
        for k, v in src.attrs.items():
            dst.attrs[k] = v
        for k in src:
            src.copy(k, dst)
        del dst["track/left"]
    out = tmp_path / "fig.png"
    cases = [
        ((replayed["log"], "-o", out), r"format: this is a log, not a track file"),
        ((junk, "-o", out), r"junk\.h5: not an HDF5 file"),
        ((tmp_path / "missing.h5", "-o", out), r"missing\.h5: no such file"),
        ((broken, "-o", out), r"/track/left: group missing"),
        ((replayed["track"], "-o", out, "--direction", "back"),
         r"--direction: unknown direction 'back'; the track has front, left"),
        ((replayed["track"], "-o", tmp_path / "fig.xyz"), r"-o: cannot tell the figure format"),
        ((replayed["track"], "-o", out, "--from", "9", "--to", "3"), r"from < to"),
        ((replayed["track"], "-o", tmp_path / "no" / "fig.png"), r"does not exist"),
        ((replayed["track"], "-o", replayed["track"]), r"-o:"),
    ]
    for argv, pattern in cases:
        rc, err = _cli(capsys, *argv)
        assert rc == 2, argv
        lines = err.strip().splitlines()
        assert len(lines) == 1 and lines[0].startswith("rangefuse plot: error: "), err
        assert re.search(pattern, lines[0]), (pattern, lines[0])
        assert "Traceback" not in err
    assert not out.exists()
    # the library raises the project's errors (LogFormatError for a bad file)
    with pytest.raises(LogFormatError) as exc:
        plot_track(broken, direction="left")
    assert exc.value.field == "/track/left" and exc.value.file == str(broken)
    with pytest.raises(LogFormatError):
        track_to_csv(broken, out_prefix=str(tmp_path / "x"))
    assert not (tmp_path / "x.track.csv").exists() and not (tmp_path / "x.decisions.csv").exists()
