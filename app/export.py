"""``swarmaudit export RUN --out DIR``: figures, tables and report.html, with no display.

Each particle view is the view of a dashboard state (``ViewState``) as
``view_policy.particle_view`` decides it: axes, ranges, colour map, scale,
grid and labels come from the one policy the dashboard draws with, and
``--view LINK`` draws the very state a dashboard link holds. The audit
figures show the ``app.figure_data`` records the screen's figures are built
from. Every PNG is drawn with matplotlib's object API on the Agg canvas at
exactly ``--width`` x ``--height`` pixels (``app.mpl_figures``); the plotting
stack of the screen (holoviews, bokeh, panel) is never imported.
"""

from __future__ import annotations

import math
import os
import re
import secrets
import shutil
import time
from dataclasses import dataclass, field

import numpy as np

from ..core import interrupt
from ..core.errors import InputError, OptionError, SwarmAuditError
from ..core.frame import transient_columns
from ..core.outputs import FIGURE_DIR, REPORT_NAME, TABLE_NAMES
from . import view_policy as policy

MOVIE_DIR = "movies"



# options -------------------------------------------------------------------------------------
@dataclass
class ExportOptions:
    out: str
    snapshots: str = "first,last"
    rtol: float | None = None
    width: int = 900
    height: int = 700
    dpi: int = 100
    cmap: str = policy.DEFAULT_CMAP
    scale: str = policy.DEFAULT_SCALING
    space: tuple[str, str] | None = None
    phase: tuple[str, str] | None = None
    ranges: dict[str, tuple[float, float]] = field(default_factory=dict)
    quiet: bool = False
    fontscale: float = 1.15
    view: str | None = None         # a dashboard link (or its query): draw that state too
    movie: str | None = None        # mp4 | gif | webp: a movie of each view over every snapshot
    #: draw the figures in a second process (None: when a core is spare; figure_writer)
    figure_process: bool | None = None

    @classmethod
    def from_args(cls, args) -> "ExportOptions":
        width, height, dpi = int(args.width), int(args.height), int(args.dpi)
        for name, v, lo, hi in (("--width", width, 120, 20000), ("--height", height, 120, 20000),
                                ("--dpi", dpi, 20, 1200)):
            if not lo <= v <= hi:
                raise OptionError(f"{name} takes a whole number from {lo} to {hi}, got {v}")
        cmap = str(args.cmap)
        check_cmap(cmap)
        scale = getattr(args, "scale", policy.DEFAULT_SCALING) or policy.DEFAULT_SCALING
        if scale not in policy.SCALINGS:
            raise OptionError(f"--scale takes linear, log or eq_hist, got '{scale}'")
        return cls(out=args.out, snapshots=args.snapshots or "first,last", rtol=args.rtol,
                   width=width, height=height, dpi=dpi, cmap=cmap, scale=scale,
                   space=parse_pair(args.space, "--space"), phase=parse_pair(args.phase, "--phase"),
                   ranges=parse_ranges(getattr(args, "range", None) or []),
                   quiet=bool(getattr(args, "quiet", False)), view=getattr(args, "view", None),
                   movie=_movie_format(args))


def _movie_format(args):
    fmt = getattr(args, "movie", None)
    if fmt is None:
        return None
    fmt = str(fmt).lower().lstrip(".")
    if fmt not in ("mp4", "gif", "webp"):
        raise OptionError(f"--movie takes mp4, gif or webp, got '{getattr(args, 'movie')}'")
    return fmt


def check_cmap(name: str) -> None:
    """Refuse a colour-map name nothing can draw (matplotlib's and colorcet's names are known)."""
    from .colours import cmap_problem
    problem = cmap_problem(name)
    if problem:
        raise OptionError(f"--cmap: {problem}")


def parse_pair(text, option: str):
    if text is None:
        return None
    parts = [p.strip() for p in str(text).split(",")]
    if len(parts) != 2 or not all(parts):
        raise OptionError(f"{option} takes two column names as A,B, got '{text}'")
    if parts[0] == parts[1]:
        raise OptionError(f"{option} needs two different columns, got '{text}'")
    return (parts[0], parts[1])


def parse_ranges(items) -> dict[str, tuple[float, float]]:
    out: dict[str, tuple[float, float]] = {}
    for text in items:
        col, sep, rest = str(text).partition("=")
        col = col.strip()
        vals = [v.strip() for v in rest.split(",")]
        if not sep or not col or len(vals) != 2:
            raise OptionError(f"--range takes COL=LO,HI, got '{text}'")
        try:
            lo, hi = float(vals[0]), float(vals[1])
        except ValueError:
            raise OptionError(f"--range takes COL=LO,HI with numbers, got '{text}'") from None
        if not (math.isfinite(lo) and math.isfinite(hi) and hi > lo):
            raise OptionError(f"--range {col}: the upper bound must be above the lower, got '{text}'")
        out[col] = (lo, hi)
    return out


