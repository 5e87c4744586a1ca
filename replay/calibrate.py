"""``rangefuse calibrate``: fit an IR triangulation ranger's curve to measured pairs.

Reads a CSV of (range, voltage) or (range, ADC count) pairs, fits both curve models
(`fusion.sensors.triangulation.fit_report`), prints the report and writes the chosen
curve as a TOML ``[curve]`` table, with an optional figure of the fit.
"""
from __future__ import annotations

import argparse
import csv
import io
import math
import os

import numpy as np

from fusion import __version__
from fusion._toml import dumps
from fusion.errors import InputError
from fusion.sensors.adc import adc_quantisation_sigma_v, counts_to_volts
from fusion.sensors.triangulation import SATURATING_INVERSE, TABLE, fit_report

from ._io import FIGURE_SUFFIXES, write_atomic

__all__ = ["register", "run", "read_pairs"]

EPILOG = """\
The CSV needs a header row naming a range_m column and either a volts column or a
counts column (raw ADC counts, decoded with --bits and --vref); other columns are
ignored. Repeat readings at one range are welcome: they measure the noise.

example:
  rangefuse calibrate left_ir_pairs.csv -o left_ir.toml --plot left_ir.png

  with left_ir_pairs.csv:
      range_m,volts
      0.05,1.31
      0.10,2.36
      ...

  from raw 10-bit counts on a 5 V reference:
      rangefuse calibrate pairs.csv -o left_ir.toml --bits 10 --vref 5.0

Using the curve: CURVE.toml holds a [curve] table and a [calibration] record of the
fit. In a rig file the curve belongs to its sensor: copy the [curve] table below the IR
ranger's [[sensor]] entry and rename its header to [sensor.curve] (docs/rig.md,
"Curves"); leave [calibration] out of the rig.
"""

USAGE_NOTE = ("to use it: copy its [curve] table into the rig file below the IR ranger's "
              "[[sensor]] entry,\n  renamed [sensor.curve] (docs/rig.md, \"Curves\"); "
              "[calibration] only records the fit")


# An IR triangulation ranger's analog output stays inside its supply (logic supplies of
# 3.3-5 V; common practice, no source): a pair far outside is a typing or unit slip.
_VOLTS_PLAUSIBLE = (-1.0, 30.0)


