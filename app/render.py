"""The one aggregation path shared by the dashboard and the headless export.

Aggregate, then shade: :func:`aggregate_points` bins particles onto a pixel
grid with datashader (count, summed value, or mean of a column);
:func:`density_image` turns that grid into a holoviews element that the
bokeh dashboard and the matplotlib export draw the same way. A figure in a
report is therefore the figure on the screen.
"""

from __future__ import annotations

import threading
import weakref

import numpy as np
import pandas as pd
import xarray as xr

import datashader as ds

from ..engine import dask_backend
from ..diagnostics._colstats import finite_stats
from ..core.errors import OptionError

REDUCTIONS = ("count", "sum", "mean")
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
# per-frame caches (ranges, non-finite counts): a frame dies, its entries go
_cache_lock = threading.Lock()
_frame_cache: "weakref.WeakKeyDictionary[object, dict]" = weakref.WeakKeyDictionary()


def _cached(frame, key, compute):
    try:
        with _cache_lock:
            store = _frame_cache.setdefault(frame, {})
            if key in store:
                return store[key]
    except TypeError:          # not weak-referenceable: compute every time
        return compute()
    value = compute()
    with _cache_lock:
        store[key] = value
    return value


def _column(frame, col: str) -> np.ndarray:
    """A numeric column, kept in its own dtype (float32 stays float32)."""
    arr = frame[col]
    if arr.dtype.kind not in "fiub":
        raise OptionError(f"column '{col}' of species '{getattr(frame, 'species', '?')}' is not "
                          f"numeric and cannot be drawn")
    if arr.dtype.kind == "b":
        return arr.astype(np.uint8)
    return arr


def data_range(frame, col: str) -> tuple[float, float]:
    """Finite (min, max) of a column; (0, 1) for an empty or all-NaN column.

    Cached per frame and column, so moving between views costs one pass.
    """
    def compute():
        if dask_backend.partitioned(frame, [col]):
            return dask_backend.column_range(frame, col)
        lo, hi, _ = _stats(frame, col)
        return (0.0, 1.0) if lo is None else (lo, hi)
    return _cached(frame, ("range", col), compute)


def _stats(frame, col: str):
    """(finite min, finite max, non-finite count) of a column: one pass, cached per frame."""
    return _cached(frame, ("stats", col), lambda: finite_stats(_column(frame, col)))


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


def _nonfinite(frame, cols) -> np.ndarray | None:
    """Boolean mask of rows with a non-finite value in ``cols`` (None when there are none)."""
    def compute():
        bad = None
        for c in cols:
            arr = _column(frame, c)
            if arr.dtype.kind != "f" or not _stats(frame, c)[2]:
                continue   # the one-pass count says there is nothing to mask
            b = ~np.isfinite(arr)
            if b.any():
                bad = b if bad is None else (bad | b)
        return bad
    return _cached(frame, ("nonfinite", tuple(cols)), compute)


def axis_label(frame, col: str) -> str:
    """Column name with its unit, as written in the file: ``x [m]``."""
    unit = ""
    if frame is not None:
        unit = frame.units.get(col, "") if hasattr(frame, "units") else ""
    unit = str(unit).strip()
    return f"{col} [{unit}]" if unit else col


def _reduction(reduction: str, value: str | None):
    if reduction == "count":
        return ds.count()
    if reduction not in REDUCTIONS:
        raise OptionError(f"colour-by takes one of {', '.join(REDUCTIONS)}, got '{reduction}'")
    if not value:
        raise OptionError(f"colour-by '{reduction}' needs a column to {reduction}")
    return ds.sum("_v") if reduction == "sum" else ds.mean("_v")


def aggregate_points(frame, xcol: str, ycol: str, *, width: int = 800, height: int = 600,
                     x_range=None, y_range=None, reduction: str = "count", value=None,
                     mask=None, slab=None) -> xr.DataArray:
    """Bin the particles of ``frame`` onto a ``width`` x ``height`` grid.

    ``reduction`` is ``count`` (particles per pixel), ``sum`` (of column
    ``value``, e.g. weight) or ``mean`` (of any column). ``mask`` is a boolean
    array keeping a subset (a selection); ``slab=(col, lo, hi)`` keeps
    ``lo <= col < hi``. Rows with a non-finite coordinate are dropped; how
    many is in ``agg.attrs["nonfinite"]``. Bins follow datashader: the range
    is closed, the top edge falls in the last bin (as numpy.histogram2d).
    """
    width, height = int(width), int(height)
    if width < 1 or height < 1:
        raise OptionError("an image needs at least one pixel each way")
    needed = [xcol, ycol, value if reduction != "count" else None, slab[0] if slab else None]
    if mask is None and dask_backend.partitioned(frame, needed):
        # too big for memory (or --engine dask): datashader over a dask frame, piece by piece
        agg = dask_backend.aggregate_dask(frame, xcol, ycol, width=width, height=height,
                                          x_range=x_range, y_range=y_range, reduction=reduction,
                                          value=value, slab=slab, engine=dask_backend.drawing_engine())
        return _labelled(agg, frame, xcol, ycol, reduction, value)
    x = _column(frame, xcol)
    y = _column(frame, ycol)
    v = _column(frame, value) if (reduction != "count" and value) else None
    agg_fn = _reduction(reduction, value)

    keep = None
    if mask is not None:
        keep = np.asarray(mask, dtype=bool)
        if keep.shape != x.shape:
            raise OptionError(f"selection mask has {keep.size} entries for {x.size} particles")
    if slab is not None:
        scol, slo, shi = slab
        s = _column(frame, scol)
        with np.errstate(invalid="ignore"):
            inside = (s >= slo) & (s < shi)
        keep = inside if keep is None else (keep & inside)

    bad = _nonfinite(frame, (xcol, ycol))
    if bad is None:
        nonfinite = 0
    elif keep is None:
        nonfinite = int(np.count_nonzero(bad))
    else:
        nonfinite = int(np.count_nonzero(bad & keep))

    if keep is not None:
        x, y = x[keep], y[keep]
        v = v[keep] if v is not None else None
    cols = {"_x": x, "_y": y}
    if v is not None:
        cols["_v"] = v
    # copy=False keeps each column its own block: no copy of the particle arrays
    df = pd.DataFrame(cols, copy=False)

    if x_range is None:
        x_range = data_range(frame, xcol)
    if y_range is None:
        y_range = data_range(frame, ycol)
    x_range = padded_range(*x_range)
    y_range = padded_range(*y_range)
    cv = ds.Canvas(plot_width=width, plot_height=height, x_range=x_range, y_range=y_range)
    agg = cv.points(df, "_x", "_y", agg=agg_fn)
    agg = agg.rename({"_x": xcol, "_y": ycol}) if xcol != ycol else agg
    agg.attrs.update({
        "nonfinite": nonfinite,
        "particles": int(x.size) - nonfinite,
        "x_range": tuple(x_range),
        "y_range": tuple(y_range),
    })
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