def select_snapshots(spec: str, n: int) -> list[int]:
    """Positions named by ``first,last`` / ``all`` / ``0,5,-1`` in a run of ``n``, in run order."""
    text = (spec or "first,last").strip().lower()
    if n <= 0:
        return []
    if text == "all":
        return list(range(n))
    picked: list[int] = []
    for tok in (t.strip() for t in text.split(",")):
        if not tok:
            continue
        if tok == "first":
            i = 0
        elif tok == "last":
            i = n - 1
        else:
            try:
                i = int(tok)
            except ValueError:
                raise OptionError(f"--snapshots takes first, last, all or positions like 0,5,-1; "
                                  f"got '{spec}'") from None
            if not -n <= i < n:
                raise OptionError(f"--snapshots: position {i} is outside this run of {n} "
                                  f"snapshot{'s' if n != 1 else ''} (0..{n - 1}, or -1 for the last)")
            i %= n
        if i not in picked:
            picked.append(i)
    if not picked:
        raise OptionError(f"--snapshots names no snapshot: '{spec}'")
    return sorted(picked)


# results -------------------------------------------------------------------------------------
@dataclass
class FigureRecord:
    kind: str                       # space, phase, census_map, rank_load, transfer, displacement, drift, deposit
    path: str
    title: str
    snapshot: int | None = None
    species: str | None = None
    caption: str = ""
    aggregate: object | None = None     # the xarray aggregate of a density view (kept on request)
    drawn: np.ndarray | None = None     # the image a density view drew, rows from the lowest y up
                                        # (NaN where a bin is blank; kept on request)
    view: dict | None = None            # how a density view was aggregated


@dataclass
class ExportResult:
    out: str
    figures: list[FigureRecord] = field(default_factory=list)
    movies: list = field(default_factory=list)          # movie.MovieResult, with --movie
    tables: dict[str, str] = field(default_factory=dict)
    report: str | None = None
    notes: list[str] = field(default_factory=list)
    verdict: object | None = None
    exit_code: int = 0
    seconds: float = 0.0


# guards ----------------------------------------------------------------------------------
def input_files(ctx, args=None) -> set[str]:
    """Real paths of every file the export reads (snapshots, layout, roles file)."""
    files: set[str] = set()
    for ref in ctx.run.refs:
        for p in ref.paths:
            files.add(os.path.realpath(p))
    for name in ("layout", "roles_file"):
        v = getattr(args, name, None) if args is not None else None
        if v:
            files.add(os.path.realpath(v))
    side = getattr(ctx, "_sidecar", None)
    if side not in (None, False) and getattr(side, "source", None):
        files.add(os.path.realpath(side.source))
    return files


def guard_outputs(paths, inputs: set[str]) -> None:
    for p in paths:
        for cand in (p, f"{p}.part"):
            if os.path.realpath(cand) in inputs:
                raise InputError(p, "is one of the run's input files; the export never "
                                 "overwrites an input", "choose another --out folder")


def run_folders(ctx) -> set[str]:
    """Real paths of the folders a run lives in: the folders named as the run, those holding
    its snapshot files, and a per-rank snapshot folder's parent."""
    folders = set()
    spec = getattr(ctx.run, "spec", None)
    items = [spec] if isinstance(spec, (str, os.PathLike)) else list(spec or ())
    for item in items:
        if os.path.isdir(item):
            folders.add(os.path.realpath(item))
    for ref in ctx.run.refs:
        if len(ref.paths) == 1:
            folders.add(os.path.realpath(os.path.dirname(os.path.abspath(ref.paths[0]))))
        else:      # a folder of per-rank files, inside the run folder
            folders.add(os.path.realpath(os.path.abspath(ref.path)))
            folders.add(os.path.realpath(os.path.dirname(os.path.abspath(ref.path))))
    return folders


def guard_run_folder(out: str, ctx) -> None:
    """Refuse to write into, or anywhere inside, a folder the run's snapshots are found in.

    The tables are CSV files: written beside the snapshots, or in a sub-folder of the run
    folder, the next command on that folder would read them as snapshots of the run.
    """
    real = os.path.realpath(out)
    for folder in sorted(run_folders(ctx)):
        if real == folder:
            raise OptionError(f"--out {out} is a folder of the run itself: the tables written there "
                              "would be read as snapshots next time; choose another folder")
        if real.startswith(folder.rstrip(os.sep) + os.sep):
            raise OptionError(f"--out {out} is inside the run folder {folder}: the tables written "
                              "there would be read as a snapshot next time; choose a folder "
                              "outside the run")


def _safe(name: str) -> str:
    return re.sub(r"[^A-Za-z0-9_.-]+", "_", str(name)).strip("_") or "species"


