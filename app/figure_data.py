"""What each audit figure shows, decided once for every way it is drawn.

Each function takes plain tables or arrays (never a file) and returns a small
record of what the figure holds: the arrays drawn, the axis ranges, the
colour map and its range, labels and the title. ``app.figures`` turns a
record into holoviews elements (the dashboard's bokeh panels, the notebook);
``app.mpl_figures`` draws it with matplotlib on the Agg canvas (the export's
PNGs). So a figure in a report is the figure on the screen, and nothing here
imports a plotting library.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from .view_policy import DEFAULT_CMAP

#: colours of the marks drawn over the data (band, reference lines, exits)
BAND_COLOUR = "#2a9d8f"
LINE_COLOUR = "#d1495b"
BAR_COLOUR = "#3d5a80"
#: edge of a census block: white, so neighbouring blocks read apart
BLOCK_EDGE = "white"
#: outline of a refined block, dark so the level change reads in print too
REFINED_EDGE = "#222222"
#: a cell of the transfer matrix nobody took
EMPTY_CELL = "#f4f4f4"
#: categorical colours for many curves (distinct on a projector, colour-blind aware first)
CURVE_COLOURS = ("#0072B2", "#E69F00", "#009E73", "#CC79A7", "#56B4E9", "#D55E00", "#F0E442",
                 "#000000", "#7f7f7f", "#8c564b", "#17becf", "#bcbd22", "#9467bd", "#ff9896",
                 "#98df8a", "#c5b0d5", "#aec7e8", "#ffbb78", "#393b79", "#637939")


def _sum_over_species(df: pd.DataFrame, keys, values) -> pd.DataFrame:
    """One row per key: the table's ``all`` rows when it has them, else the sum over species."""
    if "species" in df.columns and len(df):
        sp = df["species"].astype(str)
        df = df[sp == "all"] if (sp == "all").any() else df
    if not len(df):
        return pd.DataFrame({k: pd.Series(dtype="int64") for k in keys}
                            | {v: pd.Series(dtype="float64") for v in values})
    return df.groupby(list(keys), as_index=False, sort=True)[list(values)].sum()


def short_number(v: float) -> str:
    """A count as a short label: 512, 12.3k, 4.56M."""
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


# density views -----------------------------------------------------------------------------
def density_data(view, agg) -> tuple[np.ndarray, tuple]:
    """(values drawn, extent x0, x1, y0, y1) of a particle view's aggregate: blank bins NaN,
    rows from the lowest y up."""
    from .colours import shown_values
    if view.diverging:       # a difference: zero is a value, NaN is blank
        data = np.asarray(agg.values, dtype=np.float64)
    else:
        data = shown_values(agg.values, view.reduction, view.scaling)
    ydim, xdim = agg.dims[:2]
    xs = agg.attrs.get("x_range") or (float(agg.coords[xdim][0]), float(agg.coords[xdim][-1]))
    ys = agg.attrs.get("y_range") or (float(agg.coords[ydim][0]), float(agg.coords[ydim][-1]))
    return data, (float(xs[0]), float(xs[1]), float(ys[0]), float(ys[1]))


# census ------------------------------------------------------------------------------------
@dataclass
class CensusMap:
    """Blocks over the domain coloured by a value per block; refined ones outlined."""

    table: pd.DataFrame             # x0, y0, x1, y1, <value>, level, block; coarse levels first
    value: str                      # count | weight
    value_label: str
    clim: tuple[float, float]
    refined: pd.DataFrame | None    # rows of ``table`` on finer levels (outlined)
    labels: tuple | None            # (x, y, text, dark ink) per labelled block
    title: str
    xlabel: str
    ylabel: str
    xlim: tuple[float, float]
    ylim: tuple[float, float]
    equal: bool                     # positions on both axes: keep the shape of space
    cmap: str


