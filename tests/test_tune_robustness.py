"""`rangefuse tune` on what a new user meets: parameters at a bound of their search,
latency, the truth objective on logs with ghosts and crosstalk, an IR unit with a gain
error, and the figures the tuner reports against those of `rangefuse replay`.

The demo logs are short (18 000 to 20 000 readings; one tuning takes well under a
second), so the tests run the real tuner on them.
"""
import dataclasses
import glob
import math
import os

import numpy as np
import pytest

from fusion.errors import ConfigError
from fusion.rig import Rig
from replay.cli import main
from replay.logfile import open_log
from replay.run import run
from replay.tune import (CI_AT_LOWER, CI_SKIPPED, CI_TWO_SIDED, CI_UNBOUNDED, TuneResult,
                         _nees_note, _worse_against_truth, apply, default_parameters, tune)

DATA = os.path.join(os.path.dirname(__file__), "..", "datasets")
SHELF = os.path.join(DATA, "shelf-pass.h5")
DOCK = os.path.join(DATA, "cold-store-dock.h5")
TUNING = os.path.join(DATA, "tuning-run.h5")


def _rig_of(log):
    with open_log(log) as f:
        return Rig.from_toml(f.rig_toml)


# --- item 1: a parameter at its bound, a flat direction ---------------------------------
NAMES = ("estimator.accel_psd", "sensor.ir_front.volts_sigma", "sensor.echo_a.sigma_m")


def _tune_on_a_known_surface(monkeypatch, centre_of, curvature, **kw):
    """`tune` on a stand-in for its likelihood machine: the log-likelihood is
    -0.5 sum_i c_i (x_i - m_i)^2 in the log-parameters x (the coordinates the tuner
    searches), so where the maximum lies and how sharp it is are known."""
    import replay.tune as T
    rig = _rig_of(TUNING)
    ps = {p.name: p for p in default_parameters(rig)}
    m = np.array([centre_of(ps[n]) for n in NAMES])
    c = np.asarray(curvature, float)

    class Problem:
        def __init__(self, logs, rig, params, latency):
            self.rig, self.params = rig, params
            self.truths = [{}]
            self.n = 0
            self.last_fused = 0.0

        def run(self, values):
            x = np.array([math.log(values[n]) for n in NAMES])
            ll = -0.5 * float(np.sum(c * (x - m) ** 2))
            self.last_fused = ll
            return ll, (math.nan, 0, (math.nan, math.nan)), []

    monkeypatch.setattr(T, "_Problem", Problem)
    return tune(TUNING, rig=rig, params=list(NAMES), em=False, **kw)


def test_interval_at_a_bound_or_of_a_flat_direction_is_said_in_words(monkeypatch):
    # The maximum of accel_psd lies below its search range (the search stops at the lower
    # bound, as the README example's accel_psd did), volts_sigma's log-likelihood is all
    # but flat (curvature 1e-9: a 95 % interval of +-1.96 / sqrt(1e-9) = +-62 000 in the
    # log, whose exp overflows a float), echo_a.sigma_m has a clean maximum. Observed
    # information gives x +- 1.96 / sqrt(c) for the clean one (Efron & Hinkley 1978, from
    # memory); the other two have no interval to give, and must say why in words.
    res = _tune_on_a_known_surface(
        monkeypatch,
        lambda p: {"estimator.accel_psd": math.log(p.lower) - 3.0,
                   "sensor.echo_a.sigma_m": math.log(p.value) + 0.2}.get(p.name,
                                                                          math.log(p.value)),
        [4.0, 1e-9, 25.0])
    st = res.ci_status
    assert st["estimator.accel_psd"] == CI_AT_LOWER
    assert st["sensor.ir_front.volts_sigma"] == CI_UNBOUNDED
    assert st["sensor.echo_a.sigma_m"] == CI_TWO_SIDED
    lo, hi = res.ci95["sensor.echo_a.sigma_m"]
    assert math.log(hi / lo) == pytest.approx(2 * 1.96 / math.sqrt(25.0), rel=1e-3)
    text = res.summary()
    assert "at its lower bound" in text
    assert "not pinned down by the logs" in text
    for line in text.splitlines():
        if line.strip().startswith(("estimator.", "sensor.")):
            assert "inf" not in line and "nan" not in line, line