# views -----------------------------------------------------------------------------------
def export_runs(ctx):
    """The run as the one served run of a headless state (a ViewState needs a run to show)."""
    from .state import ServedRuns
    runs = ServedRuns()
    runs.add(policy.run_name(ctx), ctx)
    return runs


def export_state(runs, opts: ExportOptions, snapshot: int, species: str):
    """The dashboard state of one exported view: the export's options in a ViewState."""
    from .state import ViewState
    state = ViewState(runs)
    if opts.cmap not in state.param.cmap.objects:      # any map matplotlib and bokeh both know
        state.param.cmap.objects = list(state.param.cmap.objects) + [opts.cmap]
    state.param.update(snapshot=int(snapshot), species=species, cmap=opts.cmap,
                       scaling=opts.scale)
    return state


def _set_view(state, kind, pair, ranges):
    """Axes ``pair`` of view ``kind`` and the user's --range of either column."""
    a, b = (("space_x", "space_y"), ("phase_x", "phase_y"))[kind == "phase"]
    for p, col in ((a, pair[0]), (b, pair[1])):
        if col not in state.param[p].objects:
            state.param[p].objects = list(state.param[p].objects) + [col]
    state.param.update(**{a: pair[0], b: pair[1]})
    ra, rb = (("space_xr", "space_yr"), ("phase_xr", "phase_yr"))[kind == "phase"]
    state.param.update(**{ra: ranges.get(pair[0]), rb: ranges.get(pair[1])})


def _caption(view, agg, frame, prefix=""):
    nonfinite = int(agg.attrs.get("nonfinite", 0))
    cap = [f"{prefix}{policy.VIEWS[view.which].lower()} view: {view.clabel} per bin on a "
           f"{view.grid[0]} × {view.grid[1]} grid, {view.scaling} colour scale, colour map {view.cmap}"]
    if nonfinite:
        cap.append(f"{nonfinite:,} with NaN/inf coordinates left out")
    if view.reduction == "count" and not view.diverging:
        outside = frame.length - nonfinite - int(np.nansum(agg.values))
        if view.slab is None and outside > 0:
            cap.append(f"{outside:,} outside the drawn range")
    cap.extend(view.notes)
    return "; ".join(cap)


def _view_record(kind, path, view, agg, frame, i, sp, keep, prefix=""):
    return FigureRecord(kind, path, view.title, i, sp, _caption(view, agg, frame, prefix),
                        agg if keep else None,
                        view=dict(xcol=view.xcol, ycol=view.ycol, width=view.grid[0],
                                  height=view.grid[1], x_range=tuple(view.x_range),
                                  y_range=tuple(view.y_range), cmap=view.cmap,
                                  scaling=view.scaling, reduction=view.reduction))


# the export --------------------------------------------------------------------------------
class _Plan:
    """Every output path, known before anything is written (for the clobber guard).

    ``fig`` and ``file`` hand out where to write: a hidden staging folder inside the output
    folder. Only when the whole export has succeeded does ``commit`` move each file to its
    own name; ``abort`` removes the staging folder, so a failed export leaves no half-written
    table or figure (and a folder it made itself, if empty, goes too).
    """

    def __init__(self, out):
        self.out = out
        self.stage = os.path.join(out, f".export-{os.getpid()}-{secrets.token_hex(4)}")
        self.figdir = os.path.join(self.stage, FIGURE_DIR)
        self.paths: list[str] = []              # final names (what the guards check)
        self._final: dict[str, str] = {}        # staged name -> final name
        self._made_out = False

    def _add(self, rel: str) -> str:
        final, staged = os.path.join(self.out, rel), os.path.join(self.stage, rel)
        self.paths.append(final)
        self._final[staged] = final
        return staged

    def fig(self, name) -> str:
        return self._add(os.path.join(FIGURE_DIR, name))

    def file(self, name) -> str:
        return self._add(name)

    def final(self, staged: str) -> str:
        return self._final.get(staged, staged)

    def begin(self) -> None:
        self._made_out = not os.path.isdir(self.out)
        os.makedirs(self.figdir)

    def commit(self) -> None:
        os.makedirs(os.path.join(self.out, FIGURE_DIR), exist_ok=True)
        for staged, final in self._final.items():
            if os.path.exists(staged):
                os.makedirs(os.path.dirname(final), exist_ok=True)
                os.replace(staged, final)
        shutil.rmtree(self.stage, ignore_errors=True)

    def abort(self) -> None:
        shutil.rmtree(self.stage, ignore_errors=True)
        if self._made_out:
            try:
                os.rmdir(self.out)
            except OSError:     # something else is in it now: leave it
                pass


