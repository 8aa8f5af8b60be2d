"""The one aggregation path shared by the dashboard and the headless export.

Aggregate, then shade: :func:`aggregate_points` bins particles onto a pixel
grid (count, summed value, or mean of a column) with the image accumulator
:class:`diagnostics.image.Image`, run by the one runner
(:func:`engine.reduce.reduce`); :func:`density_image` turns that grid into the
dashboard's holoviews element, and the export draws the same grid with
matplotlib (:mod:`app.mpl_figures`). A figure in a report is therefore the
figure on the screen.
"""

from __future__ import annotations

import threading
import weakref

import numpy as np
import pandas as pd
import xarray as xr

from ..core.errors import OptionError
from ..diagnostics.image import REDUCTIONS, ColumnRanges, Image
from ..engine import dask_backend
from ..engine.pieces import column_dtype
from ..engine.reduce import reduce

SCALINGS = ("linear", "log", "eq_hist")

_BACKENDS = ("bokeh", "matplotlib")


def _ensure_backends():
    import holoviews as hv
    # Options are declared per backend; both registries must exist for that,
    # and loading them must not change which backend the caller renders with.
    current = hv.Store.current_backend if hv.Store.renderers else None
    import holoviews.plotting.bokeh  # noqa: F401
    import holoviews.plotting.mpl  # noqa: F401
    if current is not None and current in hv.Store.renderers and hv.Store.current_backend != current:
        hv.Store.set_current_backend(current)


# ---------------------------------------------------------------------------
# per-frame caches (data ranges): a frame dies, its entries go
_cache_lock = threading.Lock()
_frame_cache: "weakref.WeakKeyDictionary[object, dict]" = weakref.WeakKeyDictionary()


def _lookup(frame, key):
    try:
        with _cache_lock:
            return _frame_cache.get(frame, {}).get(key)
    except TypeError:          # not weak-referenceable: nothing is kept
        return None


def _keep(frame, key, value) -> None:
    try:
        with _cache_lock:
            _frame_cache.setdefault(frame, {})[key] = value
    except TypeError:
        pass


def _column(frame, col: str) -> np.ndarray:
    """A numeric column, read whole and kept on the frame, in its own dtype (float32 stays float32)."""
    arr = frame[col]
    if arr.dtype.kind not in "fiub":
        raise OptionError(f"column '{col}' of species '{getattr(frame, 'species', '?')}' is not "
                          f"numeric and cannot be drawn")
    return arr


def _where(frame, cols) -> str:
    """Where a drawing reduction over ``cols`` runs (:func:`engine.reduce.reduce`'s ``where``).

    A frame the partitioned engine takes (too big for memory, or ``--engine
    dask``) is read piece by piece on dask; any other has its columns read
    whole once and kept on the frame, so a re-render (a zoom, a pan) reads
    nothing again, and its pieces run on the piece pool.
    """
    cols = [c for c in cols if c]
    if dask_backend.partitioned(frame, cols):
        for c in cols:
            dt = column_dtype(frame, c)
            if dt is not None and np.dtype(dt).kind not in "fiub":
                _column(frame, c)          # the one error naming the column
        return "dask"
    for c in cols:
        _column(frame, c)
    return "threads"


def data_range(frame, col: str) -> tuple[float, float]:
    """Finite (min, max) of a column; (0, 1) for an empty or all-NaN column.

    Cached per frame and column, so moving between views costs one pass.
    """
    lo, hi, _ = column_stats(frame, [col])[col]
    return (0.0, 1.0) if lo is None else (lo, hi)


def column_stats(frame, cols) -> dict:
    """``{column: (finite min, finite max, non-finite count)}`` (:class:`diagnostics.image.ColumnRanges`).

    Cached per frame and column; the columns not cached yet are reduced in one pass.
    """
    out = {c: _lookup(frame, ("stats", c)) for c in dict.fromkeys(cols)}
    missing = [c for c, r in out.items() if r is None]
    if missing:
        got = reduce(ColumnRanges(missing), frame, dask_backend.drawing_context(),
                     where=_where(frame, missing))
        for c in missing:
            out[c] = got[c]
            _keep(frame, ("stats", c), got[c])
    return out