def test_no_intervals_says_they_were_skipped(monkeypatch):
    # --no-intervals skips the curvature: the table must say so, not "not a maximum".
    res = _tune_on_a_known_surface(monkeypatch, lambda p: math.log(p.value) + 0.1,
                                   [4.0, 4.0, 4.0], intervals=False)
    text = res.summary()
    assert "not a maximum" not in text
    assert text.count("skipped (--no-intervals)") == len(NAMES)
    assert set(res.ci_status.values()) == {CI_SKIPPED}


def test_readme_example_tunes_a_simulated_shelf_pass_without_a_traceback(tmp_path, capsys):
    # The README's example, on the log it simulates (shelf-pass, seed 7): it ended in an
    # OverflowError while computing the interval of a parameter at its bound.
    log, out = tmp_path / "run.h5", tmp_path / "tuned.rig.toml"
    assert main(["simulate", os.path.join(DATA, "shelf-pass.scenario.toml"), "-o", str(log),
                 "--seed", "7"]) == 0
    assert main(["tune", str(log), "-o", str(out)]) == 0
    Rig.load(out)
    text = capsys.readouterr().out
    assert "95% interval" in text and "Traceback" not in text


# --- item 2: latency --------------------------------------------------------------------
@pytest.mark.parametrize("rig_file", sorted(glob.glob(os.path.join(DATA, "*.rig.toml"))))
def test_every_search_range_holds_only_values_the_rig_accepts(rig_file):
    # The tuner writes whatever its search finds: each parameter's range must lie inside
    # what the rig file accepts (docs/rig.md: latency_s >= 0; noise terms positive), so
    # both ends of every range must make a valid rig.
    rig = Rig.load(rig_file)
    for p in default_parameters(rig, latency=True):
        for v in (p.lower, p.upper):
            apply(rig, [dataclasses.replace(p, value=v)])


def test_a_rig_error_names_no_placeholder_for_a_file():
    # Errors name the file they are in (fusion/errors.py); a rig made by `Rig.replace`
    # is in none, so the message must not name a made-up one.
    rig = _rig_of(SHELF)
    bad = dataclasses.replace(rig.sensors["ir_left"], latency_s=-0.001)
    with pytest.raises(ConfigError) as exc:
        rig.replace(sensors={**rig.sensors, "ir_left": bad})
    assert exc.value.file in (None, "")
    assert "<" not in str(exc.value) and "sensor.ir_left.latency_s" in str(exc.value)
    with pytest.raises(ConfigError) as exc:
        rig.replace(estimator={"accel_psd": -1.0})
    assert "<" not in str(exc.value)


def test_latency_tuning_writes_a_rig_with_latencies_of_zero_or_more(tmp_path, capsys):
    # `--latency` ended with exit 2 on every demo log (a latency of -1.6 ms searched).
    out = tmp_path / "lat.toml"
    assert main(["tune", SHELF, "-o", str(out), "--latency", "--max-evals", "100",
                 "--no-intervals"]) == 0
    rig = Rig.load(out)
    assert all(s.latency_s >= 0 for s in rig.sensors.values())
    assert "error" not in capsys.readouterr().err


# --- item 4: the tuner's figures are the replay's ----------------------------------------
@pytest.fixture(scope="module")
def dock_tuned():
    return tune(DOCK, intervals=False)


def test_after_figures_are_the_replay_figures_with_a_gain_error(dock_tuned, tmp_path):
    # The cold-store dock's IR unit has gain_sigma 0.03, a term of its sigma that
    # volts_sigma does not scale (fusion/sensors/ir.py). `rangefuse replay` of the rig the
    # tuner writes must report the NIS (Bar-Shalom, Li & Kirubarajan 2001, §5.4) and the
    # innovations log-likelihood (Schweppe 1965) the tuner says it has; the before
    # figures likewise for the starting rig. Same decisions, same sums: equal to rounding.
    res = dock_tuned
    assert res.rig.sensors["ir_front"].gain_sigma > 0
    before = run(DOCK, out=tmp_path / "before.h5")
    after = run(DOCK, rig=res.rig, out=tmp_path / "after.h5")
    for rep, nis, ll in ((before, res.nis_before, res.loglik_fused_before),
                         (after, res.nis_after, res.loglik_fused_after)):
        mean, n, _ = rep.nis("front")
        assert nis[1] == n
        assert nis[0] == pytest.approx(mean, rel=1e-9)
        assert ll == pytest.approx(rep.dirs["front"].loglik, rel=1e-9)
    # and the figures against truth, when the logs carry it
    a = after.errors("front")["all"]
    assert res.truth_after["front"]["cover2"] == pytest.approx(a["cover2"], rel=1e-9)
    assert res.truth_after["front"]["rmse_m"] == pytest.approx(a["rmse_m"], rel=1e-9)
    assert "2σ cover" in res.summary()