def export_run(ctx, opts: ExportOptions, args=None, *, keep_aggregates: bool = False,
               stream=None, movie_writer=None, reference=None) -> ExportResult:
    """Write figures, tables and report.html into ``opts.out``; return what was written.

    ``reference`` is the context of the run a ``--view`` link compares with (its ``ref=``):
    with it the link's views show what the screen shows (reference, or candidate minus
    reference); without it such a link draws this run, with a note."""
    t0 = time.perf_counter()
    out = os.path.abspath(opts.out)
    if os.path.exists(out) and not os.path.isdir(out):
        raise OptionError(f"--out {opts.out} is a file, not a folder")
    run = ctx.run
    n = len(run)
    chosen = select_snapshots(opts.snapshots, n)
    species = ctx.species_names()
    name = policy.run_name(ctx)
    res = ExportResult(out=out)
    notes = res.notes

    # plan ---------------------------------------------------------------------------------
    plan = _Plan(out)
    views = []          # (kind, i, species, xcol, ycol, path)
    for i in chosen:
        snap = run[i]
        for sp in species:
            if sp not in snap.species:
                notes.append(f"snapshot {i} has no species '{sp}'")
                continue
            frame = snap.species[sp]
            space, phase = policy.default_axes(frame, frame.columns)
            space = opts.space or (space if policy.has_view(frame, "space") is None else None)
            phase = opts.phase or (phase if policy.has_view(frame, "phase") is None else None)
            for kind, pair in (("space", space), ("phase", phase)):
                if pair is None:
                    msg = f"no {kind} view for '{sp}': it has no {policy.has_view(frame, kind)}"
                    if msg not in notes:
                        notes.append(msg)
                    continue
                for c in pair:
                    if c not in frame:
                        raise InputError(frame.source or snap.path,
                                         f"species '{sp}' has no column '{c}' (asked for --{kind})",
                                         f"columns are: {', '.join(frame.columns)}")
                views.append((kind, i, sp, pair[0], pair[1],
                              plan.fig(f"{kind}_{i:04d}_{_safe(sp)}.png")))
    link_figs = ([(kind, plan.fig(f"link_{kind}.png")) for kind in ("space", "phase")]
                 if opts.view else [])
    census_figs = [(i, plan.fig(f"census_map_{i:04d}.png"), plan.fig(f"rank_load_{i:04d}.png"))
                   for i in chosen]
    pairs = [(i - 1, i) for i in chosen if i > 0]
    if n > 1 and not pairs:
        pairs = [(0, 1)]
    migration_figs = [(a, b, plan.fig(f"transfer_{a:04d}_{b:04d}.png"),
                       plan.fig(f"displacement_{a:04d}_{b:04d}.png")) for a, b in pairs]
    drift_fig = plan.fig("drift.png") if n > 1 else None
    deposit_figs = [(i, plan.fig(f"deposit_{i:04d}.png")) for i in chosen]
    table_paths = {t: plan.file(t) for t in TABLE_NAMES}
    movies = []         # (kind, species, path): each view of each species over every snapshot
    if opts.movie and movie_writer is None:
        # the movie module draws with this one; it is handed in (movie.write_movie), not imported
        raise OptionError("--movie: this export was started without a movie writer")
    if opts.movie:
        for kind, _, sp, *_ in views:
            if (kind, sp) not in [(k, m) for k, m, _ in movies]:
                movies.append((kind, sp, plan.file(os.path.join(MOVIE_DIR,
                                                                f"{kind}_{_safe(sp)}.{opts.movie}"))))
    report_path = plan.file(REPORT_NAME)
    ctx.layout(chosen[0])   # finds a layout file beside the run, which is an input too
    guard_outputs(plan.paths, input_files(ctx, args)
                  | (input_files(reference, args) if reference is not None else set()))
    guard_run_folder(out, ctx)
    if reference is not None:
        guard_run_folder(out, reference)
    plan.begin()
    try:
        _export_staged(ctx, opts, plan, res, chosen, species, name, views, census_figs,
                       migration_figs, drift_fig, deposit_figs, table_paths, report_path,
                       keep_aggregates, stream, link_figs, movies, args, movie_writer, reference)
    except BaseException:
        plan.abort()
        raise
    plan.commit()
    for mv in res.movies:
        mv.path = plan.final(mv.path)
    for rec in res.figures:
        rec.path = plan.final(rec.path)
    res.tables = {k: plan.final(v) for k, v in res.tables.items()}
    res.report = plan.final(res.report) if res.report else res.report
    res.seconds = time.perf_counter() - t0
    return res


