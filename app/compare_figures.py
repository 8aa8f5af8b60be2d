"""Figures of a comparison: both runs' density and their difference; totals side by side.

The density of each run is aggregated by :func:`app.render.aggregate_points`
(the one aggregation path of the screen and the export) on the same bins and
ranges for both runs, so the difference image is a pixel-by-pixel difference
of particle counts.
"""

from __future__ import annotations

import os

import numpy as np

from ..audit import tables as _tables
from .report import FigureItem
from .view_policy import DEFAULT_CMAP as DENSITY_CMAP
from .view_policy import DIFFERENCE_CMAP, DIFFERENCE_MEANS, difference_limits
#: totals drawn when they exist (species all), in this order
TOTALS_SHOWN = ("count", "charge", "momentum_x", "momentum_y", "kinetic_energy", "total_energy")


def density_pair(frame_ref, frame_cand, xcol_ref, ycol_ref, xcol_cand, ycol_cand, *, width, height,
                 x_range, y_range):
    """(reference counts, candidate counts) on one grid, as (height, width) arrays, and the aggregate."""
    from . import render
    a = render.aggregate_points(frame_ref, xcol_ref, ycol_ref, width=width, height=height,
                                x_range=x_range, y_range=y_range)
    b = render.aggregate_points(frame_cand, xcol_cand, ycol_cand, width=width, height=height,
                                x_range=x_range, y_range=y_range)
    return render.histogram_counts(a), render.histogram_counts(b), a


def _figure(width, height, dpi):
    """A figure of the export's kind (exact pixels, Agg, no pyplot) laid out by matplotlib's
    constrained layout (panels and colour bars of several sizes)."""
    from .png import new_figure
    fig = new_figure(width, height, dpi)
    fig.set_layout_engine("constrained")
    return fig


def _density_figure(path, ref_counts, cand_counts, agg, x_range, y_range, title, xlabel, ylabel,
                    width, height, dpi):
    from matplotlib.colors import LogNorm, TwoSlopeNorm
    from .colours import colour_map, shown_values
    from .png import save_png
    fig = _figure(width, height, dpi)
    axes = fig.subplots(1, 3)
    top = max(float(ref_counts.max()), float(cand_counts.max()), 1.0)
    extent = (x_range[0], x_range[1], y_range[0], y_range[1])
    norm = LogNorm(vmin=1.0, vmax=max(top, 1.0 + 1e-9))
    for ax, data, name in ((axes[0], ref_counts, "reference"), (axes[1], cand_counts, "candidate")):
        im = ax.imshow(shown_values(data, "count", "log"), origin="lower", extent=extent,
                       aspect="auto", cmap=colour_map(DENSITY_CMAP), norm=norm,
                       interpolation="nearest")
        ax.set_title(f"{name}")
        ax.set_xlabel(xlabel)
    axes[0].set_ylabel(ylabel)
    fig.colorbar(im, ax=axes[:2], label="particles per pixel", shrink=0.9)
    diff = cand_counts - ref_counts
    lo, hi = difference_limits(diff)
    im = axes[2].imshow(diff, origin="lower", extent=extent, aspect="auto",
                        cmap=colour_map(DIFFERENCE_CMAP),
                        norm=TwoSlopeNorm(vcenter=0.0, vmin=lo, vmax=hi), interpolation="nearest")
    axes[2].set_title(DIFFERENCE_MEANS)
    axes[2].set_xlabel(xlabel)
    fig.colorbar(im, ax=axes[2], label="particles per pixel", shrink=0.9)
    fig.suptitle(title)
    return save_png(fig, path)


def _views(fa, fb, layout):
    """(kind, ref x, ref y, cand x, cand y, x range, y range) of the space and phase views."""
    from . import view_policy as policy

    def pick(frame, kind):
        if policy.has_view(frame, kind) is not None:
            return None
        space, phase = policy.default_axes(frame, frame.columns)
        return space if kind == "space" else phase
    out = []
    for kind in ("space", "phase"):
        pa, pb = pick(fa, kind), pick(fb, kind)
        if pa is None or pb is None:
            continue
        # the opening ranges of the view policy, over both runs: a domain axis, else the data
        ranges = [policy.opening_range([fa, fb], ca, layout, cols=[ca, cb]) for ca, cb in zip(pa, pb)]
        out.append((kind, pa[0], pa[1], pb[0], pb[1], ranges[0], ranges[1]))
    return out