# --- item 3: the truth objective ----------------------------------------------------------
@pytest.fixture(scope="module")
def shelf_truth():
    return tune(SHELF, objective="truth", intervals=False)


def test_truth_fit_of_an_echo_ranger_ignores_its_ghosts_and_crosstalk(shelf_truth):
    # shelf-pass was simulated with the noise its rig states (the scenario sets no other
    # for echo_front: replay/simulate.py draws it from the rig), plus readings that are
    # not of the target: crosstalk from echo_left, multipath ghosts and a clutter return.
    # A maximum-likelihood fit over the target's readings is consistent (common practice,
    # no source); 25 % is a design tolerance for a two-minute log with about 2 000 fused
    # echo_front readings. Fitted over every decoded reading it gave sigma_m 0.854 m.
    rig = _rig_of(SHELF)
    for key in ("sigma_m", "sigma_frac"):
        true = getattr(rig.sensors["echo_front"], key)
        assert shelf_truth.value(f"sensor.echo_front.{key}") == pytest.approx(true, rel=0.25)


@pytest.mark.parametrize("log", [SHELF, DOCK])
def test_truth_objective_writes_no_rig_clearly_worse_against_truth(log, tmp_path):
    # Judged by replaying the written rig against truth (RMSE, 2-sigma cover) beside the
    # starting rig: within the tuner's own "clearly worse" margins (replay/tune.py,
    # design figures), and the tuner's report of those figures is the replay's.
    # The NEES is not judged: on shelf-pass the log score, floored where the track
    # re-acquires, takes the process noise to its lower bound, and the mean NEES, which
    # those re-acquisitions dominate, rises tenfold; the tuner notes it, exactly when the
    # replay's figures show it.
    res = tune(log, objective="truth", intervals=False)
    before = run(log, out=tmp_path / "b.h5")
    after = run(log, rig=res.rig, out=tmp_path / "a.h5")
    grown = []
    for d in res.rig.directions:
        b, a = before.errors(d)["all"], after.errors(d)["all"]
        assert a["rmse_m"] <= 1.10 * b["rmse_m"] + 1e-6, d
        assert a["cover2"] >= min(b["cover2"] - 0.05, 0.90), d
        assert res.truth_after[d]["cover2"] == pytest.approx(a["cover2"], rel=1e-9)
        assert res.truth_after[d]["nees"] == pytest.approx(a["nees"], rel=1e-9)
        if a["nees"] > 2 * max(b["nees"], 1.0):
            grown.append(f"{d} {b['nees']:.3g} -> {a['nees']:.3g}")
    assert res.worse_against_truth == ""
    assert all(g in res.message for g in grown)
    assert ("the mean NEES grew" in res.message) == bool(grown)


def test_a_clearly_worse_rig_is_reported_first_and_loudly():
    # The margins of replay/tune.py: RMSE up by more than 10 %, or 2-sigma cover down by
    # more than 5 points to below 90 % (design figures).
    b = {"front": {"rmse_m": 0.004, "cover2": 0.97, "nees": 0.8, "n": 100}}
    assert _worse_against_truth(b, {"front": dict(b["front"], rmse_m=0.0043)}) == ""
    assert "RMSE 4.0 -> 4.5 mm" in _worse_against_truth(b, {"front": dict(b["front"],
                                                                            rmse_m=0.0045)})
    worse = _worse_against_truth(b, {"front": dict(b["front"], cover2=0.83)})
    assert "2-sigma cover 97.0 -> 83.0 %" in worse
    res = TuneResult(objective="innovations", params=[], initial=[], ci95={},
                     loglik_before=0.0, loglik_after=0.0, nis_before=(1.0, 10, (0.5, 1.5)),
                     nis_after=(1.0, 10, (0.5, 1.5)), rig=None, worse_against_truth=worse)
    assert res.summary().startswith("WARNING: the tuned rig is clearly worse")


