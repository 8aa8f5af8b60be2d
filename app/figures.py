"""Figures of the audit as holoviews objects, the same for the dashboard and the export.

Each builder takes plain tables or arrays (never a file) and returns a
holoviews element or overlay with options set for both the bokeh and the
matplotlib backend, so the dashboard's side panel and the exported PNG are
one figure drawn twice.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

import holoviews as hv

from .view_policy import DEFAULT_CMAP

#: colours of the marks drawn over the data (band, reference lines, exits)
BAND_COLOUR = "#2a9d8f"
LINE_COLOUR = "#d1495b"
BAR_COLOUR = "#3d5a80"
#: categorical colours for many curves (distinct on a projector, colour-blind aware first)
CURVE_COLOURS = ("#0072B2", "#E69F00", "#009E73", "#CC79A7", "#56B4E9", "#D55E00", "#F0E442",
                 "#000000", "#7f7f7f", "#8c564b", "#17becf", "#bcbd22", "#9467bd", "#ff9896",
                 "#98df8a", "#c5b0d5", "#aec7e8", "#ffbb78", "#393b79", "#637939")

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


def _sum_over_species(df: pd.DataFrame, keys, values) -> pd.DataFrame:
    """One row per key: the table's ``all`` rows when it has them, else the sum over species."""
    if "species" in df.columns and len(df):
        sp = df["species"].astype(str)
        df = df[sp == "all"] if (sp == "all").any() else df
    if not len(df):
        return pd.DataFrame({k: pd.Series(dtype="int64") for k in keys}
                            | {v: pd.Series(dtype="float64") for v in values})
    return df.groupby(list(keys), as_index=False, sort=True)[list(values)].sum()


# census ------------------------------------------------------------------------------------
def census_map(census_df: pd.DataFrame, layout, title: str = "", *, value: str = "count",
               cmap=DEFAULT_CMAP, xlabel=None, ylabel=None, labels: bool | None = None):
    """Blocks drawn over the domain, coloured by ``value`` (count or weight) per block.

    Finer levels are drawn after coarser ones so refined blocks sit on top.
    A 3-D layout is seen from above: blocks sharing an x-y footprint on one
    level are summed. A 1-D layout draws each level as a strip.
    """
    per_block = _sum_over_species(census_df, ["block"], [value]) if len(census_df) else \
        pd.DataFrame({"block": [], value: []})
    counts = dict(zip(per_block["block"].astype(np.int64), per_block[value].astype(float)))
    ids = layout.block_id
    vals = np.array([counts.get(int(b), 0.0) for b in ids], dtype=float)
    outside = counts.get(-1, 0.0)
    d = layout.ndim
    lev = layout.level.astype(np.int64)
    if d >= 2:
        x0, y0 = layout.lower[:, 0], layout.lower[:, 1]
        x1, y1 = layout.upper[:, 0], layout.upper[:, 1]
        if d == 3:
            foot = pd.DataFrame({"x0": x0, "y0": y0, "x1": x1, "y1": y1, "level": lev, "v": vals,
                                 "block": ids})
            foot = foot.groupby(["level", "x0", "y0", "x1", "y1"], as_index=False).agg(
                v=("v", "sum"), block=("block", "min"))
            x0, y0, x1, y1 = (foot[c].to_numpy() for c in ("x0", "y0", "x1", "y1"))
            lev, vals, ids = foot["level"].to_numpy(), foot["v"].to_numpy(), foot["block"].to_numpy()
    else:
        x0, x1 = layout.lower[:, 0], layout.upper[:, 0]
        y0, y1 = lev.astype(float), lev + 0.9
    order = np.argsort(lev, kind="stable")
    table = pd.DataFrame({"x0": x0[order], "y0": y0[order], "x1": x1[order], "y1": y1[order],
                          value: vals[order], "level": lev[order], "block": ids[order]})
    xd = hv.Dimension("x0", label=xlabel or "x")
    yd = hv.Dimension("y0", label=ylabel or ("y" if d >= 2 else "level"))
    vd = hv.Dimension(value, label="particles" if value == "count" else "weight")
    rects = hv.Rectangles(table, kdims=[xd, yd, "x1", "y1"], vdims=[vd, "level", "block"])
    edge = "white"
    rects = _style(rects, common={"color": value, "cmap": cmap, "colorbar": True,
                                  "clim": (0.0, max(float(vals.max()) if vals.size else 1.0, 1.0))},
                   bokeh={"line_color": edge, "line_width": 1.2, "tools": ["hover"]},
                   mpl={"edgecolor": edge, "linewidth": 1.2})
    parts = [rects]
    if layout.levels.size > 1:
        # refined blocks get a dark outline so the level change reads in print too
        fine = table[table["level"] > table["level"].min()]
        if len(fine):
            outline = hv.Rectangles(fine, kdims=[xd, yd, "x1", "y1"], vdims=[vd, "level", "block"])
            outline = _style(outline, common={"alpha": 1.0},
                             bokeh={"fill_alpha": 0.0, "line_color": "#222222", "line_width": 2.0},
                             mpl={"facecolor": "none", "edgecolor": "#222222", "linewidth": 2.0})
            parts.append(outline)
    show = labels if labels is not None else len(table) <= 64
    if show and len(table):
        cx, cy = _label_points(table)
        clim_hi = max(float(vals.max()) if vals.size else 1.0, 1.0)
        bright = _bright_under(table[value].to_numpy(dtype=float) / clim_hi, cmap)
        text = np.array([_short(v) for v in table[value]], dtype=object)
        for mask, ink in ((bright, "#111111"), (~bright, "white")):
            if mask.any():
                lab = hv.Labels((cx[mask], cy[mask], text[mask]), kdims=[xd, yd], vdims="text")
                parts.append(_style(lab, bokeh={"text_color": ink, "text_font_size": "9pt"},
                                    mpl={"color": ink, "size": 11}))
    if outside:
        title = f"{title}  ({_short(outside)} outside every block)" if title else \
            f"{_short(outside)} outside every block"
    lo, hi = layout.domain_lower, layout.domain_upper
    ylim = (lo[1], hi[1]) if d >= 2 else (float(lev.min()), float(lev.max()) + 0.9)
    over = hv.Overlay(parts)
    return _style(over, common={"title": title, "xlim": (lo[0], hi[0]), "ylim": ylim},
                  bokeh={**_BOKEH_SIZE, "data_aspect": 1 if d >= 2 else None},
                  mpl={**_MPL_SIZE, "aspect": "equal" if d >= 2 else "auto"})


