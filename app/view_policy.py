"""The one view policy: what a particle view of a given state shows, wherever it is drawn.

From a view state (:class:`~.state.ViewState`, or anything with the same
attributes) this module decides the default axes, the range a view opens
on, whether a range from a link or a zoom may be used, the colour map and
scale, the grid of bins, the labels, the title and the names of runs and
snapshots. The dashboard, ``export`` and any other drawing command ask it,
so a figure in a report is the figure on the screen for the same state.

It also holds the words the interface uses (tab titles, widget labels, the
labels of the table columns), one name per thing, so the dashboard, the
tables and the report say the same.
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass, field, replace

import numpy as np

# ---------------------------------------------------------------------------------------------
# names: one word per thing, shared by the dashboard, the tables and the report

#: side panels, in tab order: value in a link -> tab title (the CSV and the report use the same words)
PANELS = {"blocks": "Blocks", "migration": "Migration", "drift": "Drift", "histogram": "Histogram",
          "compare": "Compare"}
#: tab values of links written before the tabs took the names of their tables
PANEL_ALIASES = {"moves": "migration", "totals": "drift"}

#: the two particle views: name -> what their titles call them
VIEWS = {"space": "Space", "phase": "Phase space"}

#: labels of the dashboard's widgets and buttons (they say what the control does)
LABELS = {
    "run": "Run",
    "species": "Species",
    "space_x": "Space: horizontal axis",
    "space_y": "Space: vertical axis",
    "phase_x": "Phase space: horizontal axis",
    "phase_y": "Phase space: vertical axis",
    "color_column": "Column averaged",
    "cmap": "Colour map",
    "reset_zoom": "Reset zoom",
    "clear_selection": "Clear selection",
    "copy_link": "Copy link",
    "compare_to": "Compare with",
    "rtol": "Tolerance (relative)",
    "hist_column": "Column",
    "reference": "Reference run",
    "pair_by": "Pair snapshots by",
    "show": "Show",
}

#: section headings of the controls
SECTIONS = {"axes": "Axes", "colour": "Colour", "blocks": "Blocks on the space view",
            "selection": "Selection", "compare": "Compare with another run"}

#: colouring (value in a link -> label on its button)
COLOR_BY_LABELS = {"count": "count", "weight": "weight", "mean": "mean"}
#: colour scales (value in a link -> label on its button)
SCALING_LABELS = {"eq_hist": "eq. hist", "log": "log", "linear": "linear"}
#: how the block layout is drawn over the space view (value in a link -> label on its button)
BLOCK_MODE_LABELS = {"off": "off", "outline": "outline", "tinted": "shade by count",
                     "labelled": "count labels"}

#: run comparison: the run in view is the candidate, a second served run the reference (the words
#: of ``swarmaudit compare``); what the particle views show (value in a link -> label on its button)
SHOW_LABELS = {"candidate": "candidate", "reference": "reference", "difference": "difference"}
#: the reference menu's entry for "no reference"
NO_REFERENCE = "none"
#: how snapshots pair (value in a link -> label on its button; audit.compare.PAIR_BY)
PAIR_LABELS = {"step": "step", "time": "time"}
#: headings of the Compare tab's tables (the compare_*.csv tables of the same names)
COMPARE_TABLE_TITLES = {
    "compare_particles.csv": "Particle by particle",
    "compare_worst.csv": "The particles that differ most",
    "compare_distributions.csv": "Distributions",
    "compare_census.csv": "Block census, both runs in the reference's blocks",
    "compare_totals.csv": "Totals",
}
#: decimals of a number in a dashboard table (scientific notation below 1e-3 and from 1e7)
TABLE_DIGITS = 4
#: what the difference view draws, for titles and colour bars
DIFFERENCE_MEANS = "candidate − reference"

#: words shown for the columns of migration_summary.csv (the label follows the column's name)
SUMMARY_LABELS = {
    "matched": "matched",
    "migrated": "migrated",
    "created": "created",
    "lost": "lost",
    "max_displacement_cells": "largest displacement (level-0 cells)",
    "over_one_cell": "over one cell per step",
}
#: what a migrated particle is, for captions and help text
MIGRATED_MEANS = "matched particles that are in another block than before"

# ---------------------------------------------------------------------------------------------
# colour

#: colour maps offered on the screen's menu; a name anywhere (a link, --cmap) is checked by
#: ``colours.cmap_problem``, which knows these and every matplotlib and colorcet name
CMAPS = ("viridis", "magma", "cividis", "inferno", "fire", "kbc", "bmy", "gray")
#: the colour map of every density view, census map and deposit unless one is chosen
DEFAULT_CMAP = "viridis"
#: the colour map of a difference of two runs (blue: fewer in the candidate, red: more), always on a
#: linear scale centred on zero (difference_limits)
DIFFERENCE_CMAP = "RdBu_r"
COLOR_BY = ("count", "weight", "mean")
SCALINGS = ("eq_hist", "log", "linear")
DEFAULT_SCALING = "eq_hist"



def difference_limits(diff) -> tuple[float, float]:
    """Colour limits of a difference: centred on zero, holding every finite value (±1 when none)."""
    a = np.abs(np.asarray(diff, dtype=np.float64))
    a = a[np.isfinite(a)]
    m = float(a.max()) if a.size else 0.0
    m = m if m > 0 else 1.0
    return -m, m


# ---------------------------------------------------------------------------------------------
# sizes and grids

#: pixels of a particle view on the screen
SCREEN_BOX = (560, 440)
#: share of an exported figure the density image itself covers (the rest: axes, title, colour bar)
IMAGE_SHARE = (0.78, 0.80)
#: particles per bin below which a view's grid is made coarser
PER_BIN = 6.0
#: fewest bins along the shorter side of a coarsened grid
MIN_BINS = 64

#: share of the span added on each side of a data range that is not a position
#: (a cold beam sits exactly on its min/max and would vanish into the frame)
DATA_MARGIN = 0.04
#: a range from a link or a zoom may be at most this many opening spans wide, and must overlap
#: the opening range widened by as many spans on each side
MAX_SPANS = 1000.0
#: and at least this share of the opening span (finer is below what float32 data resolves)
MIN_SHARE = 1e-9


def figure_box(width: int, height: int) -> tuple[int, int]:
    """Pixels of the density image inside an exported figure of ``width`` x ``height``."""
    return (max(int(width * IMAGE_SHARE[0]), 16), max(int(height * IMAGE_SHARE[1]), 16))


def grid_size(box, particles: int | None, x_range, y_range, equal: bool) -> tuple[int, int]:
    """Bins of a view drawn into ``box`` pixels: one per pixel, coarser for few particles.

    With fewer than about six particles per bin a full-resolution image is
    speckle; the grid is then made coarser (never below 64 bins along the
    shorter side) so the density reads. With ``equal`` (two position axes)
    the grid keeps the shape of the ranges, so bins are square.
    """
    w, h = int(box[0]), int(box[1])
    if equal:
        sx, sy = x_range[1] - x_range[0], y_range[1] - y_range[0]
        if sx > 0 and sy > 0:
            if sy / sx > h / w:
                w = max(int(round(h * sx / sy)), 16)
            else:
                h = max(int(round(w * sy / sx)), 16)
    if particles is not None and particles > 0:
        shrink = math.sqrt(particles / (PER_BIN * w * h))
        if shrink < 1.0:
            shrink = max(shrink, min(MIN_BINS / min(w, h), 1.0))
            w, h = max(int(round(w * shrink)), 1), max(int(round(h * shrink)), 1)
    return w, h


# ---------------------------------------------------------------------------------------------
# axes and ranges

def default_axes(frame, cols):
    """Space view: the first two position axes. Phase space: x against its momentum component."""
    pos = frame.position_names if frame is not None else []
    mom = frame.momentum_names() if frame is not None else []
    cols = list(cols) or list(pos)
    space = (pos + [c for c in cols if c not in pos])[:2]
    if len(space) < 2:
        space = (space + cols + cols)[:2]
    first = pos[0] if pos else cols[0]
    partner = mom[0] if mom else next((c for c in cols if c != first), first)
    return tuple(space), (first, partner)


def has_view(frame, which: str) -> str | None:
    """None when ``frame`` has what the ``which`` view needs, else what it lacks (for a note)."""
    if which == "space":
        return None if len(frame.position_names) >= 2 else "two position axes"
    if frame.position_names and frame.momentum_names():
        return None
    return "a position and a momentum (or velocity) column"


def equal_aspect(frames, xcol: str, ycol: str) -> bool:
    """Both axes are positions: the picture keeps the shape of space."""
    return all(xcol in f.position_names and ycol in f.position_names for f in frames)


def opening_range(frames, col: str, layout=None, cols=None) -> tuple[float, float]:
    """The range a view of ``col`` opens on, shared by every frame in ``frames``.

    A position axis of the layout opens on the domain; any other column on
    the union of the frames' finite data ranges, widened by DATA_MARGIN.
    ``cols`` names the column in each frame when runs call it differently
    (two runs compared side by side); by default it is ``col`` in all.
    """
    from .render import data_range, padded_range
    cols = [col] * len(frames) if cols is None else list(cols)
    pairs = [(f, c) for f, c in zip(frames, cols) if f is not None and c in f]
    if pairs and layout is not None and pairs[0][1] in pairs[0][0].position_names:
        a = pairs[0][0].position_names.index(pairs[0][1])
        if a < layout.ndim:
            lo, hi = float(layout.domain_lower[a]), float(layout.domain_upper[a])
            if math.isfinite(lo) and math.isfinite(hi) and hi > lo:
                return (lo, hi)
    lo, hi = math.inf, -math.inf
    for f, c in pairs:
        if f.length:
            a, b = data_range(f, c)
            lo, hi = min(lo, a), max(hi, b)
    if not hi >= lo:
        return (0.0, 1.0)
    return padded_range(lo, hi, margin=DATA_MARGIN)


def range_problem(value, opening=None) -> str | None:
    """Why ``value`` cannot be a view range (None when it can).

    A range must be two finite numbers, the second above the first, not
    narrower than the data can resolve and, given the ``opening`` range,
    within MAX_SPANS of it.
    """
    try:
        lo, hi = (float(v) for v in value)
    except (TypeError, ValueError):
        return "a range is two numbers"
    if not (math.isfinite(lo) and math.isfinite(hi)):
        return "a range needs finite numbers"
    if not hi > lo:
        return "a range needs its upper end above its lower end"
    span = hi - lo
    if not math.isfinite(span):
        return "the range is too wide to draw"
    if span <= 64 * 2.220446049250313e-16 * max(abs(lo), abs(hi)):
        return "the range is too narrow to draw"
    if opening is not None:
        olo, ohi = float(opening[0]), float(opening[1])
        ospan = ohi - olo
        if span > MAX_SPANS * ospan:
            return f"the range is more than {MAX_SPANS:g} times as wide as the data's"
        if span < MIN_SHARE * ospan:
            return "the range is narrower than the data can resolve"
        if hi < olo - MAX_SPANS * ospan or lo > ohi + MAX_SPANS * ospan:
            return "the range is far away from the data"
    return None


# ---------------------------------------------------------------------------------------------
# labels and names

def run_name(ctx) -> str:
    """A short name for a run: its folder's name (run menu, links, titles, report)."""
    src = ctx.run.source or "run"
    if isinstance(src, (list, tuple)):
        src = src[0] if src else "run"
    src = str(src).split(",")[0].strip().rstrip("/\\")
    name = os.path.basename(os.path.normpath(src)) if src else ""
    return name.replace("*", "").replace("?", "") or "run"