def padded_range(lo: float, hi: float, margin: float = 0.0) -> tuple[float, float]:
    """A range with room for a single value (a zero-width range cannot be binned).

    ``margin`` widens a non-empty range by that share of its span on each side.
    """
    lo, hi = float(lo), float(hi)
    if hi > lo:
        pad = (hi - lo) * margin
        return (lo - pad, hi + pad)
    pad = abs(lo) * 1e-6 if lo != 0 else 0.5
    return (lo - pad, hi + pad)


def axis_label(frame, col: str) -> str:
    """Column name with its unit, as written in the file: ``x [m]``."""
    unit = ""
    if frame is not None:
        unit = frame.units.get(col, "") if hasattr(frame, "units") else ""
    unit = str(unit).strip()
    return f"{col} [{unit}]" if unit else col


def _check_reduction(reduction: str, value: str | None) -> None:
    if reduction not in REDUCTIONS:
        raise OptionError(f"colour-by takes one of {', '.join(REDUCTIONS)}, got '{reduction}'")
    if reduction != "count" and not value:
        raise OptionError(f"colour-by '{reduction}' needs a column to {reduction}")


def aggregate_points(frame, xcol: str, ycol: str, *, width: int = 800, height: int = 600,
                     x_range=None, y_range=None, reduction: str = "count", value=None,
                     mask=None, slab=None) -> xr.DataArray:
    """Bin the particles of ``frame`` onto a ``width`` x ``height`` grid.

    ``reduction`` is ``count`` (particles per pixel), ``sum`` (of column
    ``value``, e.g. weight) or ``mean`` (of any column). ``mask`` is a boolean
    array keeping a subset (a selection); ``slab=(col, lo, hi)`` keeps
    ``lo <= col < hi``. Rows with a non-finite coordinate are dropped; how
    many is in ``agg.attrs["nonfinite"]``. Bins follow
    :class:`diagnostics.image.Image` (datashader's rule): the range is
    closed, the top edge falls in the last bin (as numpy.histogram2d).
    """
    width, height = int(width), int(height)
    if width < 1 or height < 1:
        raise OptionError("an image needs at least one pixel each way")
    _check_reduction(reduction, value)
    value = value if reduction != "count" else None
    where = _where(frame, [xcol, ycol, value, slab[0] if slab else None])
    if mask is not None:
        mask = np.asarray(mask, dtype=bool)
        if mask.shape != (len(frame),):
            raise OptionError(f"selection mask has {mask.size} entries for {len(frame)} particles")
        where = "threads"          # the selection is an array of this process
    # the columns' ranges and non-finite counts, one cached pass: the default canvas, and whether
    # the binning has any non-finite coordinate to count
    stats = column_stats(frame, [xcol, ycol])
    x_range = padded_range(*(x_range if x_range is not None else data_range(frame, xcol)))
    y_range = padded_range(*(y_range if y_range is not None else data_range(frame, ycol)))
    acc = Image(xcol, ycol, width=width, height=height, x_range=x_range, y_range=y_range,
                reduction=reduction, value=value, slab=slab, mask=mask,
                finite=not (stats[xcol][2] or stats[ycol][2]))
    agg = reduce(acc, frame, dask_backend.drawing_context(), where=where)
    return _labelled(agg, frame, xcol, ycol, reduction, value)


def _labelled(agg: xr.DataArray, frame, xcol, ycol, reduction, value) -> xr.DataArray:
    agg.name = reduction if reduction == "count" else f"{reduction}_{value}"
    agg.attrs.update({
        "reduction": reduction,
        "value": value or "",
        "xlabel": axis_label(frame, xcol),
        "ylabel": axis_label(frame, ycol),
        "vlabel": ("particles" if reduction == "count"
                   else f"{reduction} of {axis_label(frame, value)}"),
    })
    return agg