@pytest.mark.parametrize("kw, field", [({"max_evals": -1}, "max_evals"),
                                       ({"max_evals": 0}, "max_evals"),
                                       ({"max_evals": 2.5}, "max_evals"),
                                       ({"objective": "truthy"}, "objective")])
def test_tune_checks_its_arguments_at_the_door(kw, field):
    # A library call gets the same clear refusal the command gives (DEVELOPERS.md,
    # "Conventions": user errors raise the fusion.errors family naming the field).
    from fusion.errors import InputError
    from replay.tune import tune
    with pytest.raises(InputError) as exc:
        tune(SHELF, **kw)
    assert exc.value.field == field


def _written(rig):
    from fusion._toml import dumps
    return dumps(rig.to_dict())


def test_the_tuned_rig_keeps_the_users_file_and_changes_only_the_tuned_values():
    # A rig file is the user's document: its comments, order and spelling stay; only the
    # tuned keys change (or are added where the key was left to its default), and the
    # text reads back as exactly the tuned rig.
    from replay.tune import Parameter, apply, rig_text_with
    src = os.path.join(DATA, "tuning-run.rig.toml")
    text = open(src).read()
    rig = Rig.from_toml(text)
    params = [Parameter("estimator.accel_psd", 1.5e-5),           # no [estimator] table
              Parameter("sensor.echo_a.sigma_m", 0.0029),          # a key on its own line
              Parameter("sensor.ir_front.latency_s", 0.004)]       # a key left to default
    tuned = apply(rig, params)
    out = rig_text_with(text, tuned, params, ["# tuned by rangefuse tune (test):"])
    assert _written(Rig.from_toml(out)) == _written(tuned)
    old, new = text.splitlines(), out.splitlines()
    assert [ln for ln in old if ln.lstrip().startswith("#")] == \
        [ln for ln in new[1:] if ln.lstrip().startswith("#")]
    changed = [ln for ln in new[1:] if ln not in old]
    assert sorted(ln.split("=")[0].strip() for ln in changed if "=" in ln) == \
        ["accel_psd", "latency_s", "sigma_m"]
    # tuning the tuned file again replaces the head instead of piling heads up
    again = rig_text_with(out, tuned, params, ["# tuned by rangefuse tune (again):"])
    assert again.count("# tuned by rangefuse tune") == 1


def test_a_rig_text_that_cannot_be_edited_is_written_whole():
    from replay.tune import Parameter, apply, rig_text_with
    rig = Rig.from_toml(open(os.path.join(DATA, "tuning-run.rig.toml")).read())
    params = [Parameter("sensor.echo_a.sigma_m", 0.0029)]
    tuned = apply(rig, params)
    # a text that does not describe the sensor (here: none at all) cannot be edited
    for text in ("", "name = 'other'\n"):
        out = rig_text_with(text, tuned, params, ["# head"])
        assert out.startswith("# head\n")
        assert _written(Rig.from_toml(out)) == _written(tuned)


# --- second new-user pass -----------------------------------------------------------------
# 1. the tuner returns, writes and reports the best point it evaluated
@pytest.fixture(scope="module")
def shelf_innovations():
    return tune(SHELF, intervals=False)


def test_the_rig_returned_is_the_best_point_the_search_evaluated(shelf_innovations):
    # Powell's last point is not its best: on shelf-pass the figure said "best 36100.5 at
    # iteration 58" (echo_front.sigma_m 0.002777) while the rig written scored 36090.2
    # with 0.003329. The history keeps each improvement; what is written is its last.
    res = shelf_innovations
    best = max(res.history, key=lambda h: h["loglik"])
    assert best is res.history[-1]
    assert best["params"] == pytest.approx({p.name: p.value for p in res.params}, rel=1e-12)
    # the after-figures are those of that point: its objective is the history's best
    assert res.loglik_after == pytest.approx(best["loglik"], abs=1e-6)
    assert f"tuned values found at iteration {best['iteration']} " in res.summary()