def snapshot_label(i: int, step=None, time=None, time_unit: str = "") -> str:
    """A snapshot as every view names it: position, step and time."""
    bits = [f"#{int(i)}"]
    if step is not None:
        bits.append(f"step {step}")
    if time is not None:
        bits.append(f"t = {time:.4g}{(' ' + time_unit) if time_unit else ''}")
    return " · ".join(bits)


def snapshot_label_of(snap, i: int) -> str:
    return snapshot_label(i, snap.step, snap.time, getattr(snap, "time_unit", "") or "")


def view_title(which: str, species: str, snapshot: str) -> str:
    """The title of a particle view, on the screen and in the export (the run is named above it)."""
    return f"{VIEWS[which]} · {species} · {snapshot}"


def value_label(frame, reduction: str, value) -> str:
    from .render import axis_label
    return "particles" if reduction == "count" else f"{reduction} of {axis_label(frame, value)}"


# ---------------------------------------------------------------------------------------------
# the view of a state

@dataclass(frozen=True)
class ParticleView:
    """Everything a particle view of a state draws, decided once for every output."""

    which: str                     # space | phase
    xcol: str
    ycol: str
    x_range: tuple[float, float]
    y_range: tuple[float, float]
    opening: tuple[tuple[float, float], tuple[float, float]]   # the ranges it opens on
    reduction: str                 # count | sum | mean
    value: str | None
    slab: tuple | None             # (column, lo, hi) or None
    cmap: str
    scaling: str
    grid: tuple[int, int]
    equal: bool
    title: str
    xlabel: str
    ylabel: str
    clabel: str
    notes: tuple[str, ...] = field(default=())
    diverging: bool = False        # draws a difference of two runs (of_difference)

    def aggregate(self, frame, mask=None):
        """The aggregate behind the picture (the image accumulator, through render.aggregate_points)."""
        from . import render
        return render.aggregate_points(frame, self.xcol, self.ycol, width=self.grid[0],
                                       height=self.grid[1], x_range=self.x_range,
                                       y_range=self.y_range, reduction=self.reduction,
                                       value=self.value, mask=mask, slab=self.slab)

    def image(self, agg):
        """The picture of an aggregate, with this view's colour map, scale and labels."""
        from . import render
        img = render.density_image(agg, cmap=self.cmap, scaling=self.scaling, title=self.title,
                                   xlabel=self.xlabel, ylabel=self.ylabel, clabel=self.clabel)
        return img.opts(aspect="equal" if self.equal else "auto", backend="matplotlib")

    def difference(self, ref_agg, cand_agg):
        """Candidate minus reference, pixel by pixel, of two aggregates of this view (one grid).

        Counts and sums: an empty pixel counts zero, a pixel empty in both runs is left
        out (NaN, drawn transparent). Means: NaN where either run has no particle.
        """
        a = np.asarray(ref_agg.values, dtype=np.float64)
        b = np.asarray(cand_agg.values, dtype=np.float64)
        if a.shape != b.shape:
            raise ValueError(f"aggregates on different grids: {a.shape} and {b.shape}")
        if self.reduction == "mean":
            d = b - a
        else:
            a0, b0 = np.nan_to_num(a, nan=0.0), np.nan_to_num(b, nan=0.0)
            d = np.where((a0 == 0) & (b0 == 0), np.nan, b0 - a0)
        out = cand_agg.copy(data=d)
        out.attrs = dict(cand_agg.attrs, reduction="difference",
                         particles=cand_agg.attrs.get("particles", 0),
                         ref_particles=ref_agg.attrs.get("particles", 0))
        return out

    def of_difference(self) -> "ParticleView":
        """This view drawing a difference (``difference``): DIFFERENCE_CMAP, a linear scale
        centred on zero (``difference_limits``), a zero difference drawn, not left blank."""
        return replace(self, cmap=DIFFERENCE_CMAP, scaling="linear", diverging=True,
                       title=f"{self.title} · {SHOW_LABELS['difference']}",
                       clabel=f"{DIFFERENCE_MEANS}: {self.clabel}")

    def difference_image(self, diff):
        """The picture of a difference: DIFFERENCE_CMAP, linear, limits symmetric about zero."""
        from . import render
        v = self if self.diverging else self.of_difference()
        lo, hi = difference_limits(diff.values)
        img = render.density_image(diff, cmap=v.cmap, scaling="linear", title=v.title,
                                   xlabel=v.xlabel, ylabel=v.ylabel, clabel=v.clabel)
        return img.opts(clim=(lo, hi), backend="bokeh").opts(
            clim=(lo, hi), aspect="equal" if v.equal else "auto", backend="matplotlib")

    def of_reference(self, title: str) -> "ParticleView":
        """This view drawing the reference run (same ranges, grid and colours; its own title)."""
        return replace(self, title=title)

    def shown(self, show: str, frame, ref_frame=None, ref_title: str = ""):
        """(view, aggregate) of what a state shows: ``candidate`` (the run in view),
        ``reference`` (the paired reference snapshot, this view's ranges and grid) or
        ``difference`` (candidate minus reference, ``of_difference``). The dashboard and
        ``export --view`` both draw what this returns."""
        if show == "candidate":
            return self, self.aggregate(frame)
        if ref_frame is None:
            raise ValueError(f"'{show}' needs the reference's frame")
        if show == "reference":
            return self.of_reference(ref_title or self.title), self.aggregate(ref_frame)
        if show == "difference":
            return self.of_difference(), self.difference(self.aggregate(ref_frame),
                                                         self.aggregate(frame))
        raise ValueError(f"show is one of {', '.join(SHOW_LABELS)}, not '{show}'")


