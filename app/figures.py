"""Figures of the audit as holoviews objects: the dashboard's side panels and the notebook.

What each figure shows is decided by ``app.figure_data`` (the same records
the export draws with matplotlib in ``app.mpl_figures``); a builder here turns
that record into a holoviews element or overlay with options for both the
bokeh and the matplotlib backend.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

import holoviews as hv

from . import figure_data as D
from .figure_data import (BAND_COLOUR, BAR_COLOUR, LINE_COLOUR, first_exits,  # noqa: F401
                          judged_drift)
from .view_policy import DEFAULT_CMAP

_BOKEH_SIZE = {"width": 620, "height": 460}
_MPL_SIZE = {"fig_inches": (7.5, 5.5)}


_BACKENDS_READY = False


def ensure_backends() -> None:
    """Load both plotting backends without changing the one in force.

    Options can only be attached for a loaded backend; the first one loaded
    would otherwise become the current backend as a side effect.
    """
    global _BACKENDS_READY
    if _BACKENDS_READY:
        return
    current = hv.Store.current_backend if hv.Store.renderers else None
    import holoviews.plotting.bokeh  # noqa: F401
    import holoviews.plotting.mpl  # noqa: F401
    # switching backends is slow (it rebuilds option trees): only when the import changed it
    if current is not None and current in hv.Store.renderers and hv.Store.current_backend != current:
        hv.Store.set_current_backend(current)
    _BACKENDS_READY = True


def _style(obj, common=None, bokeh=None, mpl=None):
    """Attach options for both backends; shared keywords go to both."""
    ensure_backends()
    common = dict(common or {})
    obj = obj.opts(**common, **(bokeh or {}), backend="bokeh")
    obj = obj.opts(**common, **(mpl or {}), backend="matplotlib")
    return obj


def _finite_range(values, pad=0.0):
    v = np.asarray(values, dtype=float)
    v = v[np.isfinite(v)]
    if v.size == 0:
        return (0.0, 1.0)
    lo, hi = float(v.min()), float(v.max())
    if hi <= lo:
        hi = lo + 1.0
    span = hi - lo
    return (lo - pad * span, hi + pad * span)


# census ------------------------------------------------------------------------------------
def census_map(census_df: pd.DataFrame, layout, title: str = "", *, value: str = "count",
               cmap=DEFAULT_CMAP, xlabel=None, ylabel=None, labels: bool | None = None):
    """Blocks drawn over the domain, coloured by ``value`` (count or weight) per block
    (``figure_data.census_map``); refined blocks outlined on top."""
    m = D.census_map(census_df, layout, title, value=value, cmap=cmap, xlabel=xlabel,
                     ylabel=ylabel, labels=labels)
    xd = hv.Dimension("x0", label=m.xlabel)
    yd = hv.Dimension("y0", label=m.ylabel)
    vd = hv.Dimension(m.value, label=m.value_label)
    rects = hv.Rectangles(m.table, kdims=[xd, yd, "x1", "y1"], vdims=[vd, "level", "block"])
    rects = _style(rects, common={"color": m.value, "cmap": m.cmap, "colorbar": True, "clim": m.clim},
                   bokeh={"line_color": D.BLOCK_EDGE, "line_width": 1.2, "tools": ["hover"]},
                   mpl={"edgecolor": D.BLOCK_EDGE, "linewidth": 1.2})
    parts = [rects]
    if m.refined is not None:
        outline = hv.Rectangles(m.refined, kdims=[xd, yd, "x1", "y1"], vdims=[vd, "level", "block"])
        outline = _style(outline, common={"alpha": 1.0},
                         bokeh={"fill_alpha": 0.0, "line_color": D.REFINED_EDGE, "line_width": 2.0},
                         mpl={"facecolor": "none", "edgecolor": D.REFINED_EDGE, "linewidth": 2.0})
        parts.append(outline)
    if m.labels is not None:
        cx, cy, text, dark = m.labels
        for mask, ink in ((dark, "#111111"), (~dark, "white")):
            if mask.any():
                lab = hv.Labels((cx[mask], cy[mask], text[mask]), kdims=[xd, yd], vdims="text")
                parts.append(_style(lab, bokeh={"text_color": ink, "text_font_size": "9pt"},
                                    mpl={"color": ink, "size": 11}))
    return _style(hv.Overlay(parts), common={"title": m.title, "xlim": m.xlim, "ylim": m.ylim},
                  bokeh={**_BOKEH_SIZE, "data_aspect": 1 if m.equal else None},
                  mpl={**_MPL_SIZE, "aspect": "equal" if m.equal else "auto"})


def rank_bars(rank_df: pd.DataFrame, imbalance=None, title: str = "", *, value: str = "count"):
    """Load per rank as bars, the mean as a line, max/mean in the title (``figure_data.rank_bars``)."""
    r = D.rank_bars(rank_df, imbalance, title, value=value)
    vd = hv.Dimension(value, label=r.value_label)
    bars = hv.Histogram((r.edges, r.load), kdims=[hv.Dimension("rank", label="rank")], vdims=[vd])
    bars = _style(bars, common={"alpha": 0.9},
                  bokeh={"color": BAR_COLOUR, "line_color": "white", "tools": ["hover"]},
                  mpl={"facecolor": BAR_COLOUR, "edgecolor": "white"})
    line = _style(hv.HLine(r.mean), common={"color": LINE_COLOUR},
                  bokeh={"line_width": 2.5, "line_dash": "dashed"},
                  mpl={"linewidth": 2.5, "linestyle": "--"})
    common = {"title": r.title, "ylim": r.ylim, "xlim": r.xlim}
    if r.xticks is not None:
        common["xticks"] = r.xticks
    return _style(bars * line, common=common, bokeh=_BOKEH_SIZE, mpl={**_MPL_SIZE, "aspect": "auto"})


# migration -----------------------------------------------------------------------------------
def transfer_heatmap(migration_df: pd.DataFrame, title: str = "", *, cmap=DEFAULT_CMAP,
                     include_stay: bool = False):
    """Particles that went from block i to block j, log colour, empty cells left blank
    (``figure_data.transfer_matrix``)."""
    t = D.transfer_matrix(migration_df, title, cmap=cmap, include_stay=include_stay)
    fd = hv.Dimension("from_block", label=t.xlabel)
    td = hv.Dimension("to_block", label=t.ylabel)
    cd = hv.Dimension("count", label=t.value_label)
    if t.contiguous:
        lo, hi = t.ids[0] - 0.5, t.ids[-1] + 0.5
        # Image rows run from the top (largest y) down
        img = hv.Image(np.flipud(t.matrix.T), bounds=(lo, lo, hi, hi), kdims=[fd, td], vdims=[cd])
    else:
        img = hv.HeatMap(t.cells(), kdims=[fd, td], vdims=[cd])
    return _style(img, common={"cmap": t.cmap, "colorbar": True, "logz": t.logz, "clim": t.clim,
                               "title": t.title},
                  bokeh={**_BOKEH_SIZE, "tools": ["hover"], "clipping_colors": {"NaN": D.EMPTY_CELL}},
                  mpl={**_MPL_SIZE, "aspect": "equal", "clipping_colors": {"NaN": D.EMPTY_CELL}})


def displacement_histogram(displacements_cells, steps=None, title: str = "", *, bins: int = 60):
    """How far matched particles went, in level-0 cells, with the one-cell-per-step mark
    (``figure_data.displacement_histogram``)."""
    h = D.displacement_histogram(displacements_cells, steps, title, bins=bins)
    xd = hv.Dimension("displacement", label=h.xlabel)
    yd = hv.Dimension("particles", label=h.ylabel)
    # a log axis needs positive bars; empty bins are drawn as nothing
    hist = hv.Histogram((h.edges, h.counts), kdims=[xd], vdims=[yd])
    hist = _style(hist, common={"alpha": 0.9, "logy": True},
                  bokeh={"color": BAR_COLOUR, "line_color": "white", "tools": ["hover"]},
                  mpl={"facecolor": BAR_COLOUR, "edgecolor": "white"})
    line = _style(hv.VLine(h.limit), common={"color": LINE_COLOUR},
                  bokeh={"line_width": 2.5, "line_dash": "dashed"},
                  mpl={"linewidth": 2.5, "linestyle": "--"})
    return _style(hist * line, common={"title": h.title, "ylim": h.ylim, "xlim": h.xlim},
                  bokeh=_BOKEH_SIZE, mpl={**_MPL_SIZE, "aspect": "auto"})


# drift -------------------------------------------------------------------------------------------
def drift_curves(drift_df: pd.DataFrame, rtol=None, title: str = "", *, x: str | None = None,
                 checked=None, xlabel: str | None = None):
    """Relative drift of every total over the run against the ±rtol band, one panel per total
    (``figure_data.drift_curves``)."""
    c = D.drift_curves(drift_df, rtol, title, x=x, checked=checked, xlabel=xlabel)
    xd = hv.Dimension(c.x, label=c.xlabel)
    yd = hv.Dimension("relative_drift", label="relative drift")
    panels = []
    for p in c.panels:
        parts = []
        if p.band is not None:
            parts.append(_style(hv.HSpan(-p.band, p.band), common={"alpha": 0.16},
                                bokeh={"color": BAND_COLOUR, "line_alpha": 0},
                                mpl={"color": BAND_COLOUR, "facecolor": None, "linewidth": 0}))
            parts += [_style(hv.HLine(s * p.band), common={"color": BAND_COLOUR},
                             bokeh={"line_width": 1.5, "line_dash": "dashed"},
                             mpl={"linewidth": 1.0, "linestyle": "--"}) for s in (-1, 1)]
        for sp, xs, ys, colour in p.curves:
            parts.append(_style(hv.Curve((xs, ys), xd, yd, label=sp), common={"color": colour},
                                bokeh={"line_width": 2.2, "tools": ["hover"]}, mpl={"linewidth": 1.8}))
        if p.exits is not None:
            parts.append(_style(hv.Scatter(p.exits, xd, yd), common={"color": LINE_COLOUR},
                                bokeh={"marker": "x", "size": 14, "line_width": 3},
                                mpl={"marker": "X", "s": 110, "edgecolors": "white", "linewidth": 0.8}))
        if not parts:
            parts.append(hv.Curve([], xd, yd))
        panels.append(_style(hv.Overlay(parts),
                             common={"title": p.title, "ylim": p.ylim, "xlabel": c.xlabel,
                                     "ylabel": p.ylabel, "show_legend": p.legend,
                                     "legend_position": "top_left"},
                             bokeh={"width": 330, "height": 240, "legend_cols": 1},
                             mpl={"aspect": "auto", "xformatter": "%.3g",
                                  "xticks": 3 if c.ncols >= 3 else 5, "yticks": 5}))
    if not panels:
        panels = [_style(hv.Curve([], xd, yd), common={"title": "no totals"})]
    lay = hv.Layout(panels).cols(c.ncols)
    return _style(lay, common={"title": c.title, "shared_axes": False},
                  bokeh={}, mpl={"fig_inches": (10, 7), "sublabel_format": "", "tight": True,
                                 "tight_padding": 1.2, "fig_bounds": (0.01, 0.01, 0.99, 0.94)})


# deposition and plain histograms --------------------------------------------------------------
def deposit_map(grid, layout, title: str = "", *, cmap=DEFAULT_CMAP, xlabel=None, ylabel=None,
                label: str = "weight per cell"):
    """A deposited field on the level-0 cells (``figure_data.deposit_map``)."""
    m = D.deposit_map(grid, layout, title, cmap=cmap, xlabel=xlabel, ylabel=ylabel, label=label)
    xd = hv.Dimension("x", label=m.xlabel)
    yd = hv.Dimension("y", label=m.ylabel)
    vd = hv.Dimension("density", label=m.value_label)
    img = hv.Image(np.flipud(m.grid.T), bounds=m.bounds, kdims=[xd, yd], vdims=[vd])
    return _style(img, common={"cmap": m.cmap, "colorbar": True, "title": m.title},
                  bokeh={**_BOKEH_SIZE, "tools": ["hover"], "data_aspect": 1},
                  mpl={**_MPL_SIZE, "aspect": "equal"})


def histogram_1d(values, weights=None, bins=60, title: str = "", xlabel: str = "value", *,
                 ylabel: str | None = None, logy: bool = False):
    """A weighted histogram of one column."""
    v = np.asarray(values, dtype=float).ravel()
    w = None if weights is None or np.isscalar(weights) else np.asarray(weights, dtype=float).ravel()
    ok = np.isfinite(v) if w is None else np.isfinite(v) & np.isfinite(w)
    v = v[ok]
    w = None if w is None else w[ok]
    rng = _finite_range(v) if v.size else (0.0, 1.0)
    counts, edges = np.histogram(v, bins=bins, range=rng, weights=w)
    if np.isscalar(weights) and weights is not None:
        counts = counts * float(weights)
    yl = ylabel or ("weight" if weights is not None else "particles")
    h = hv.Histogram((edges, np.where(counts > 0, counts, np.nan) if logy else counts),
                     kdims=[hv.Dimension("value", label=xlabel)], vdims=[hv.Dimension("n", label=yl)])
    return _style(h, common={"alpha": 0.9, "title": title, "logy": logy},
                  bokeh={**_BOKEH_SIZE, "color": BAR_COLOUR, "line_color": "white", "tools": ["hover"]},
                  mpl={**_MPL_SIZE, "aspect": "auto", "facecolor": BAR_COLOUR, "edgecolor": "white"})