def _label_points(table: pd.DataFrame):
    """Where to write each block's number: its centre, or a spot no finer block covers."""
    x0, y0, x1, y1 = (table[c].to_numpy(dtype=float) for c in ("x0", "y0", "x1", "y1"))
    lev = table["level"].to_numpy()
    cx, cy = 0.5 * (x0 + x1), 0.5 * (y0 + y1)
    fracs = [(0.5, 0.5), (0.25, 0.25), (0.75, 0.25), (0.25, 0.75), (0.75, 0.75),
             (0.5, 0.15), (0.5, 0.85), (0.15, 0.5), (0.85, 0.5)]
    # a loop over at most a few dozen labelled blocks, never over particles
    for i in range(len(table)):
        finer = lev > lev[i]
        if not finer.any():
            continue
        for fx, fy in fracs:
            px, py = x0[i] + fx * (x1[i] - x0[i]), y0[i] + fy * (y1[i] - y0[i])
            # a margin keeps the text off the edge of a finer block too
            mx, my = 0.12 * (x1[i] - x0[i]), 0.08 * (y1[i] - y0[i])
            hit = finer & (x0 - mx <= px) & (px < x1 + mx) & (y0 - my <= py) & (py < y1 + my)
            if not hit.any():
                cx[i], cy[i] = px, py
                break
    return cx, cy


def _bright_under(fraction, cmap) -> np.ndarray:
    """True where the colour map at ``fraction`` is light enough for dark text."""
    from .colours import palette
    try:
        colours = palette(cmap, 256)
    except (ValueError, TypeError):
        return np.zeros(len(fraction), dtype=bool)
    idx = np.clip((np.nan_to_num(fraction) * 255).astype(int), 0, 255)
    rgb = np.array([[int(c[k:k + 2], 16) / 255 for k in (1, 3, 5)] for c in colours])[idx]
    # relative luminance weights of ITU-R BT.709
    lum = rgb @ np.array([0.2126, 0.7152, 0.0722])
    return lum > 0.45