def state_shown(state, view: ParticleView, frame, ref_i=None, ref_frame=None):
    """``view.shown`` for what ``state`` shows (``ViewState.showing``), the reference titled
    by its run and snapshot: the picture of the dashboard and of ``export --view`` alike."""
    show = state.showing
    title = view_title(view.which, state.species, state.reference_label(ref_i)) \
        if show == "reference" else ""
    return view.shown(show, frame, ref_frame, title)


def state_axes(state, which: str) -> tuple[str, str]:
    return (state.space_x, state.space_y) if which == "space" else (state.phase_x, state.phase_y)


def state_ranges(state, which: str):
    return (state.space_xr, state.space_yr) if which == "space" else (state.phase_xr, state.phase_yr)


def particle_view(state, which: str, *, frame=None, snapshot: int | None = None, frames=None,
                  box=SCREEN_BOX, x_range=None, y_range=None, slab_range=None) -> ParticleView:
    """The view ``which`` of ``state``: what the dashboard draws and the export writes.

    ``frames`` are the frames whose ranges the view must share (the export's
    snapshots side by side; by default the frame in view). ``x_range`` /
    ``y_range`` are a zoom (the screen's range stream); without them the
    state's ranges are used, and a range that cannot be drawn around this
    data falls back to the opening range with a note.
    """
    i = state.snapshot if snapshot is None else int(snapshot)
    if frame is None:
        frame = state.frame(i)
    xcol, ycol = state_axes(state, which)
    try:
        layout = state.served.layout(i)
    except Exception:          # a layout that cannot be made: ranges from the data
        layout = None
    sx, sy = state_ranges(state, which)
    slab = None
    slab_range = state.slab_range if slab_range is None else slab_range
    if state.slab_axis and slab_range:
        slab = (state.slab_axis, float(slab_range[0]), float(slab_range[1]))
    if state.color_by == "count":
        reduction, value = "count", None
    elif state.color_by == "weight":
        reduction, value = "sum", frame.column_for("weight")
        if value is None:
            reduction = "count"    # no weight column: every weight is 1
    else:
        reduction, value = "mean", state.color_column
    title = view_title(which, state.species, snapshot_label_of(state.served.snapshot(i), i))
    return make_view(which, frame, xcol, ycol, frames=frames, layout=layout,
                     x_range=x_range if x_range is not None else sx,
                     y_range=y_range if y_range is not None else sy,
                     reduction=reduction, value=value, slab=slab, cmap=state.cmap,
                     scaling=state.scaling, box=box, title=title)


