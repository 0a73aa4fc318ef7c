"""``modescope frequencies MODEL.npz``: frequencies, pairs and growth rates of a sequence.

For a model whose images are frames in time order, print for each of the leading modes the
dominant frequency of its weights and the share of its power there, the pairs of modes that
travel together (nearly equal singular values, weights a quarter period apart), and the
frequencies and growth rates of a linear model of the weights (exact DMD), with the reasons to
distrust that model when there are any. Modes are numbered from 1, as in the desktop program.

Exit codes: 0 success, 1 unreadable or unusable input or a refused ``--csv`` file (the message
goes to stderr), 2 wrong usage.
"""

from __future__ import annotations

import argparse
import math
import os

from modescope.app.cli.common import check_rank, error, fmt, positive_int, resolve_rank
from modescope.app.cli.writing import check_output
from modescope.app.words import counted, unexplained
from modescope.core.errors import ModescopeError
from modescope.core.output.model_file import load_model
from modescope.core.review.dynamics import caution, dynamics_of
from modescope.core.review.frequencies import (CSV_COLUMNS, MIN_FRAMES, frame_rate_of,
                                               frequencies_of, write_frequencies_csv)

__all__ = ["register", "run", "frame_rate", "rate_line", "frequency_table", "dynamics_lines"]


def frame_rate(text: str) -> float:
    """argparse type of ``--frame-rate``: a finite number of frames per second above 0."""
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number of frames per second, got "
                                         f"{text!r}") from None
    if not (math.isfinite(value) and value > 0):
        raise argparse.ArgumentTypeError(f"expected a finite number of frames per second "
                                         f"above 0, got {text}")
    return value


def register(subparsers) -> None:
    """Add the ``frequencies`` verb to an argparse sub-parsers object."""
    f = subparsers.add_parser(
        "frequencies", help="frequencies, pairs and growth rates of a sequence's modes",
        description="Read the weights of each mode as a time series (images in frame "
                    "order): the dominant frequency and its share of the power (periodogram, "
                    "Hann window, linear trend removed), pairs of modes in quadrature (a "
                    "travelling pattern), and the frequencies and growth rates of a linear "
                    "model of the weights (exact dynamic mode decomposition).")
    f.add_argument("model", metavar="MODEL.npz", help="model file saved by modescope")
    f.add_argument("--rank", type=positive_int, default=None, metavar="K",
                   help="leading modes to read (default: the smallest rank capturing 95 %% of "
                        "the energy)")
    f.add_argument("--frame-rate", type=frame_rate, default=None, metavar="HZ",
                   help="frames per second (default: the rate stored in the model; when it "
                        "has none, 1 frame per unit time and frequencies in cycles per frame)")
    f.add_argument("--csv", default=None, metavar="FILE",
                   help=f"also write one row per mode to this CSV file (columns "
                        f"{', '.join(CSV_COLUMNS)})")
    f.add_argument("--overwrite", action="store_true",
                   help="replace the CSV file if it exists (a source image or the model file "
                        "is never replaced)")
    f.set_defaults(func=run)


def rate_line(report, given: bool) -> str:
    """Return the line that says which frame rate was used and where it came from."""
    if not report.rate_known:
        return ("Frame rate: unknown (none stored in the model; --frame-rate HZ gives one): 1 "
                "frame per unit time, frequencies in cycles per frame")
    where = "given by --frame-rate" if given else "stored in the model"
    return f"Frame rate: {report.frame_rate:g} Hz ({where})"


def frequency_table(report) -> list[str]:
    """Return the per-mode table (header first), numbers right-aligned, modes from 1."""
    head = ("mode", "singular value", f"dominant frequency ({report.unit})",
            "power share (%)", "pair")
    rows = []
    for j in range(report.rank):
        f = report.dominant[j]
        rows.append((str(j + 1), fmt(float(report.singular_values[j])),
                     "-" if math.isnan(f) else f"{f:.4g}",
                     f"{100 * report.power_share[j]:.1f}",
                     "" if report.pair_of[j] < 0 else str(int(report.pair_of[j]) + 1)))
    widths = [max(len(head[c]), *(len(r[c]) for r in rows)) for c in range(len(head))]
    lines = ["  ".join(h.rjust(w) for h, w in zip(head, widths)).rstrip()]
    lines += ["  ".join(v.rjust(w) for v, w in zip(r, widths)).rstrip() for r in rows]
    return lines