def census_map(census_df: pd.DataFrame, layout, title: str = "", *, value: str = "count",
               cmap=DEFAULT_CMAP, xlabel=None, ylabel=None, labels: bool | None = None) -> CensusMap:
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
    top = max(float(vals.max()) if vals.size else 1.0, 1.0)
    refined = None
    if layout.levels.size > 1:
        fine = table[table["level"] > table["level"].min()]
        refined = fine if len(fine) else None
    show = labels if labels is not None else len(table) <= 64
    marks = None
    if show and len(table):
        cx, cy = _label_points(table)
        dark = _bright_under(table[value].to_numpy(dtype=float) / top, cmap)
        text = np.array([short_number(v) for v in table[value]], dtype=object)
        marks = (cx, cy, text, dark)
    if outside:
        title = f"{title}  ({short_number(outside)} outside every block)" if title else \
            f"{short_number(outside)} outside every block"
    lo, hi = layout.domain_lower, layout.domain_upper
    ylim = (lo[1], hi[1]) if d >= 2 else (float(lev.min()), float(lev.max()) + 0.9)
    return CensusMap(table, value, "particles" if value == "count" else "weight", (0.0, top),
                     refined, marks, title, xlabel or "x", ylabel or ("y" if d >= 2 else "level"),
                     (lo[0], hi[0]), ylim, d >= 2, cmap)


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


@dataclass
class RankBars:
    """Load per rank as bars from zero, the mean as a line."""

    edges: np.ndarray               # rank r is the bar [r - 0.5, r + 0.5)
    load: np.ndarray
    mean: float
    value_label: str
    title: str
    xlim: tuple[float, float]
    ylim: tuple[float, float]
    xticks: list | None             # every rank, when there are few


def rank_bars(rank_df: pd.DataFrame, imbalance=None, title: str = "", *,
              value: str = "count") -> RankBars:
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
    label = f"max/mean = {ratio:.3f}" if ratio is not None else "no load"
    # bars start at zero so the eye reads the imbalance, not the spread above the minimum
    top = max(float(full.max()) if n else 1.0, 1.0) * 1.08
    return RankBars(np.arange(n + 1, dtype=float) - 0.5, full, mean,
                    "particles" if value == "count" else "weight",
                    f"{title}  ({label})" if title else label, (-0.5, n - 0.5), (0, top),
                    list(range(n)) if n <= 24 else None)


# migration -----------------------------------------------------------------------------------
@dataclass
class TransferMatrix:
    """Particles that went from block i to block j; NaN where nobody did."""

    matrix: np.ndarray              # [from, to], over ``ids``
    ids: np.ndarray
    contiguous: bool                # ids are consecutive: drawn as an image on numeric axes
    logz: bool
    clim: tuple[float, float]
    value_label: str
    title: str
    cmap: str
    xlabel: str = "from block"
    ylabel: str = "to block"

    def cells(self):
        """(from id, to id, count) of every filled cell (a heat map of categories)."""
        return [(str(a), str(b), self.matrix[x, y]) for x, a in enumerate(self.ids)
                for y, b in enumerate(self.ids) if np.isfinite(self.matrix[x, y])]


def transfer_matrix(migration_df: pd.DataFrame, title: str = "", *, cmap=DEFAULT_CMAP,
                    include_stay: bool = False) -> TransferMatrix:
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
    contiguous = n > 0 and np.array_equal(ids, np.arange(ids[0], ids[0] + n))
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
    label = f"{short_number(moved)} migrated" if not include_stay else f"{short_number(moved)} particles"
    return TransferMatrix(m, ids, bool(contiguous), logz, clim,
                          "particles migrated" if not include_stay else "particles",
                          f"{title}  ({label})" if title else label, cmap)


@dataclass
class DisplacementHistogram:
    """How far matched particles went, in level-0 cells, on a log axis, with the one-cell mark."""

    edges: np.ndarray
    counts: np.ndarray              # NaN for an empty bin (a log axis draws nothing there)
    limit: float                    # the mark: one level-0 cell per step
    title: str
    xlim: tuple[float, float]
    ylim: tuple[float, float]
    xlabel: str = "displacement (level-0 cells)"
    ylabel: str = "particles"


def displacement_histogram(displacements_cells, steps=None, title: str = "", *,
                           bins: int = 60) -> DisplacementHistogram:
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
    over = np.count_nonzero(d > limit)
    what = "one cell per step" if steps else "one cell"
    label = f"{short_number(over)} of {short_number(d.size)} over {what}"
    ymax = max(float(counts.max()) if counts.size else 1.0, 1.0)
    return DisplacementHistogram(edges, np.where(counts > 0, counts, np.nan), limit,
                                 f"{title}  ({label})" if title else label, (0.0, top),
                                 (0.5, ymax * 2.0))


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