def register(subparsers):
    p = subparsers.add_parser(
        "calibrate", help="fit an IR triangulation ranger's voltage-vs-range curve",
        description=("Fit an IR triangulation ranger's voltage-vs-range curve to measured\n"
                     "(range, voltage) pairs. Both the saturating-inverse family and a\n"
                     "calibration table are fitted; 'auto' keeps the one with the lower AICc.\n"
                     "Prints the fit and the residuals and writes the curve as TOML."),
        epilog=EPILOG, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("pairs", metavar="PAIRS.csv", help="CSV with range_m and volts (or counts) columns")
    p.add_argument("-o", "--output", "--out", dest="output", metavar="CURVE.toml", required=True,
                   help="where to write the curve (written atomically; never over the input)")
    p.add_argument("--plot", metavar="FIG.png", help="also draw the fit and its residuals")
    p.add_argument("--model", choices=("auto", SATURATING_INVERSE, TABLE), default="auto",
                   help="curve model (default: auto, by AICc)")
    p.add_argument("--bits", type=int, metavar="N", help="ADC resolution for a counts column")
    p.add_argument("--vref", type=float, metavar="V", help="ADC reference voltage for a counts column")
    p.add_argument("--min-range", dest="min_range_m", type=float, metavar="M",
                   help="start of the valid span, metres (default: the nearest pair)")
    p.add_argument("--max-range", dest="max_range_m", type=float, metavar="M",
                   help="end of the valid span, metres (default: the farthest pair)")
    p.set_defaults(func=run)
    return p


def read_pairs(path):
    """Read calibration pairs from a CSV file.

    Returns
    -------
    range_m : ndarray
    values : ndarray
        Volts or counts, per ``kind``.
    kind : {"volts", "counts"}
    rows : ndarray of int
        The file row (1-based; the header is row 1 when it is the first line) of each pair.

    Raises
    ------
    InputError
        Unreadable file, missing or doubled column, short row or non-numeric cell;
        naming the file, column and row.
    """
    try:
        f = open(path, newline="", encoding="utf-8-sig")
    except OSError as exc:
        raise InputError(f"cannot read the pairs file ({exc.strerror})", file=path) from None
    with f:
        reader = csv.reader(f)
        try:
            header = None
            for cells in reader:
                if any(c.strip() for c in cells):
                    header = [c.strip() for c in cells]
                    header_row = reader.line_num
                    break
            if header is None:
                raise InputError("the file is empty; expected a header row with range_m and volts "
                                 "(or counts)", file=path)
            for name in set(header):
                if name and header.count(name) > 1:
                    raise InputError("the column appears twice in the header", file=path,
                                     field=name, row=header_row)
            if "range_m" not in header:
                raise InputError(f"no range_m column (the header has {', '.join(header)}); expected "
                                 "range_m and volts (or counts)", file=path, field="range_m",
                                 row=header_row)
            has_v, has_c = "volts" in header, "counts" in header
            if has_v == has_c:
                what = "both volts and counts" if has_v else "neither volts nor counts"
                raise InputError(f"the header has {what}; expected exactly one of them beside "
                                 "range_m", file=path, field="volts", row=header_row)
            kind = "volts" if has_v else "counts"
            cols = (("range_m", header.index("range_m")), (kind, header.index(kind)))
            need = max(i for _, i in cols) + 1
            ranges, values, rows = [], [], []
            for cells in reader:
                if not any(c.strip() for c in cells):
                    continue
                row = reader.line_num
                if len(cells) < need:
                    raise InputError(f"the row has {len(cells)} cell(s); expected at least {need} "
                                     "to reach the range_m and " + kind + " columns", file=path,
                                     row=row)
                if len(cells) > len(header) and any(c.strip() for c in cells[len(header):]):
                    raise InputError(f"the row has {len(cells)} cells but the header names "
                                     f"{len(header)}; expected one value per column", file=path,
                                     row=row)
                got = []
                for name, i in cols:
                    text = cells[i].strip()
                    try:
                        got.append(float(text))
                    except ValueError:
                        shown = repr(text) if text else "an empty cell"
                        raise InputError(f"{shown} is not a number; expected {name} as a decimal "
                                         "number", file=path, field=name, row=row) from None
                lo, hi = _VOLTS_PLAUSIBLE
                if kind == "volts" and (got[1] < lo or got[1] > hi):  # NaN: the fit says
                    raise InputError(f"{got[1]:g} V is no ranger output; expected volts between "
                                     f"{lo:g} and {hi:g}", file=path, field="volts", row=row)
                ranges.append(got[0])
                values.append(got[1])
                rows.append(row)
        except csv.Error as exc:
            raise InputError(f"not a readable CSV file ({exc})", file=path,
                             row=reader.line_num) from None
        except UnicodeDecodeError:
            raise InputError("not a text file in UTF-8", file=path) from None
    return (np.array(ranges, dtype=float), np.array(values, dtype=float), kind,
            np.array(rows, dtype=np.int64))


def _curve_document(result, source):
    curve = result.curve
    calib = {"source": os.path.basename(source), "pairs": int(len(result.range_m)),
             "model": result.model, "written_by": f"rangefuse {__version__} calibrate"}
    for cand in result.candidates:
        key = cand.model.replace("-", "_")
        if cand.ok:
            calib[f"aic_{key}"] = cand.aic
            calib[f"aicc_{key}"] = cand.aicc
            calib[f"residual_sigma_v_{key}"] = cand.residual_sigma_v
    head = ("# IR triangulation ranger curve: output voltage against range.\n"
            "# To use it in a rig file, copy the [curve] table below the IR ranger's\n"
            "# [[sensor]] entry and rename its header to [sensor.curve] (docs/rig.md,\n"
            "# \"Curves\"). [calibration] records the fit; it does not go into a rig.\n"
            "# (TriangulationCurve.from_dict reads the [curve] table as it is.)\n")
    return head + dumps({"curve": curve.to_dict(), "calibration": calib}, trim_float_noise=True)


def _plot_bytes(result, fmt, title):
    # The figure is drawn off screen without pyplot, so no global backend is touched.
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(7.5, 6.5))
    FigureCanvasAgg(fig)
    ax, ax_res = fig.subplots(2, 1, sharex=True, gridspec_kw={"height_ratios": [3, 1.3]})
    r, v = result.range_m, result.volts
    r_max = 1.1 * float(np.max(r))
    grid = np.linspace(0.0, r_max, 600)
    ax.plot(r, v, "o", ms=3.5, color="0.25", label="measured pairs", zorder=3)
    styles = {SATURATING_INVERSE: ("-", "tab:blue"), TABLE: ("--", "tab:orange")}
    for cand in result.candidates:
        if not cand.ok:
            continue
        ls, color = styles[cand.model]
        chosen = cand.model == result.model
        label = (f"{cand.model} (AICc {cand.aicc:.1f}" + (", chosen)" if chosen else ")")
                 if math.isfinite(cand.aicc) else f"{cand.model} (AICc inf)")
        # a table says nothing beyond its pairs: its line stops there
        g = grid if cand.model != TABLE else grid[(grid >= r.min()) & (grid <= r.max())]
        ax.plot(g, cand.curve.volts(g), ls, color=color, lw=2.0 if chosen else 1.2,
                label=label)
        ax_res.plot(r, v - cand.fitted_volts, "o" if chosen else "x", ms=3.5 if chosen else 3,
                    color=color, alpha=1.0 if chosen else 0.6, label=cand.model)
    c = result.curve
    ax.plot([c.peak_range_m], [c.peak_volts], "v", color="tab:red", ms=9,
            label=f"peak {c.peak_volts:.3g} V at {c.peak_range_m:.3g} m", zorder=4)
    ax.axvspan(c.min_range_m, min(c.max_range_m, r_max), color="0.9", zorder=0,
               label="valid span")
    ax.set_ylabel("output voltage (V)")
    ax.set_title(title)
    ax.legend(fontsize=8, loc="upper right")
    ax.grid(True, alpha=0.3)
    ax_res.axhline(0.0, color="0.4", lw=0.8)
    ax_res.set_xlabel("range (m)")
    ax_res.set_ylabel("residual (V)")
    ax_res.set_xlim(0.0, r_max)
    ax_res.grid(True, alpha=0.3)
    ax_res.legend(fontsize=7, loc="upper right")
    fig.tight_layout()
    buf = io.BytesIO()
    fig.savefig(buf, format=fmt, dpi=120)
    return buf.getvalue()