def _export_staged(ctx, opts, plan, res, chosen, species, name, views, census_figs,
                   migration_figs, drift_fig, deposit_figs, table_paths, report_path,
                   keep_aggregates, stream, link_figs=(), movies=(), args=None,
                   movie_writer=None, reference=None) -> None:
    """Draw and write everything into the plan's staging folder."""
    from . import figure_data as D
    from .figure_writer import FigureWriter
    from .mpl_figures import FigureSize
    from .progress import Progress
    from .report import FigureItem, Section, TableItem, Verdict, render_report, write_report
    from ..audit import tables as audit
    run = ctx.run
    n = len(run)
    notes = res.notes

    total = (len(views) + len(link_figs) + 2 * len(census_figs) + 2 * len(migration_figs) + (1 if drift_fig else 0)
             + len(deposit_figs) + 4 + 1)
    bar = Progress(total, "export", stream=stream,
                   enabled=False if opts.quiet else None)
    size = FigureSize.of(opts)
    figures = (len(views) + len(link_figs) + 2 * len(census_figs) + 2 * len(migration_figs)
               + (1 if drift_fig else 0) + len(deposit_figs))
    # started now, so a second process loads the figure code while the tables are reduced
    writer = FigureWriter(size, figures, opts.figure_process)

    def add_figure(rec: FigureRecord, kind: str, payload):
        """Hand one figure to the writer (``mpl_figures.draw_job``) and record it."""
        writer.submit(kind, payload, rec.path)
        res.figures.append(rec)

    def add_density(rec: FigureRecord, view, agg):
        data, extent = D.density_data(view, agg)
        add_figure(rec, "density", (view, data, extent))
        rec.drawn = data if keep_aggregates else None

    with bar, writer:
        # tables first: the census and drift figures are drawn from them -------------------------
        bar.draw("census table")
        census_df = audit.census_table(ctx)
        census_df.to_csv(table_paths["census.csv"], index=False)
        res.tables["census.csv"] = table_paths["census.csv"]
        bar.step("census table")
        if n > 1:
            migration_df, summary_df = audit.migration_tables(ctx)
        else:
            migration_df, summary_df = _empty_migration()
            notes.append("the run has one snapshot: no migration between snapshots")
        migration_df.to_csv(table_paths["migration.csv"], index=False)
        summary_df.to_csv(table_paths["migration_summary.csv"], index=False)
        res.tables["migration.csv"] = table_paths["migration.csv"]
        res.tables["migration_summary.csv"] = table_paths["migration_summary.csv"]
        bar.step("migration tables", 2)
        drift_df = audit.drift_table(ctx, details=True)
        drift_df[list(audit.DRIFT_COLUMNS)].to_csv(table_paths["drift.csv"], index=False)
        res.tables["drift.csv"] = table_paths["drift.csv"]
        bar.step("drift table")

        # density views ---------------------------------------------------------------------------
        by_cols: dict[tuple, list] = {}
        for v in views:
            by_cols.setdefault((v[0], v[3], v[4]), []).append(v)
        runs = export_runs(ctx)
        box = policy.figure_box(opts.width, opts.height)
        for (kind, xcol, ycol), group in by_cols.items():
            frames = [run[i].species[sp] for _, i, sp, *_ in group]
            # one range for a pair of columns in every snapshot and species, so views compare
            for _, i, sp, _, _, path in group:
                frame = run[i].species[sp]
                state = export_state(runs, opts, i, sp)
                _set_view(state, kind, (xcol, ycol), opts.ranges)
                with transient_columns(frames):
                    view = policy.particle_view(state, kind, frame=frame, snapshot=i,
                                                frames=frames, box=box)
                    agg = view.aggregate(frame)
                    rec = _view_record(kind, path, view, agg, frame, i, sp, keep_aggregates)
                add_density(rec, view, agg)
                bar.step(f"{kind} view {i} {sp}")
        if link_figs:
            from .state import link_query
            query = link_query(opts.view.split("?", 1)[-1])
            wanted = query.get("ref")
            if wanted and reference is not None:      # the reference under the name the link gives it
                query["ref"] = runs.add(wanted, reference).name
            elif wanted:
                notes.append(f"--view: the link compares with the run '{wanted}'; give "
                             "--reference RUN to draw it (these views show this run alone)")
                query.pop("ref")
            state = export_state(runs, opts, 0, runs[runs.names[0]].species_names(0)[-1])
            state.apply_query(query)
            for note in state.link_notes:
                notes.append(f"--view: {note}")
            for kind, path in link_figs:
                try:
                    frame = state.frame()
                    ref_i, ref_frame = (state.reference_frame(state.snapshot) if state.reference
                                        else (None, None))
                    frames = [frame] + ([ref_frame] if ref_frame is not None else [])
                    view = policy.particle_view(state, kind, frame=frame, frames=frames)  # the screen's
                    with transient_columns(frames):
                        view, agg = policy.state_shown(state, view, frame, ref_i, ref_frame)
                except (InputError, OptionError, SwarmAuditError) as exc:
                    notes.append(f"--view: the {kind} view of the link cannot be drawn: {exc}")
                    bar.step()
                    continue
                drawn = ref_frame if state.showing == "reference" else frame
                add_density(_view_record(kind, path, view, agg, drawn, state.snapshot,
                                         state.species, keep_aggregates, prefix="the link's "),
                            view, agg)
                bar.step(f"link {kind} view")

        # movies: every snapshot, one colour scale each ----------------------------------------------
        for kind, sp, path in movies:
            mv = movie_writer(ctx, path, view=kind, species=sp, opts=opts, args=args, bar=bar)
            res.movies.append(mv)
            notes.extend(m for m in mv.notes if m not in notes)

        # census ----------------------------------------------------------------------------------
        for i, map_path, bar_path in census_figs:
            snap = run[i]
            layout = ctx.layout(i)
            blocks, ranks, imb = audit.snapshot_census(ctx, i, audit.ALL, census_df)
            xl, yl = _position_labels(ctx, i, species)
            title = f"{name} · particles per block, all species · {policy.snapshot_label_of(snap, i)}"
            data = D.census_map(blocks, layout, title, cmap=opts.cmap, xlabel=xl, ylabel=yl)
            add_figure(FigureRecord("census_map", map_path, title, i, "all",
                                    "particles per block (all species); refined blocks outlined"),
                       "census_map", data)
            bar.step(f"census map {i}")
            title = f"{name} · particles per rank, all species · {policy.snapshot_label_of(snap, i)}"
            loads = D.rank_bars(ranks, imb, title)
            add_figure(FigureRecord("rank_load", bar_path, title, i, "all",
                                    "particles per rank with the mean (dashed)"),
                       "rank_bars", loads)
            bar.step(f"rank load {i}")

        # migration -------------------------------------------------------------------------------
        for a, b, heat_path, disp_path in migration_figs:
            table = migration_df[(migration_df["from_snapshot"] == a) & (migration_df["to_snapshot"] == b)]
            disp, steps = audit.pair_displacements(ctx, a, b, species)
            if not len(table) and not disp.size:
                notes.append(f"snapshots {a} → {b}: no particle could be matched (no ids), so "
                             "there are no migration figures for this pair")
                bar.step(n=2)
                continue
            title = f"{name} · block to block · snapshot {a} → {b}"
            add_figure(FigureRecord("transfer", heat_path, title, b, "all",
                                    f"migrated particles ({policy.MIGRATED_MEANS}), block to "
                                    "block; the ones that stayed are left out"),
                       "transfer_matrix", D.transfer_matrix(table, title, cmap=opts.cmap))
            bar.step(f"transfer {a}-{b}")
            title = f"{name} · displacement · snapshot {a} → {b}"
            add_figure(FigureRecord("displacement", disp_path, title, b, "all",
                                    (f"{steps} step{'s' if steps != 1 else ''} apart; the dashed "
                                     "line is one level-0 cell per step") if steps else
                                    "steps between the snapshots unknown; the dashed line is one "
                                    "level-0 cell"),
                       "displacement_histogram", D.displacement_histogram(disp, steps, title))
            bar.step(f"displacement {a}-{b}")

        # gate: judged before the drift figure, which marks what the gate judges ------------------
        verdict = None
        checked = None
        if opts.rtol is not None:
            chk = audit.check(ctx, opts.rtol, None)
            verdict = Verdict(opts.rtol, bool(chk.ok), _headline(chk.lines))
            res.verdict = chk
            res.exit_code = 0 if chk.ok else 1
            if getattr(chk, "table", None) is not None and len(chk.table):
                checked = list(zip(chk.table["species"], chk.table["quantity"]))

        # drift -------------------------------------------------------------------------------------
        if drift_fig:
            title = f"{name} · totals against the first snapshot"
            add_figure(FigureRecord("drift", drift_fig, title, None, "all",
                                    "drift of every total against the first snapshot; the band "
                                    "±rtol is drawn where the gate checks a total, a cross marks "
                                    "where a checked total first leaves it"
                                    if opts.rtol else
                                    "drift of every total against the first snapshot (no --rtol given)"),
                       "drift_curves", D.drift_curves(drift_df, opts.rtol, title, checked=checked,
                                                      xlabel=_time_label(run)))
            bar.step("drift")
        else:
            notes.append("the run has one snapshot: no drift figure")

        # deposition --------------------------------------------------------------------------------
        for i, path in deposit_figs:
            snap = run[i]
            layout = ctx.layout(i)
            if layout.ndim < 2:
                notes.append(f"snapshot {i}: deposition map needs 2-D or 3-D positions")
                bar.step()
                continue
            grid = snapshot_deposit(ctx, i, species)
            xl, yl = _position_labels(ctx, i, species)
            title = f"{name} · weight deposited (CIC) · {policy.snapshot_label_of(snap, i)}"
            label = "weight per cell" + (" (summed over z)" if layout.ndim == 3 else "")
            dep = D.deposit_map(grid, layout, title, cmap=opts.cmap, xlabel=xl, ylabel=yl,
                                label=label)
            add_figure(FigureRecord("deposit", path, title, i, "all",
                                    "cloud-in-cell deposit of particle weight on the level-0 cells"),
                       "deposit", dep)
            bar.step(f"deposit {i}")

        for note in ctx.notes:
            if note not in notes:
                notes.append(note)
        for i in chosen:
            for w in run[i].warnings:
                msg = f"snapshot {i}: {w}"
                if msg not in notes:
                    notes.append(msg)

        # report: every figure written first, it is embedded ----------------------------------------
        writer.finish()
        sections = _sections(res, census_df, migration_df, summary_df, drift_df, FigureItem,
                             Section, TableItem)
        facts = _facts(ctx, chosen, species)
        from .. import __version__
        interrupt.check()
        text = render_report(f"swarmaudit report — {name}", facts, sections, verdict, notes,
                             version=__version__)
        write_report(report_path, text)
        res.report = report_path
        bar.step("report")