def histogram_counts(agg: xr.DataArray) -> np.ndarray:
    """The aggregate as a plain (ny, nx) array, empty pixels 0 (for tests and tables)."""
    a = np.asarray(agg.values, dtype=np.float64)
    return np.nan_to_num(a, nan=0.0)


# ---------------------------------------------------------------------------
def density_image(agg: xr.DataArray, *, cmap: str, scaling: str = "eq_hist", title: str = "",
                  xlabel: str = "", ylabel: str = "", clabel: str = "", width: int | None = None,
                  height: int | None = None):
    """A holoviews Image of an aggregate, with a colour bar, for bokeh and matplotlib alike.

    Empty pixels (zero count, or no particle for a mean) are left transparent
    so the background and overlays show through.
    """
    import holoviews as hv
    _ensure_backends()
    if scaling not in SCALINGS:
        raise OptionError(f"scaling takes one of {', '.join(SCALINGS)}, got '{scaling}'")
    ydim, xdim = agg.dims[:2]
    from .colours import shown_values
    data = shown_values(agg.values, agg.attrs.get("reduction", "count"), scaling)
    xs = np.asarray(agg.coords[xdim].values, dtype=np.float64)
    ys = np.asarray(agg.coords[ydim].values, dtype=np.float64)
    xr_ = agg.attrs.get("x_range") or (xs[0], xs[-1])
    yr_ = agg.attrs.get("y_range") or (ys[0], ys[-1])
    bounds = (float(xr_[0]), float(yr_[0]), float(xr_[1]), float(yr_[1]))
    vname = "value"
    xl = xlabel or agg.attrs.get("xlabel") or str(xdim)
    yl = ylabel or agg.attrs.get("ylabel") or str(ydim)
    cl = clabel or agg.attrs.get("vlabel") or "particles"
    # dimension names must differ from each other; labels carry units
    xname = str(xdim)
    yname = str(ydim) if str(ydim) != xname else f"{ydim} "
    kx = hv.Dimension(xname, label=xl)
    ky = hv.Dimension(yname, label=yl)
    kv = hv.Dimension(vname, label=cl)
    img = hv.Image((xs, ys, data), kdims=[kx, ky], vdims=[kv], bounds=bounds)
    # no fixed clim: a dynamic view recomputes the colour range for every frame
    common = dict(cmap=cmap, cnorm=scaling, colorbar=True, title=title)
    bokeh_opts = dict(common, tools=["hover"], clipping_colors={"NaN": (0, 0, 0, 0)},
                      colorbar_position="right", active_tools=["wheel_zoom"])
    if width:
        bokeh_opts["width"] = int(width)
    if height:
        bokeh_opts["height"] = int(height)
    mpl_opts = dict(common, clipping_colors={"NaN": (0, 0, 0, 0)})
    if width and height:
        mpl_opts["aspect"] = float(width) / float(height)
    img = img.opts(backend="bokeh", **bokeh_opts).opts(backend="matplotlib", **mpl_opts)
    return img


def block_rectangles(layout, axes=(0, 1), slab=None):
    """Block boxes projected on two axes: (x0, y0, x1, y1, row) after dropping duplicates.

    ``slab=(axis_index, lo, hi)`` keeps only blocks that overlap that slab of
    a third axis (3-D runs).
    """
    lo = np.asarray(layout.lower)
    up = np.asarray(layout.upper)
    a, b = axes
    rows = np.arange(layout.nblocks)
    if slab is not None and layout.ndim > 2:
        k, slo, shi = slab
        rows = rows[(up[:, k] > slo) & (lo[:, k] < shi)]
    rect = np.stack([lo[rows, a], lo[rows, b], up[rows, a], up[rows, b]], axis=1)
    return rect, rows