def _plot_format(path):
    """The figure format of `path` from its suffix, among those every --plot takes."""
    ext = os.path.splitext(path)[1].lower()
    if ext not in FIGURE_SUFFIXES:
        raise InputError(f"cannot tell the figure format from the name; expected one of "
                         f"{', '.join(FIGURE_SUFFIXES)}", file=path, field="--plot")
    return ext.lstrip(".")


def run(args) -> int:
    # -o and --plot were checked by the command line before this runs (not an input,
    # not one path, a folder that takes files, a figure suffix); both files are put in
    # place together when the command ends (replay._io.command_outputs).
    src, out, plot = args.pairs, args.output, args.plot
    fmt = _plot_format(plot) if plot is not None else None

    range_m, values, kind, rows = read_pairs(src)
    adc_note = ""
    if kind == "counts":
        missing = [opt for opt, val in (("--bits", args.bits), ("--vref", args.vref)) if val is None]
        if missing:
            raise InputError(f"the pairs are ADC counts; give {' and '.join(missing)} to decode "
                             "them to volts", file=src, field="counts")
        try:
            volts = counts_to_volts(values, args.bits, args.vref)
        except InputError as exc:
            row = int(rows[exc.row]) if exc.field == "counts" and exc.row is not None else None
            raise InputError(exc.message, file=src, field=exc.field, row=row) from None
    else:
        volts = values
    if args.bits is not None or args.vref is not None:
        if args.bits is None or args.vref is None:
            raise InputError("--bits and --vref go together", field="--bits" if args.bits is None
                             else "--vref")
        adc_note = (f"ADC quantisation alone: {adc_quantisation_sigma_v(args.bits, args.vref):.3g} V "
                    f"(one sigma, {args.bits} bits on {args.vref:g} V)")
        if kind == "volts":
            adc_note += "; the volts column was used as it is"

    # (a span given on the command line is named by its option by replay.cli)
    result = fit_report(range_m, volts, args.model, min_range_m=args.min_range_m,
                        max_range_m=args.max_range_m, where=src, rows=rows)
    # Everything that can fail is done before the first file is written.
    document = _curve_document(result, src)
    figure = _plot_bytes(result, fmt, f"{os.path.basename(src)}: {result.model}") if plot else None

    # Files first: the curve is kept even if the report cannot be printed (in a command,
    # both files wait for its end, so that they appear together).
    write_atomic(out, document)
    if figure is not None:
        write_atomic(plot, figure)
    print(result.summary())
    if adc_note:
        print(adc_note)
    print(f"wrote {out}" + (f" and {plot}" if figure is not None else ""))
    print(USAGE_NOTE)
    return 0