def make_view(which: str, frame, xcol: str, ycol: str, *, frames=None, layout=None, x_range=None,
              y_range=None, reduction="count", value=None, slab=None, cmap=DEFAULT_CMAP,
              scaling=DEFAULT_SCALING, box=SCREEN_BOX, title="") -> ParticleView:
    """The policy's view of columns ``xcol``, ``ycol`` of ``frame`` (``particle_view`` without a state).

    For a drawing command that has no dashboard state (the movie): opening
    ranges shared over ``frames``, the grid for ``box`` pixels, labels from
    the columns' units; a wanted range that cannot be drawn around this data
    is replaced by the opening range, with a note.
    """
    frames = list(frames) if frames else [frame]
    opening = (opening_range(frames, xcol, layout), opening_range(frames, ycol, layout))
    notes = []
    chosen = []
    for axis, want, open_ in zip((xcol, ycol), (x_range, y_range), opening):
        problem = range_problem(want, open_) if want is not None else None
        if problem:
            notes.append(f"range of {axis} left at the data's: {problem}")
        chosen.append(open_ if want is None or problem else tuple(float(v) for v in want))
    equal = equal_aspect(frames, xcol, ycol)
    particles = max(f.length for f in frames)
    grid = grid_size(box, particles, chosen[0], chosen[1], equal)
    from .render import axis_label
    return ParticleView(which, xcol, ycol, chosen[0], chosen[1], opening, reduction, value, slab,
                        cmap, scaling, grid, equal, title, axis_label(frame, xcol),
                        axis_label(frame, ycol), value_label(frame, reduction, value),
                        tuple(notes))