def block_overlay(layout, counts=None, labels: bool = False, *, axes=(0, 1), slab=None,
                  line_color: str = "#f4f1de", tint_cmap: str = "Oranges"):
    """Block outlines of ``layout``; tinted by census ``counts`` (one per block row), or labelled.

    ``counts`` is indexed like the layout's rows (``layout.block_index`` maps
    block ids to rows). With ``labels`` each block shows its id and count.
    """
    import holoviews as hv
    _ensure_backends()
    rect, rows = block_rectangles(layout, axes, slab)
    ids = np.asarray(layout.block_id)[rows]
    lev = np.asarray(layout.level)[rows]
    rank = np.asarray(layout.rank)[rows]
    cnt = (np.asarray(counts, dtype=np.float64)[rows] if counts is not None
           else np.full(len(rows), np.nan))
    table = pd.DataFrame({"x0": rect[:, 0], "y0": rect[:, 1], "x1": rect[:, 2], "y1": rect[:, 3],
                          "block": ids, "level": lev, "rank": rank, "count": cnt})
    # deeper levels drawn last so refined blocks sit on top
    table = table.sort_values("level", kind="stable")
    vdims = ["block", "level", "rank", "count"]
    rects = hv.Rectangles(table, kdims=["x0", "y0", "x1", "y1"], vdims=vdims)
    line_width = {"bokeh": 1.2, "matplotlib": 0.8}
    if counts is not None and not labels:
        rects = rects.opts(
            backend="bokeh", color="count", cmap=tint_cmap, fill_alpha=0.35,
            line_color=line_color, line_width=line_width["bokeh"], tools=["hover"]).opts(
            backend="matplotlib", color="count", cmap=tint_cmap, alpha=0.35,
            edgecolor=line_color, linewidth=line_width["matplotlib"])
    else:
        rects = rects.opts(
            backend="bokeh", fill_alpha=0.0, line_color=line_color,
            line_width=line_width["bokeh"], tools=["hover"]).opts(
            backend="matplotlib", facecolor="none", edgecolor=line_color,
            linewidth=line_width["matplotlib"])
    if not labels:
        return rects
    cx = 0.5 * (table["x0"].to_numpy() + table["x1"].to_numpy())
    cy = 0.5 * (table["y0"].to_numpy() + table["y1"].to_numpy())
    text = [f"{int(b)}" if not np.isfinite(c) else f"{int(b)}: {int(c)}"
            for b, c in zip(table["block"], table["count"])]   # one label per block, not per particle
    lab = hv.Labels((cx, cy, text), kdims=["x", "y"], vdims=["text"]).opts(
        backend="bokeh", text_color=line_color, text_font_size="8pt").opts(
        backend="matplotlib", color=line_color, size=6)
    return rects * lab


# ---------------------------------------------------------------------------
# the selection layer: a box in one view picks the same particles in every view
def box_mask(frame, xcol: str, ycol: str, box) -> np.ndarray:
    """Particles with ``x0 <= xcol <= x1`` and ``y0 <= ycol <= y1`` (box = (x0, y0, x1, y1))."""
    x0, y0, x1, y1 = (float(v) for v in box)
    x = _column(frame, xcol)
    y = _column(frame, ycol)
    with np.errstate(invalid="ignore"):
        return (x >= x0) & (x <= x1) & (y >= y0) & (y <= y1)


def selection_summary(frame, mask) -> tuple[int, float]:
    """Number of selected particles and their summed weight (a missing weight is 1)."""
    mask = np.asarray(mask, dtype=bool)
    n = int(np.count_nonzero(mask))
    w = frame.per_particle("weight", 1.0)
    if np.ndim(w) == 0:
        return n, float(w) * n
    return n, float(np.sum(np.asarray(w, dtype=np.float64)[mask]))