def comparison_figures(comp, ref, cand, figdir, *, width=1200, height=420, dpi=100, pairs=None):
    """Write the comparison's PNGs under ``figdir``; return their :class:`FigureItem` records."""
    from ..core.frame import transient_columns
    from .export import _safe
    from .render import axis_label
    figures = []
    chosen = pairs if pairs is not None else sorted({comp.pairing.pairs[0], comp.pairing.pairs[-1]})
    gw, gh = max(int(width * 0.27), 32), max(int(height * 0.72), 32)
    for i, j in chosen:
        sr, sc = ref.run[i], cand.run[j]
        layout = ref.layout(i)
        for s in comp.species:
            fa, fb = sr.species.get(s), sc.species.get(s)
            if fa is None or fb is None:
                continue
            with transient_columns([fa, fb]):
                for kind, xa, ya, xb, yb, xr_, yr_ in _views(fa, fb, layout):
                    a, b, agg = density_pair(fa, fb, xa, ya, xb, yb, width=gw, height=gh,
                                             x_range=xr_, y_range=yr_)
                    path = os.path.join(figdir, f"compare_{kind}_{i:04d}_{j:04d}_{_safe(s)}.png")
                    diff = b - a
                    title = (f"{s}, {kind}: reference snapshot {i}, candidate snapshot {j}"
                             + (f", step {sr.step}" if sr.step is not None else ""))
                    _density_figure(path, a, b, agg, xr_, yr_, title, axis_label(fa, xa), axis_label(fa, ya),
                                    width, height, dpi)
                    moved = int(np.abs(diff).sum()) // 2
                    figures.append(FigureItem(path, f"{s} — {kind}, reference snapshot {i} / candidate {j}",
                                              caption=f"{moved:,} particle(s) change pixel between the runs "
                                                      f"(half the summed absolute difference)", wide=True,
                                              kind=kind))
    if len(comp.totals):
        path = os.path.join(figdir, "compare_totals.png")
        totals_figure(comp.totals, path, width=width, dpi=dpi, ref_drift=comp.ref_drift,
                      cand_drift=comp.cand_drift)
        figures.append(FigureItem(path, "Totals of both runs and their difference", wide=True, kind="totals",
                                  caption="Left: each run's drift against its own first snapshot, on one "
                                          "axis. Right: candidate minus reference, relative to the "
                                          "reference's scale (as the gate judges it)."))
    return figures


def totals_figure(totals, path, *, width=1200, dpi=100, ref_drift=None, cand_drift=None):
    """Per total of species ``all``: both drift curves on one axis, and their relative difference.

    ``ref_drift``/``cand_drift`` (each run's drift table) draw the curves over every snapshot of
    each run; without them the curves have the paired snapshots only.
    """
    from .png import save_png
    t = totals[totals["species"].astype(str) == _tables.ALL]
    names = [q for q in TOTALS_SHOWN if q in set(t["quantity"])]
    if not names:
        names = list(dict.fromkeys(t["quantity"]))[:6]
    rows = max(len(names), 1)
    fig = _figure(width, int(round((2.1 * rows + 0.6) * dpi)), dpi)
    axes = fig.subplots(rows, 2, squeeze=False)
    for k, q in enumerate(names):
        g = t[t["quantity"] == q].sort_values("ref_time")
        x = g["ref_time"].to_numpy(dtype=float)
        if not np.isfinite(x).any():
            x = g["ref_snapshot"].to_numpy(dtype=float)
        left, right = axes[k]
        for drift, col, style, name in ((ref_drift, "ref_drift", dict(color="#2b5c8a", lw=1.8), "reference"),
                                        (cand_drift, "cand_drift",
                                         dict(color="#d9822b", lw=1.4, ls="--", marker="o", ms=3), "candidate")):
            if drift is not None:
                d = drift[(drift["species"].astype(str) == _tables.ALL) & (drift["quantity"] == q)]
                dx = d["time"].to_numpy(dtype=float)
                if not np.isfinite(dx).all():
                    dx = d["snapshot"].to_numpy(dtype=float)
                left.plot(dx, d["relative_drift"], label=name, **style)
            else:
                left.plot(x, g[col], label=name, **style)
        left.set_ylabel(f"{q}\nrelative drift")
        right.axhline(0.0, color="#888", lw=0.8)
        right.plot(x, g["relative_difference"], color="#a4262c", lw=1.4, marker="o", ms=3)
        right.set_ylabel("cand − ref (relative)")
        if k == 0:
            left.legend(loc="best", fontsize=8)
            left.set_title("drift of each run")
            right.set_title("difference")
    for ax in axes[-1]:
        ax.set_xlabel("time" if np.isfinite(t["ref_time"].to_numpy(dtype=float)).any() else "snapshot")
    return save_png(fig, path)