def _short(v: float) -> str:
    v = float(v)
    if v != v:
        return ""
    a = abs(v)
    if a >= 1e6:
        return f"{v / 1e6:.3g}M"
    if a >= 1e4:
        return f"{v / 1e3:.3g}k"
    if a == int(a):
        return f"{int(v)}"
    return f"{v:.3g}"


def _imbalance_value(imbalance) -> float | None:
    if imbalance is None:
        return None
    if isinstance(imbalance, (int, float, np.floating, np.integer)):
        return float(imbalance)
    for key in ("max_over_mean", "imbalance", "ratio"):
        try:
            return float(imbalance[key])
        except (KeyError, TypeError, IndexError):
            continue
        except ValueError:
            return None
    v = getattr(imbalance, "max_over_mean", None)
    return None if v is None else float(v)


def rank_bars(rank_df: pd.DataFrame, imbalance=None, title: str = "", *, value: str = "count"):
    """Load per rank as bars, the mean as a line, max/mean in the title."""
    per_rank = _sum_over_species(rank_df, ["rank"], [value])
    per_rank = per_rank[per_rank["rank"] >= 0]
    ranks = per_rank["rank"].to_numpy(dtype=np.int64)
    load = per_rank[value].to_numpy(dtype=float)
    n = int(ranks.max()) + 1 if ranks.size else 1
    full = np.zeros(n)
    full[ranks] = load
    mean = float(full.mean()) if n else 0.0
    ratio = _imbalance_value(imbalance)
    if ratio is None and mean > 0:
        ratio = float(full.max() / mean)
    edges = np.arange(n + 1, dtype=float) - 0.5
    vd = hv.Dimension(value, label="particles" if value == "count" else "weight")
    bars = hv.Histogram((edges, full), kdims=[hv.Dimension("rank", label="rank")], vdims=[vd])
    bars = _style(bars, common={"alpha": 0.9},
                  bokeh={"color": BAR_COLOUR, "line_color": "white", "tools": ["hover"]},
                  mpl={"facecolor": BAR_COLOUR, "edgecolor": "white"})
    line = _style(hv.HLine(mean), common={"color": LINE_COLOUR},
                  bokeh={"line_width": 2.5, "line_dash": "dashed"},
                  mpl={"linewidth": 2.5, "linestyle": "--"})
    label = f"max/mean = {ratio:.3f}" if ratio is not None else "no load"
    full_title = f"{title}  ({label})" if title else label
    # bars start at zero so the eye reads the imbalance, not the spread above the minimum
    top = max(float(full.max()) if n else 1.0, 1.0) * 1.08
    common = {"title": full_title, "ylim": (0, top), "xlim": (-0.5, n - 0.5)}
    if n <= 24:
        common["xticks"] = list(range(n))
    return _style(bars * line, common=common, bokeh=_BOKEH_SIZE, mpl={**_MPL_SIZE, "aspect": "auto"})