def test_truth_objective_with_latency_returns_its_best_log_score():
    # --objective truth --latency on shelf-pass: the history's best log score was 98385.2
    # (latencies near 0) but the rig written scored 97397.7 (echo_left latency 0.1009 s).
    res = tune(SHELF, objective="truth", latency=True, intervals=False)
    best = max(res.history, key=lambda h: h["loglik"])
    assert best is res.history[-1]
    assert res.truth_score_after == pytest.approx(best["loglik"], abs=1e-6)
    assert res.value("sensor.echo_left.latency_s") == \
        pytest.approx(best["params"]["sensor.echo_left.latency_s"], abs=1e-12)


# 2. a grown NEES is noted, not judged (it is dominated by re-acquisitions)
def test_a_nees_grown_past_twice_is_noted_beside_the_cover_not_judged():
    b = {"left": {"rmse_m": 0.0065, "cover2": 0.943, "nees": 4.24, "n": 100}}
    a = {"left": dict(b["left"], nees=39.9, cover2=0.935)}
    assert _worse_against_truth(b, a) == ""
    note = _nees_note(b, a)
    assert "left 4.24 -> 39.9 (2-sigma cover 94.3 -> 93.5 %)" in note and "; " not in note
    # toward consistency (NEES 1) is not noted, nor is a rise of less than twice
    assert _nees_note({"left": dict(b["left"], nees=0.7)},
                      {"left": dict(b["left"], nees=1.5)}) == ""
    assert _nees_note(b, {"left": dict(b["left"], nees=8.0)}) == ""


def test_innovations_tuning_notes_the_nees_on_shelf_pass(shelf_innovations):
    # shelf-pass, innovations objective: NEES left 4.24 -> 39.9, front 2.07e3 -> 3.89e4,
    # with RMSE and cover within their margins: a note in the summary, no warning.
    res = shelf_innovations
    notes = [ln for ln in res.summary().splitlines() if "mean NEES grew" in ln]
    assert len(notes) == 1
    for d in ("front", "left"):
        b, a = res.truth_before[d]["nees"], res.truth_after[d]["nees"]
        assert a > 2 * b and a > 2
        assert f"{d} {b:.3g} -> {a:.3g}" in notes[0]
    assert not res.summary().startswith("WARNING")


# 3. the truth objective's figure and interval column
def test_truth_objective_figure_and_a_fit_held_at_its_bound_say_what_they_are():
    res = tune(DOCK, objective="truth")
    # cold-store-dock's IR fit to truth falls below the search range: held at 1e-5
    name = "sensor.ir_front.volts_sigma"
    assert res.value(name) == pytest.approx(1e-5)
    assert res.ci_status[name] == CI_AT_LOWER
    row = next(ln for ln in res.summary().splitlines() if ln.strip().startswith(name))
    assert row.rstrip().endswith("at its lower bound")
    fig = res.plot()
    assert fig.axes[0].get_title() == "log score against truth"
    assert "likelihood" not in fig.axes[0].get_ylabel()


# 4. what --max-evals covers, and when it stopped the search
@pytest.mark.parametrize("cap", [1, 30])
def test_the_cap_covers_the_search_and_says_when_it_stopped_it(cap):
    res = tune(SHELF, latency=True, max_evals=cap, intervals=False)
    search = sum(n for n, what in res.eval_parts if "curvature" not in what)
    assert search == res.n_search == res.n_evals == cap
    assert res.capped and f"stopped at its cap of {cap}" in res.summary()
    assert "raise --max-evals" in res.message
    direct = dict((what, n) for n, what in res.eval_parts).get("by the direct search", 0)
    head = res.summary().splitlines()[0]
    # no count in the heading that the breakdown does not show
    for word in head.replace("-", " ").split():
        if word.isdigit() and word != str(cap):
            assert int(word) in (direct, res.n_readings), head


def test_a_latency_the_capped_search_never_moved_is_not_called_a_maximum():
    # --max-evals 2 --latency: latencies left at 0, and the summary claimed "at a bound
    # ... the likelihood has no maximum inside it there"
    res = tune(SHELF, latency=True, max_evals=2)
    text = res.summary()
    assert "no maximum inside" not in text
    assert "stopped at the cap, left it: not shown to be the best value" in text
    assert all(res.value(f"sensor.{s}.latency_s") == 0 for s in res.rig.sensors)


def test_max_evals_help_says_what_the_cap_covers(capsys):
    with pytest.raises(SystemExit):
        main(["tune", "--help"])
    text = " ".join(capsys.readouterr().out.split())
    cap = text.split("--max-evals N", 2)[2].split("--no-intervals skip the", 1)[0]
    for words in ("EM", "direct search", "curvature", "more", "stopped the search"):
        assert words in cap, words