# per-snapshot pieces the figures need (compositions of core.audit and diagnostics) ----------
def snapshot_deposit(ctx, i: int, species) -> np.ndarray:
    """Cloud-in-cell deposit of weight of every species on the level-0 cells, indexed [ix, iy(, iz)]."""
    from ..diagnostics.deposit import Deposit
    from ..engine.reduce import reduce
    snap = ctx.run[i]
    layout = ctx.layout(i)
    total = np.zeros(tuple(int(c) for c in layout.cells))
    for sp in species:
        f = snap.species.get(sp)
        if f is None or f.ndim != layout.ndim or not f.length:
            continue
        with transient_columns([f]):
            total += reduce(Deposit.of_frame(f, layout, order="cic"), f, ctx)
    return total


_DRIFT_COLUMNS = ("snapshot", "step", "time", "species", "quantity", "value", "reference",
                  "relative_drift")


def _time_label(run) -> str:
    unit = getattr(run[0], "time_unit", "") or ""
    return f"time [{unit}]" if unit else "time"


def _headline(lines) -> list[str]:
    """The sentences of a check's output, without its fixed-width table (shown as HTML instead)."""
    out = []
    for line in lines:
        if line.startswith("quantity "):
            break
        out.append(line)
    return out


def _empty_migration():
    import pandas as pd
    m = pd.DataFrame({c: pd.Series(dtype="int64") for c in
                      ("from_snapshot", "to_snapshot", "species", "from_block", "to_block", "count")})
    s = pd.DataFrame({c: pd.Series(dtype="int64") for c in
                      ("from_snapshot", "to_snapshot", "species", "matched", "migrated", "created",
                       "lost", "max_displacement_cells", "over_one_cell")})
    return m, s