@dataclass
class DriftPanel:
    """One total: a curve per species, the band where the gate judges it, the first exits."""

    title: str
    quantity: str
    ylim: tuple[float, float]
    ylabel: str
    band: float | None              # rtol, where the gate checks this total
    curves: list = field(default_factory=list)     # (species, x, y, colour)
    exits: tuple | None = None      # (x, y) of the first snapshot outside the band
    legend: bool = False


@dataclass
class DriftCurves:
    panels: list                    # DriftPanel, in the table's order of quantities
    ncols: int
    title: str
    x: str                          # time | snapshot
    xlabel: str


def drift_curves(drift_df: pd.DataFrame, rtol=None, title: str = "", *, x: str | None = None,
                 checked=None, xlabel: str | None = None) -> DriftCurves:
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
    exits = first_exits(df, rtol)
    judged_pairs = None if checked is None else {(str(a), str(b)) for a, b in checked}
    if judged_pairs is not None and len(exits):
        keep = [(str(a), str(b)) in judged_pairs for a, b in zip(exits["species"], exits["quantity"])]
        exits = exits[np.asarray(keep, dtype=bool)]
    species = list(dict.fromkeys(df["species"].astype(str))) if len(df) else []
    colour = {sp: CURVE_COLOURS[k % len(CURVE_COLOURS)] for k, sp in enumerate(species)}
    quantities = list(dict.fromkeys(df["quantity"].astype(str))) if len(df) else []
    ncols = _grid_columns(max(len(quantities), 1))
    panels = []
    for k, q in enumerate(quantities):
        sub = df[df["quantity"].astype(str) == q]
        gated = judged_pairs is None or any(p[1] == q for p in judged_pairs)
        curves = []
        for sp in species:
            g = sub[sub["species"].astype(str) == sp].sort_values("snapshot")
            xs = g[x].to_numpy(dtype=float)
            ys = g["judged"].to_numpy(dtype=float)
            ok = np.isfinite(xs) & np.isfinite(ys)
            if ok.any():
                curves.append((sp, xs[ok], ys[ok], colour[sp]))
        ex = exits[exits["quantity"].astype(str) == q] if len(exits) else exits
        marks = None
        if len(ex):
            marks = (ex[x].to_numpy(dtype=float), np.nan_to_num(ex["judged"].to_numpy(dtype=float), nan=0.0))
        name = q.replace("_", " ")
        if not curves:
            name += " (no finite drift)"
        elif len(ex):
            name += f" (out at {int(ex['snapshot'].min())})"
        panels.append(DriftPanel(name, q, _drift_range(sub["judged"].to_numpy(dtype=float),
                                                       rtol if gated else None),
                                 "relative drift" if k % ncols == 0 else "",
                                 rtol if rtol is not None and gated else None, curves, marks, k == 0))
    band_txt = f"band ±{rtol:g}" if rtol is not None else "no band given"
    if rtol is not None:
        n_out = len(exits)
        which = "total" if judged_pairs is None else "checked total"
        verdict = (f"{n_out} {which}{'s' if n_out != 1 else ''} left the {band_txt}" if n_out
                   else f"every {which} within the {band_txt}")
    else:
        verdict = band_txt
    return DriftCurves(panels, ncols if quantities else 1,
                       f"{title}  ({verdict})" if title else verdict, x, xlabel)


# deposition ------------------------------------------------------------------------------------
@dataclass
class DepositMap:
    """A deposited field on the level-0 cells, indexed [ix, iy]."""

    grid: np.ndarray
    bounds: tuple[float, float, float, float]      # x0, y0, x1, y1 of the domain
    title: str
    xlabel: str
    ylabel: str
    value_label: str
    cmap: str


def deposit_map(grid, layout, title: str = "", *, cmap=DEFAULT_CMAP, xlabel=None, ylabel=None,
                label: str = "weight per cell") -> DepositMap:
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
    return DepositMap(g, (float(lo[0]), float(lo[1]), float(hi[0]), float(hi[1])), title,
                      xlabel or "x", ylabel or "y", label, cmap)