# migration -----------------------------------------------------------------------------------
def transfer_heatmap(migration_df: pd.DataFrame, title: str = "", *, cmap=DEFAULT_CMAP,
                     include_stay: bool = False):
    """Particles that went from block i to block j, log colour, empty cells left blank.

    Staying particles (i == j) outnumber movers by orders of magnitude and are
    left out unless ``include_stay``; block -1 stands for "in no block".
    """
    df = migration_df
    if len(df):
        df = _sum_over_species(df, ["from_block", "to_block"], ["count"])
        if not include_stay:
            df = df[df["from_block"] != df["to_block"]]
    ids = np.unique(np.concatenate([df["from_block"].to_numpy(dtype=np.int64),
                                    df["to_block"].to_numpy(dtype=np.int64)])) if len(df) else \
        np.zeros(1, dtype=np.int64)
    n = ids.size
    m = np.full((n, n), np.nan)
    if len(df):
        i = np.searchsorted(ids, df["from_block"].to_numpy(dtype=np.int64))
        j = np.searchsorted(ids, df["to_block"].to_numpy(dtype=np.int64))
        acc = np.zeros((n, n))
        np.add.at(acc, (i, j), df["count"].to_numpy(dtype=float))
        m = np.where(acc > 0, acc, np.nan)
    fd = hv.Dimension("from_block", label="from block")
    td = hv.Dimension("to_block", label="to block")
    cd = hv.Dimension("count", label="particles migrated" if not include_stay else "particles")
    contiguous = n > 0 and np.array_equal(ids, np.arange(ids[0], ids[0] + n))
    if contiguous:
        lo, hi = ids[0] - 0.5, ids[-1] + 0.5
        # Image rows run from the top (largest y) down
        img = hv.Image(np.flipud(m.T), bounds=(lo, lo, hi, hi), kdims=[fd, td], vdims=[cd])
    else:
        rows = [(str(a), str(b), m[x, y]) for x, a in enumerate(ids) for y, b in enumerate(ids)
                if np.isfinite(m[x, y])]
        img = hv.HeatMap(rows, kdims=[fd, td], vdims=[cd])
    finite = m[np.isfinite(m)]
    if not finite.size:
        # nobody moved: an all-blank matrix has no colour range, draw zeros instead
        m = np.zeros_like(m)
    logz = bool(finite.size and finite.max() > 10 * max(finite.min(), 1))
    clim = (max(float(finite.min()), 1.0) if finite.size else 1.0,
            float(finite.max()) if finite.size else 10.0)
    if clim[1] <= clim[0]:
        clim = (clim[0], clim[0] * 10 if logz else clim[0] + 1)
    moved = int(np.nansum(m)) if finite.size else 0
    label = f"{_short(moved)} migrated" if not include_stay else f"{_short(moved)} particles"
    full_title = f"{title}  ({label})" if title else label
    return _style(img, common={"cmap": cmap, "colorbar": True, "logz": logz, "clim": clim,
                               "title": full_title},
                  bokeh={**_BOKEH_SIZE, "tools": ["hover"], "clipping_colors": {"NaN": "#f4f4f4"}},
                  mpl={**_MPL_SIZE, "aspect": "equal", "clipping_colors": {"NaN": "#f4f4f4"}})


def displacement_histogram(displacements_cells, steps=None, title: str = "", *, bins: int = 60):
    """How far matched particles went, in level-0 cells, with the one-cell-per-step mark.

    A particle that crosses more than one cell per step outruns what a
    particle-mesh push resolves (common practice: the CFL-like limit);
    the line sits at ``steps`` cells for snapshots ``steps`` steps apart.
    """
    d = np.asarray(displacements_cells, dtype=float).ravel()
    d = d[np.isfinite(d)]
    limit = float(steps) if steps is not None and steps > 0 else 1.0
    top = max(float(d.max()) if d.size else 0.0, limit) * 1.05 or 1.0
    counts, edges = np.histogram(d, bins=bins, range=(0.0, top))
    xd = hv.Dimension("displacement", label="displacement (level-0 cells)")
    yd = hv.Dimension("particles", label="particles")
    # a log axis needs positive bars; empty bins are drawn as nothing
    hist = hv.Histogram((edges, np.where(counts > 0, counts, np.nan)), kdims=[xd], vdims=[yd])
    hist = _style(hist, common={"alpha": 0.9, "logy": True},
                  bokeh={"color": BAR_COLOUR, "line_color": "white", "tools": ["hover"]},
                  mpl={"facecolor": BAR_COLOUR, "edgecolor": "white"})
    over = np.count_nonzero(d > limit)
    line = _style(hv.VLine(limit), common={"color": LINE_COLOUR},
                  bokeh={"line_width": 2.5, "line_dash": "dashed"},
                  mpl={"linewidth": 2.5, "linestyle": "--"})
    what = "one cell per step" if steps else "one cell"
    label = f"{_short(over)} of {_short(d.size)} over {what}"
    full_title = f"{title}  ({label})" if title else label
    ymax = max(float(counts.max()) if counts.size else 1.0, 1.0)
    return _style(hist * line, common={"title": full_title, "ylim": (0.5, ymax * 2.0),
                                       "xlim": (0.0, top)},
                  bokeh=_BOKEH_SIZE, mpl={**_MPL_SIZE, "aspect": "auto"})


# drift -------------------------------------------------------------------------------------------
def judged_drift(drift_df: pd.DataFrame) -> np.ndarray:
    """The drift the gate judges: (value − reference) / scale, else relative_drift.

    With the ``scale`` column of the detailed drift table this is what
    ``check`` compares with rtol (a zero reference is judged against another
    scale instead of giving NaN); a plain drift table gives relative_drift.
    """
    if all(c in drift_df for c in ("value", "reference", "scale")):
        with np.errstate(invalid="ignore", divide="ignore"):
            return ((drift_df["value"].to_numpy(dtype=float) - drift_df["reference"].to_numpy(dtype=float))
                    / drift_df["scale"].to_numpy(dtype=float))
    return drift_df["relative_drift"].to_numpy(dtype=float)