def _position_labels(ctx, i, species):
    from .render import axis_label
    snap = ctx.run[i]
    for sp in species:
        f = snap.species.get(sp)
        if f is not None and f.ndim >= 2:
            names = f.position_names
            return axis_label(f, names[0]), axis_label(f, names[1])
    return None, None


def _facts(ctx, chosen, species) -> list[tuple[str, str]]:
    run = ctx.run
    n = len(run)
    first, last = run[0], run[n - 1]
    facts = [("run", str(run.source)), ("snapshots", f"{n} ({run.refs[0].label} … {run.refs[-1].label})")]
    if first.step is not None and last.step is not None:
        facts.append(("steps", f"{first.step} … {last.step}, {run.steps_source()}"
                               + ("" if run.steps_stored else " (none stored)")))
    if first.time is not None and last.time is not None:
        unit = f" {first.time_unit}" if first.time_unit else ""
        facts.append(("time", f"{first.time:.6g} … {last.time:.6g}{unit}"))
    facts.append(("drawn", ", ".join(str(i) for i in chosen)))
    for sp in species:
        counts = [run[i].species[sp].length if sp in run[i].species else 0 for i in (0, n - 1)]
        facts.append((f"species {sp}", f"{counts[0]:,} particles in the first snapshot, "
                                       f"{counts[1]:,} in the last"))
    lay = ctx.layout(0)
    s = lay.summary()
    dom = " × ".join(f"[{a:g}, {b:g})" for a, b in zip(s["domain_lower"], s["domain_upper"]))
    facts.append(("layout (first snapshot)", f"{s['blocks']} blocks on level(s) {', '.join(map(str, s['levels']))}, "
                            f"{s['ranks']} rank(s), {s['ndim']}-D"))
    facts.append(("domain", f"{dom}; level-0 cells {' × '.join(map(str, s['cells']))}"
                            + (f"; periodic {', '.join(s['periodic'])}" if s["periodic"] else "")))
    if s.get("source"):
        facts.append(("layout from", str(s["source"])))
    return facts


