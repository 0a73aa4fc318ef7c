"""``modescope info MODEL.npz``: summarise a model file."""

from __future__ import annotations

import argparse
import sys

import numpy as np

from modescope.app.cli.common import EXIT_OK, EXIT_UNUSABLE, positive_int
from modescope.app.words import counted
from modescope.core.errors import ModescopeError
from modescope.core.output.model_file import load_model
from modescope.core.review.accuracy import describe_accuracy
from modescope.core.review.marks import EXCLUDE, KEEP
from modescope.core.review.rank import default_rank, energy_rank, gavish_donoho

__all__ = ["register", "run", "marks_line", "energy_table"]


def register(subparsers) -> None:
    """Add the ``info`` verb to an argparse sub-parsers object."""
    i = subparsers.add_parser("info", help="summarise a model file")
    i.add_argument("model", metavar="MODEL.npz")
    i.add_argument("--ranks", type=positive_int, default=10, metavar="N",
                   help="list the energy captured at the first N ranks (default 10)")
    i.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    """Run ``modescope info``; return the exit code."""
    try:
        d = load_model(args.model)
    except ModescopeError as exc:
        print(f"modescope info: {exc}", file=sys.stderr)
        return EXIT_UNUSABLE
    rows, cols, ch = d.image_shape
    meta = d.metadata
    print(f"model:        {args.model}")
    print(f"images:       {counted(d.n_images, 'image')}")
    print(f"image size:   {rows} rows x {cols} cols, {'gray' if ch == 1 else 'rgb'} "
          f"({d.n_pixels} values per image)")
    if meta.get("downscale", 1) != 1:
        src = meta.get("source_size", ["?", "?"])
        print(f"source size:  {src[0]} x {src[1]} (downscaled by {meta['downscale']})")
    print(f"rank:         {d.rank}")
    print(f"state:        {'final (refinement passes done)' if d.exact else 'streaming snapshot'}"
          f"{' (cancelled run)' if meta.get('stage') == 'cancelled' else ''}")
    print(f"accuracy:     {describe_accuracy(d)}")
    passes = meta.get("refinement", {}).get("passes") if isinstance(meta.get("refinement"),
                                                                      dict) else None
    if passes:
        print(f"passes:       {counted(passes, 'pass', 'passes')} after the learning pass")
    if meta.get("created"):
        print(f"created:      {meta['created']}")
    print(f"energy:       total {d.total_energy:.6g}")
    if not d.rank:
        print("basis images: none (the images do not vary: each one equals the mean image)")
    for line in energy_table(d, args.ranks):
        print(line)
    if d.rank:
        chosen, reason = default_rank(d)
        print(f"suggested rank: {chosen}, {reason} (the default of the desktop program and of "
              "every command's --rank)")
        print(f"other rules:    {energy_rank(d, 0.9).describe()}", end="")
        gd = gavish_donoho(d)
        print(f"; {gd.rank} by the Gavish-Donoho hard threshold" if gd.rank is not None
              else f"; Gavish-Donoho: not applicable ({gd.note})")
    marks = marks_line(d)
    if marks:
        print(marks)
    problems = meta.get("problems", [])
    if problems:
        print(f"skipped files: {counted(len(problems), 'file')} (first: {problems[0]['path']}: "
              f"{problems[0]['reason']})")
    return EXIT_OK


def marks_line(d) -> str:
    """Return the ``review marks:`` line of a decomposition, or "" when no image is marked.

    Parameters
    ----------
    d : Decomposition

    Returns
    -------
    str
        e.g. ``"review marks: 2 keep, 1 exclude, 237 not reviewed"``.
    """
    marks = np.asarray(d.marks)
    keep, exclude = int(np.sum(marks == KEEP)), int(np.sum(marks == EXCLUDE))
    if not keep and not exclude:
        return ""
    rest = int(marks.size) - keep - exclude
    return f"review marks: {keep:,} keep, {exclude:,} exclude, {rest:,} not reviewed"


def energy_table(d, ranks: int) -> list[str]:
    """Return the lines of the energy table for the first ``ranks`` ranks (none at rank 0).

    Every column is right-aligned under its header; shares are percentages.
    """
    n = min(int(ranks), d.rank)
    if n <= 0:
        return []
    shares, cum = d.energy_shares(), d.cumulative_energy()
    errors = d.singular_value_error
    header = ("rank", "singular value", "certified error", "share %", "cumulative %")
    body = [(str(r + 1), f"{d.singular_values[r]:.6g}",
             "—" if errors is None else f"{errors[r]:.2g}",
             f"{100 * shares[r]:.2f}", f"{100 * cum[r]:.2f}") for r in range(n)]
    widths = [max(len(h), *(len(row[c]) for row in body)) for c, h in enumerate(header)]
    return ["  " + "  ".join(cell.rjust(widths[c]) for c, cell in enumerate(row))
            for row in (header, *body)]