def first_exits(drift_df: pd.DataFrame, rtol: float) -> pd.DataFrame:
    """The first snapshot at which each (species, quantity) leaves ±rtol.

    Judged like ``check`` (diagnostics.drift.violations) when the table has
    its ``scale`` column; otherwise |relative_drift| > rtol. ``judged`` holds
    the plotted drift of that row.
    """
    cols = ["species", "quantity", "snapshot", "relative_drift", "judged"]
    if drift_df is None or not len(drift_df) or rtol is None:
        return pd.DataFrame(columns=cols)
    df = drift_df.assign(judged=judged_drift(drift_df))
    if all(c in df for c in ("value", "reference", "scale")):
        from ..diagnostics.drift import violations
        out = violations(df, float(rtol)).to_numpy()
    else:
        with np.errstate(invalid="ignore"):
            out = ~(np.abs(df["judged"].to_numpy()) <= rtol)
    hit = df[out]
    if not len(hit):
        return pd.DataFrame(columns=cols + [c for c in df.columns if c not in cols])
    return hit.sort_values("snapshot", kind="stable").groupby(["species", "quantity"], as_index=False,
                                                              sort=False).first()


def _drift_range(values: np.ndarray, rtol):
    v = values[np.isfinite(values)]
    band = 1.5 * rtol if rtol is not None else 0.0
    if v.size == 0:
        return (-band or -1.0, band or 1.0)
    lo, hi = float(v.min()), float(v.max())
    pad = 0.1 * (hi - lo) if hi > lo else max(abs(lo) * 0.1, 1e-3)
    return (min(lo - pad, -band), max(hi + pad, band))


def _grid_columns(n: int) -> int:
    if n <= 3:
        return n
    return 2 if n == 4 else (3 if n <= 9 else 4)


