"""``swarmaudit compare REF CAND``: is the candidate run the same as the reference, and where not.

Both runs take the same run, layout and column options (the shared ones of
:mod:`app.options`). Exit 0 when every paired snapshot agrees within the
tolerances given, 1 naming the first snapshot, species and measure that does
not, 2 on bad input. ``--out DIR`` writes the ``compare_*.csv`` tables, the
figures and ``report.html``.
"""

from __future__ import annotations

import argparse
import os
import sys

from .. import __version__
from ..core.errors import OptionError
from ..core.outputs import FIGURE_DIR, REPORT_NAME



def add_compare_parser(sub, physics_options, positive_float) -> argparse.ArgumentParser:
    """The ``compare`` subcommand: two runs, the shared options, the tolerances of the gate."""
    from .options import add_run_options
    p = sub.add_parser("compare", help="two runs side by side: particle by particle, as distributions, "
                                       "block by block, totals; a gate")
    add_run_options(p)
    for action in p._actions:     # the shared positional, read here as exactly two runs
        if action.dest == "run":
            action.metavar = "REF CAND"
            action.help = ("the reference run and the candidate run (each a folder, a quoted glob or "
                           "one snapshot file); every other option applies to both")
    physics_options(p)
    g = p.add_argument_group("pairing")
    g.add_argument("--pair", choices=("step", "time"), default="step",
                   help="pair snapshots by equal step (default) or by time")
    g.add_argument("--time-tol", type=float, metavar="DT",
                   help="with --pair time: largest time difference of a pair (default: a millionth "
                        "of the reference's largest time)")
    g.add_argument("--mode", choices=("auto", "particles", "distributions", "both"), default="auto",
                   help="particles: by id; distributions: KS and Wasserstein per column; auto "
                        "(default): by id where the ids match, as distributions where they do not")
    t = p.add_argument_group("gate")
    t.add_argument("--position-cells", type=float, metavar="X",
                   help="fail when a matched particle moved more than X level-0 cells, or a particle "
                        "is in one run only")
    t.add_argument("--ks-p", type=float, metavar="P",
                   help="fail when a KS or block-census chi-square p-value is below P, after the "
                        "correction for testing many columns, species and snapshots at once")
    t.add_argument("--ks-correction", choices=("holm", "bh", "none"), default="holm",
                   help="that correction: holm (default; the chance of any false failure stays "
                        "below P), bh (Benjamini-Hochberg: the expected share of false failures "
                        "among them), none")
    t.add_argument("--rtol", type=float, metavar="R",
                   help="fail when a relative momentum difference or a checked total differs by more than R")
    p.add_argument("--out", metavar="DIR", help="write the compare_*.csv tables, figures and report.html")
    p.add_argument("--width", type=int, default=1200, help="figure width in pixels (default 1200)")
    p.add_argument("--height", type=int, default=420, help="height of one row of figures (default 420)")
    p.add_argument("--dpi", type=int, default=100, help="dots per inch of the PNGs (default 100)")
    p.add_argument("--quiet", action="store_true", help="only the verdict")
    return p


def _contexts(args):
    from .options import context_from_options
    if len(args.run) != 2:
        raise OptionError(f"compare takes two runs, the reference and the candidate; got {len(args.run)} "
                          "(quote a glob so that it stays one argument)")
    return [context_from_options(args, run=path) for path in args.run]


def run_compare(args, out=None, err=None) -> int:
    from ..audit import compare as C
    out = out or sys.stdout
    err = err or sys.stderr
    ref, cand = _contexts(args)
    if args.out:
        _guard_out(args.out, (ref, cand), args)
    comp = C.compare_runs(ref, cand, pair=args.pair, time_tol=args.time_tol, mode=args.mode)
    result = C.gate(comp, args.position_cells, args.ks_p, args.rtol, args.ks_correction)
    if not args.quiet:
        print(f"reference: {ref.run.source}", file=out)
        print(f"candidate: {cand.run.source}", file=out)
        for line in C.summary_lines(comp):
            print(line, file=out)
    for line in result.lines:
        print(line, file=out)
    if args.out:
        written = write_comparison(args.out, comp, result, ref, cand, args)
        if not args.quiet:
            print(f"wrote {len(written)} files to {os.path.abspath(args.out)}", file=out)
    for note in comp.notes:
        print(f"note: {note}", file=err)
    return 0 if result.ok else 1


def _guard_out(folder, ctxs, args) -> None:
    from .export import guard_run_folder, input_files
    real = os.path.realpath(folder)
    if os.path.exists(folder) and not os.path.isdir(folder):
        raise OptionError(f"--out {folder} is a file, not a folder")
    for ctx in ctxs:
        guard_run_folder(folder, ctx)
        inputs = input_files(ctx, args)
        if any(os.path.dirname(p) == real for p in inputs):
            raise OptionError(f"--out {folder} holds input files of a run; choose another folder")


def write_comparison(folder: str, comp, result, ref, cand, args) -> list[str]:
    """The tables, the figures and report.html of a comparison under ``folder``."""
    from ..audit.compare import summary_lines
    from .compare_figures import comparison_figures
    from .report import render_report, write_report, comparison_sections, Verdict
    os.makedirs(folder, exist_ok=True)
    written = []
    for name, df in comp.tables().items():
        path = os.path.join(folder, name)
        df.to_csv(f"{path}.part", index=False)
        os.replace(f"{path}.part", path)
        written.append(path)
    figdir = os.path.join(folder, FIGURE_DIR)
    os.makedirs(figdir, exist_ok=True)
    figures = comparison_figures(comp, ref, cand, figdir, width=args.width, height=args.height, dpi=args.dpi)
    written.extend(f.path for f in figures)
    from .view_policy import run_name as _run_name
    facts = [("reference", str(ref.run.source)), ("candidate", str(cand.run.source)),
             ("paired snapshots", f"{len(comp.pairing.pairs)} by {comp.pairing.by}"),
             ("mode", comp.mode)]
    tol = ", ".join(f"{k.replace('_', '-')} {v:g}" for k, v in result.tolerances.items() if v is not None)
    facts.append(("tolerances", tol or "none given"))
    verdict = Verdict(rtol=0.0, ok=result.ok, lines=result.lines[1:] if result.ok else result.lines,
                      head=(result.lines[0] if result.ok else "Compare failed: the runs differ beyond the "
                                                               "tolerances."))
    text = render_report(f"{_run_name(cand)} against {_run_name(ref)}", facts,
                         comparison_sections(comp, figures, summary_lines(comp)), verdict=verdict,
                         notes=comp.notes, version=__version__)
    path = write_report(os.path.join(folder, REPORT_NAME), text)
    written.append(path)
    return written