def _pair_lines(report) -> list[str]:
    if report.pairs_note:
        return [f"Pairs: none looked for ({report.pairs_note})."]
    if not report.pairs:
        return ["Pairs: none (no two modes with nearly equal singular values whose weights "
                "are a quarter period apart)."]
    lines = [f"Pairs ({counted(len(report.pairs), 'pair')}: nearly equal singular values, "
             "weights a quarter period apart, as a travelling pattern gives):"]
    for p in report.pairs:
        a, b = p.modes
        lines.append(f"  modes {a + 1} and {b + 1}: {p.frequency:.4g} {report.unit}, phase "
                     f"lag {p.phase_lag:+.0f} degrees, coherence {p.coherence:.2f}, singular "
                     f"value ratio {p.singular_value_ratio:.3f}")
    return lines


def dynamics_lines(dyn, rank: int) -> list[str]:
    """Return the DMD table (oscillations first by amplitude) and the caution lines."""
    lines = [f"Dynamics: exact DMD of the weights of modes 1-{rank} (a linear one-step model "
             "with a constant offset); one line per eigenvalue, conjugates once:"]
    head = (f"frequency ({dyn.unit})", f"growth rate ({dyn.rate_unit})", "amplitude")
    rows = [(f"{dyn.frequencies[i]:.4g}", f"{dyn.growth_rates[i]:+.4g}",
             fmt(float(dyn.amplitudes[i]))) for i in dyn.oscillations]
    widths = [max(len(head[c]), *(len(r[c]) for r in rows)) if rows else len(head[c])
              for c in range(3)]
    lines.append("  " + "  ".join(h.rjust(w) for h, w in zip(head, widths)))
    lines += ["  " + "  ".join(v.rjust(w) for v, w in zip(r, widths)) for r in rows]
    lines.append(f"One-step fit: {unexplained(dyn.residual)} of the next frame's weights "
                 "unexplained.")
    notes = caution(dyn)
    if notes:
        lines.append("Caution: " + "; ".join(notes) + ".")
    else:
        lines.append("Caution: a linear model describes these weights only over the frames "
                     "seen; growth rates are not forecasts.")
    return lines


def run(args: argparse.Namespace) -> int:
    """Print the frequencies, pairs and dynamics of a model (and write the CSV when asked)."""
    try:
        if args.csv is not None and os.path.lexists(args.csv) and not args.overwrite:
            return error("frequencies", f"{args.csv} already exists; use --overwrite to "
                                        "replace it", 1)
        d = load_model(args.model)
        code = check_rank("frequencies", args.rank, d)
        if code is not None:
            return code
        if d.rank == 0:
            return error("frequencies", f"{args.model}: the model has no basis images (the "
                                        "images do not vary), so no weights to read", 1)
        if d.n_images < MIN_FRAMES:
            return error("frequencies", f"{args.model}: a spectrum needs at least {MIN_FRAMES} "
                                        f"frames, the model has {d.n_images}", 1)
        rank, rank_line = resolve_rank(args.rank, d)
        rate = args.frame_rate if args.frame_rate is not None else frame_rate_of(d)
        report = frequencies_of(d, rank, rate)
        dyn = dynamics_of(d, rank, rate)
        csv_path = None
        if args.csv is not None:
            if not check_output("frequencies", "--csv", args.csv,
                                overwrite=bool(args.overwrite), sources=d.paths,
                                inputs=[args.model]):
                return 1
            csv_path = write_frequencies_csv(args.csv, report, overwrite=bool(args.overwrite),
                                             protect=d.paths)
    except (ModescopeError, ValueError, OSError) as exc:
        return error("frequencies", str(exc), 1)
    print(f"Model {args.model}: {counted(d.n_images, 'frame')} in column order")
    print(rate_line(report, args.frame_rate is not None))
    print(rank_line)
    print(f"Spectra: periodogram of each mode's weights (Hann window, linear trend removed); "
          f"one bin = {report.resolution:.4g} {report.unit}")
    for line in frequency_table(report) + _pair_lines(report) + dynamics_lines(dyn, rank):
        print(line)
    if csv_path is not None:
        print(f"CSV written: {csv_path} (frequencies in {report.unit}; power share 0-1; pair "
              "is the other mode's number)")
    return 0