def drift_curves(drift_df: pd.DataFrame, rtol=None, title: str = "", *, x: str | None = None,
                 checked=None, xlabel: str | None = None):
    """Relative drift of every total over the run against the ±rtol band.

    One panel per quantity (their sizes differ by orders of magnitude), one
    curve per species, the first snapshot outside the band marked with a cross.
    ``checked`` — (species, quantity) pairs a gate judges — limits the band,
    the marks and the verdict in the title to those (a field energy is not
    conserved on its own, so its panel gets no band); None judges every total.
    """
    df = drift_df.copy() if drift_df is not None else pd.DataFrame()
    if len(df):
        df["judged"] = judged_drift(df)
    if x is None:
        x = "time" if len(df) and "time" in df and df["time"].notna().all() else "snapshot"
    xlabel = xlabel if (xlabel and x == "time") else x
    xd = hv.Dimension(x, label=xlabel)
    yd = hv.Dimension("relative_drift", label="relative drift")
    exits = first_exits(df, rtol)
    judged_pairs = None if checked is None else {(str(a), str(b)) for a, b in checked}
    if judged_pairs is not None and len(exits):
        keep = [(str(a), str(b)) in judged_pairs for a, b in zip(exits["species"], exits["quantity"])]
        exits = exits[np.asarray(keep, dtype=bool)]
    species = list(dict.fromkeys(df["species"].astype(str))) if len(df) else []
    colour = {sp: CURVE_COLOURS[k % len(CURVE_COLOURS)] for k, sp in enumerate(species)}
    panels = []
    quantities = list(dict.fromkeys(df["quantity"].astype(str))) if len(df) else []
    ncols = _grid_columns(max(len(quantities), 1))
    for k, q in enumerate(quantities):
        sub = df[df["quantity"].astype(str) == q]
        parts = []
        gated = judged_pairs is None or any(p[1] == q for p in judged_pairs)
        if rtol is not None and gated:
            parts.append(_style(hv.HSpan(-rtol, rtol), common={"alpha": 0.16},
                                bokeh={"color": BAND_COLOUR, "line_alpha": 0},
                                mpl={"color": BAND_COLOUR, "facecolor": None, "linewidth": 0}))
            parts += [_style(hv.HLine(s * rtol), common={"color": BAND_COLOUR},
                             bokeh={"line_width": 1.5, "line_dash": "dashed"},
                             mpl={"linewidth": 1.0, "linestyle": "--"}) for s in (-1, 1)]
        shown = 0
        for sp in species:
            g = sub[sub["species"].astype(str) == sp].sort_values("snapshot")
            xs = g[x].to_numpy(dtype=float)
            ys = g["judged"].to_numpy(dtype=float)
            ok = np.isfinite(xs) & np.isfinite(ys)
            if not ok.any():
                continue
            shown += 1
            c = hv.Curve((xs[ok], ys[ok]), xd, yd, label=sp)
            parts.append(_style(c, common={"color": colour[sp]},
                                bokeh={"line_width": 2.2, "tools": ["hover"]}, mpl={"linewidth": 1.8}))
        ex = exits[exits["quantity"].astype(str) == q] if len(exits) else exits
        if len(ex):
            ey = np.nan_to_num(ex["judged"].to_numpy(dtype=float), nan=0.0)
            pts = hv.Scatter((ex[x].to_numpy(dtype=float), ey),
                             xd, yd)
            parts.append(_style(pts, common={"color": LINE_COLOUR},
                                bokeh={"marker": "x", "size": 14, "line_width": 3},
                                mpl={"marker": "X", "s": 110, "edgecolors": "white", "linewidth": 0.8}))
        if not parts:
            parts.append(hv.Curve([], xd, yd))
        lo, hi = _drift_range(sub["judged"].to_numpy(dtype=float), rtol if gated else None)
        name = q.replace("_", " ")
        if not shown:
            name += " (no finite drift)"
        elif len(ex):
            name += f" (out at {int(ex['snapshot'].min())})"
        panel = hv.Overlay(parts)
        first_col = k % ncols == 0
        panels.append(_style(panel, common={"title": name, "ylim": (lo, hi), "xlabel": xlabel,
                                            "ylabel": "relative drift" if first_col else "",
                                            "show_legend": k == 0,
                                            "legend_position": "top_left"},
                             bokeh={"width": 330, "height": 240, "legend_cols": 1},
                             mpl={"aspect": "auto", "xformatter": "%.3g",
                                  "xticks": 3 if ncols >= 3 else 5, "yticks": 5}))
    if not panels:
        panels = [_style(hv.Curve([], xd, yd), common={"title": "no totals"})]
    band_txt = f"band ±{rtol:g}" if rtol is not None else "no band given"
    if rtol is not None:
        n_out = len(exits)
        which = "total" if judged_pairs is None else "checked total"
        verdict = (f"{n_out} {which}{'s' if n_out != 1 else ''} left the {band_txt}" if n_out
                   else f"every {which} within the {band_txt}")
    else:
        verdict = band_txt
    full_title = f"{title}  ({verdict})" if title else verdict
    lay = hv.Layout(panels).cols(ncols if quantities else 1)
    return _style(lay, common={"title": full_title, "shared_axes": False},
                  bokeh={}, mpl={"fig_inches": (10, 7), "sublabel_format": "", "tight": True,
                                 "tight_padding": 1.2, "fig_bounds": (0.01, 0.01, 0.99, 0.94)})


# deposition and plain histograms --------------------------------------------------------------
def deposit_map(grid, layout, title: str = "", *, cmap=DEFAULT_CMAP, xlabel=None, ylabel=None,
                label: str = "weight per cell"):
    """A deposited field on the level-0 cells of a 2-D (or summed 3-D) domain.

    ``grid`` is indexed ``[ix, iy]`` (``[ix, iy, iz]`` in 3-D, summed over z),
    the ordering of ``numpy.histogramdd``.
    """
    g = np.asarray(grid, dtype=float)
    if g.ndim == 3:
        g = g.sum(axis=2)
    if g.ndim != 2:
        raise ValueError("deposit_map needs a 2-D grid")
    lo, hi = layout.domain_lower, layout.domain_upper
    xd = hv.Dimension("x", label=xlabel or "x")
    yd = hv.Dimension("y", label=ylabel or "y")
    vd = hv.Dimension("density", label=label)
    img = hv.Image(np.flipud(g.T), bounds=(lo[0], lo[1], hi[0], hi[1]), kdims=[xd, yd], vdims=[vd])
    return _style(img, common={"cmap": cmap, "colorbar": True, "title": title},
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