def _sections(res, census_df, migration_df, summary_df, drift_df, FigureItem, Section, TableItem):
    def items(*kinds):
        return [FigureItem(f.path, f.title, f.caption, wide=f.kind == "drift")
                for f in res.figures if f.kind in kinds]

    secs = []
    v = items("space", "phase")
    if v:
        secs.append(Section("Views", v, anchor="views",
                            text=["Particle density, binned on a grid (no points drawn over each "
                                  "other): every particle counts once. Views of the same columns share "
                                  "their axis ranges, so snapshots compare directly."]))
    def part(df, name, subset, mask=None, sort=None, **kw):
        shown = df[mask] if mask is not None else df
        if sort is not None and len(shown):
            shown = shown.sort_values(sort, ascending=False, kind="stable")
        return TableItem(name, shown, name, subset=subset if mask is not None else "",
                         total_rows=len(df), **kw)

    last = int(census_df["snapshot"].max()) if len(census_df) else 0
    census_part = part(census_df, "census.csv", f"snapshot {last}, all species",
                       (census_df["snapshot"] == last) & (census_df["species"] == "all")
                       if len(census_df) else None)
    secs.append(Section("Census", items("census_map", "rank_load"), [census_part], anchor="census"))
    mig_tables = [part(summary_df, "migration_summary.csv", "all species",
                       (summary_df["species"] == "all") if len(summary_df) else None, max_rows=40)]
    if len(migration_df):
        pair = migration_df["to_snapshot"].max()
        moving = (migration_df["to_snapshot"] == pair) & (migration_df["species"] == "all") & \
            (migration_df["from_block"] != migration_df["to_block"])
        a = int(migration_df.loc[migration_df["to_snapshot"] == pair, "from_snapshot"].min())
        mig_tables.append(part(migration_df, "migration.csv",
                               f"snapshot {a} → {int(pair)}, all species, moves only, largest first",
                               moving, sort="count"))
    else:
        mig_tables.append(TableItem("migration.csv", migration_df, "migration.csv"))
    secs.append(Section("Migration", items("transfer", "displacement"), mig_tables, anchor="migration"))
    drift_show = drift_df[[c for c in _DRIFT_COLUMNS if c in drift_df]]
    lastd = int(drift_show["snapshot"].max()) if len(drift_show) else 0
    tables = [part(drift_show, "drift.csv", f"the last snapshot ({lastd})",
                   (drift_show["snapshot"] == lastd) if len(drift_show) else None, max_rows=60)]
    chk = res.verdict
    if chk is not None and getattr(chk, "table", None) is not None and len(chk.table):
        t = chk.table.rename(columns={"worst": "largest drift (%)", "at": "at snapshot",
                                      "first_out": "first out"})
        tables.insert(0, TableItem("check: the totals judged", t, None, max_rows=60,
                                   caption="largest drift judged against the scale of each total, "
                                           "in per cent of it"))
    secs.append(Section("Drift", items("drift"), tables, anchor="drift"))
    if res.movies:
        from .report import MovieItem
        secs.insert(1 if v else 0, Section(
            "Movies", anchor="movies",
            movies=[MovieItem(m.path, f"{m.view} view · {m.species}",
                              f"{m.frames} snapshots, {m.fps:g} frames a second; one {m.scaling} "
                              f"colour scale over every frame ({m.scale[0]:g} … {m.scale[1]:g} "
                              "particles per bin), so a colour means the same count throughout")
                    for m in res.movies],
            text=["Each view over every snapshot of the run, drawn like the figures above."]))
    d = items("deposit")
    if d:
        secs.append(Section("Deposition", d, anchor="deposition"))
    return secs


def run_export(ctx, args, movie_writer=None) -> int:
    """The CLI entry: export, print what was written, gate like ``check`` when --rtol is given.

    ``movie_writer`` is ``movie.write_movie`` (passed in: the movie module builds on this one).
    """
    opts = ExportOptions.from_args(args)
    reference = None
    if getattr(args, "reference", None):
        if not opts.view:
            raise OptionError("--reference is the run a --view link compares with; give --view LINK too")
        from .options import context_from_options
        reference = context_from_options(args, run=args.reference)
    res = export_run(ctx, opts, args, movie_writer=movie_writer, reference=reference)
    nfig = len(res.figures)
    print(f"swarmaudit export: wrote {nfig} figure{'s' if nfig != 1 else ''}, "
          f"{len(res.tables)} tables and {REPORT_NAME} to {res.out} in {res.seconds:.1f} s")
    if res.verdict is not None:
        for line in res.verdict.lines:
            print(line)
    return res.exit_code