# 5, 6. the library's arguments, in the library's words
def test_logs_must_name_at_least_one_log():
    from fusion.errors import InputError
    with pytest.raises(InputError) as exc:
        tune([])
    assert exc.value.field == "logs"


def test_params_may_be_one_name():
    res = tune(SHELF, params="estimator.accel_psd", intervals=False, max_evals=5)
    assert [p.name for p in res.params] == ["estimator.accel_psd"]


def test_an_unknown_parameter_is_named_in_the_library_s_words_and_a_latency_gets_a_hint():
    from fusion.errors import InputError
    with pytest.raises(InputError) as exc:
        tune(SHELF, params=["sensor.ir_front.latency_s"])
    assert exc.value.field == "params"
    assert "latency=True" in exc.value.message and "--" not in exc.value.message
    with pytest.raises(InputError) as exc:
        tune(SHELF, params=["sensor.ir_front.sigma_q"])
    assert "latency" not in exc.value.message.split(";")[0]


def test_the_command_names_its_own_options_for_an_unknown_latency(tmp_path, capsys):
    out = tmp_path / "t.toml"
    assert main(["tune", SHELF, "-o", str(out), "--param", "sensor.ir_front.latency_s"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("rangefuse tune: error: --param: unknown "
                                               "parameter 'sensor.ir_front.latency_s'")
    assert "tuned only with --latency" in err[0]
    assert not out.exists()
    assert main(["tune", SHELF, "-o", str(out), "--param", "sensor.nope.latency_s"]) == 2
    assert "--latency" not in capsys.readouterr().err


def test_truth_fit_of_sensor_noise_alone_is_scored_before_it_is_written(monkeypatch):
    # With only sensor noise to fit there is no direct search to score the fit's last
    # values; they are run once, so the rig written is the fit itself or, if an earlier
    # round scored higher against truth, that round, which the summary then names.
    import replay.tune as T
    fits, runs = [], []
    real_fit, real_run = T._fit_to_truth, T._Problem.run

    def record_fit(*a, **k):
        out = real_fit(*a, **k)
        fits.append(dict(out[0]))
        return out

    def record_run(self, values):
        runs.append(dict(values))
        return real_run(self, values)

    monkeypatch.setattr(T, "_fit_to_truth", record_fit)
    monkeypatch.setattr(T._Problem, "run", record_run)
    names = ["sensor.echo_front.sigma_m", "sensor.echo_front.sigma_frac"]
    res = tune(SHELF, objective="truth", params=names)
    assert any(all(r.get(n) == v for n, v in fits[0].items()) for r in runs)  # it was run
    written = {n: res.value(n) for n in names}
    assert written == {n: res.history[-1]["params"][n] for n in names}
    if written != fits[0]:
        assert "scored highest against truth and is the one written" in res.summary()


def test_the_tuned_rig_text_keeps_line_ends_and_edits_only_a_sensors_block():
    # A rig whose direction is named like a sensor (the direction comes first in the
    # file), written with CRLF line ends, with a note of the user's under an old tuning
    # head: the sensor's own block is edited, the line ends and the note stay.
    from replay.tune import Parameter, apply, rig_text_with
    text = open(os.path.join(DATA, "tuning-run.rig.toml")).read()
    text = text.replace('name = "front"', 'name = "echo_a"').replace(
        'direction = "front"', 'direction = "echo_a"')
    text = "# tuned by rangefuse tune (before):\n#   my own note\n" + text
    crlf = text.replace("\n", "\r\n")
    rig = Rig.from_toml(crlf)
    params = [Parameter("sensor.echo_a.sigma_m", 0.0029)]
    tuned = apply(rig, params)
    out = rig_text_with(crlf, tuned, params, ["# tuned by rangefuse tune (now):"])
    assert _written(Rig.from_toml(out)) == _written(tuned)
    assert out.count("\r\n") == out.count("\n")        # every line end is CRLF
    assert "#   my own note" in out and "(before)" not in out
    old = [ln for ln in crlf.split("\r\n")]
    changed = [ln for ln in out.split("\r\n") if ln not in old]
    assert changed == ["# tuned by rangefuse tune (now):", "sigma_m = 0.0029"]
