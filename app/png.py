"""Writing a holoviews figure as a PNG of an exact pixel size, with no display.

The matplotlib backend of holoviews places axes by fixed figure fractions,
which either wastes a third of the picture or clips long labels. After
rendering, the axes are moved so their labels, titles and colour bars just
fit inside the picture, then the figure is saved without a tight bounding
box (that would change the pixel size).
"""

from __future__ import annotations

import os

import numpy as np


def use_headless_matplotlib() -> None:
    """Select the Agg canvas so nothing needs a display (batch jobs, CI)."""
    import matplotlib
    if matplotlib.get_backend().lower() != "agg":
        matplotlib.use("Agg", force=True)


#: margin around the content, as a fraction of the picture
_MARGIN = 0.02


def render_figure(obj, width: int, height: int, dpi: int, fontscale: float = 1.0, norm=None):
    """The matplotlib Figure of a holoviews object, sized width x height pixels at dpi.

    ``norm`` (a matplotlib Normalize) replaces the colour scale of the
    figure's image and colour bar: a movie's frames share one scale that way.
    """
    use_headless_matplotlib()
    import holoviews as hv
    from .figures import ensure_backends
    ensure_backends()
    inches = (width / dpi, height / dpi)
    obj = obj.opts(fig_inches=inches, fontscale=fontscale, backend="matplotlib", clone=True)
    import warnings
    with warnings.catch_warnings():
        # a view whose every bin holds the same count has a one-value colour range:
        # matplotlib widens it and says so; nothing is wrong with the picture
        warnings.filterwarnings("ignore", message="Attempting to set identical low and high")
        warnings.filterwarnings("ignore", message="All-NaN slice encountered")
        fig = hv.render(obj, backend="matplotlib")
    _forget_colorbars()
    if norm is not None:
        set_image_norm(fig, norm)
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    if not isinstance(fig.canvas, FigureCanvasAgg):
        FigureCanvasAgg(fig)
    fig.set_dpi(dpi)
    fig.set_size_inches(*inches, forward=False)
    _fit(fig)
    return fig


def set_image_norm(fig, norm) -> None:
    """Colour every image of ``fig`` (and its colour bar) with ``norm``."""
    for ax in fig.axes:
        for im in ax.get_images():
            im.set_norm(norm)
            bar = getattr(im, "colorbar", None)
            if bar is not None:
                bar.update_normal(im)


def figure_pixels(fig) -> np.ndarray:
    """The figure drawn on its Agg canvas, as an (height, width, 3) uint8 RGB array.

    The same pixels ``save_png`` writes (on white, as it saves).
    """
    fig.patch.set_facecolor("white")
    fig.canvas.draw()
    rgba = np.asarray(fig.canvas.buffer_rgba())
    rgb = rgba[..., :3].astype(np.float32)
    alpha = rgba[..., 3:4].astype(np.float32) / 255.0
    return np.round(rgb * alpha + 255.0 * (1.0 - alpha)).astype(np.uint8)


def _forget_colorbars() -> None:
    """Drop holoviews' class-wide record of colour-bar axes.

    The matplotlib backend keeps every colour bar it drew in a dict on the
    plot class (to stack several bars beside one axes), which holds each
    rendered figure alive: an export of hundreds of figures grew by megabytes
    a figure. The record only matters while one figure is being laid out.
    """
    try:
        from holoviews.plotting.mpl.element import ColorbarPlot
    except ImportError:
        return
    store = getattr(ColorbarPlot, "_colorbars", None)
    if isinstance(store, dict):
        store.clear()


def save_png(obj, path, width: int, height: int, dpi: int = 100, fontscale: float = 1.0) -> str:
    """Render ``obj`` with matplotlib and write it to ``path`` as exactly width x height pixels."""
    import matplotlib.pyplot as plt
    fig = render_figure(obj, width, height, dpi, fontscale)
    try:
        tmp = f"{path}.part"
        fig.savefig(tmp, dpi=dpi, format="png", facecolor="white")
        os.replace(tmp, path)
    finally:
        plt.close(fig)
    return os.fspath(path)


def _is_colorbar(ax) -> bool:
    return getattr(ax, "_colorbar", None) is not None or ax.get_label() == "<colorbar>"


def _nice(v: float) -> float:
    if v == 0 or not np.isfinite(v):
        return v
    mag = 10 ** np.floor(np.log10(abs(v)))
    return float(np.round(v / mag, 1) * mag) if abs(v) >= 10 else float(np.round(v, 2))


def _equalised_colorbar(fig, cax):
    """Redraw an equalised colour bar so its labels sit where their colours are.

    The bar is drawn evenly in the normalised (equalised) space, and each
    label ``v`` is put at ``norm(v)``: the very mapping the image's pixels
    were coloured with, so a label always names the colour beside it.
    Returns the new colour-bar axes (or the old one when nothing is to be done).
    """
    cbar = getattr(cax, "_colorbar", None)
    norm = getattr(cbar, "norm", None)
    if norm is None or not any(t.__name__ in ("EqHistNormalize", "EqHistNorm")
                               for t in type(norm).__mro__):
        return cax
    from matplotlib.cm import ScalarMappable
    from matplotlib.colors import Normalize
    try:
        probe = np.asarray(norm.inverse(np.linspace(0.0, 1.0, 7)), dtype=float).ravel()
    except Exception:
        return cax
    lo, hi = float(norm.vmin), float(norm.vmax)
    probe = np.clip(probe[np.isfinite(probe)], lo, hi)
    whole = hi >= 10 or float(lo).is_integer() and float(hi).is_integer()
    values = np.unique(np.concatenate([[lo, hi], np.round(probe) if whole else
                                       [_nice(v) for v in probe]]))
    values = values[(values >= lo) & (values <= hi)]
    where = np.asarray(norm(values), dtype=float).ravel()
    ok = np.isfinite(where)
    values, where = values[ok], np.clip(where[ok], 0.0, 1.0)
    ticks = cax.yaxis.get_ticklabels()
    tick_size = ticks[0].get_fontsize() if ticks else None
    label = cax.get_ylabel()
    label_size = cax.yaxis.label.get_fontsize()
    pos = cax.get_position()
    cmap = cbar.cmap
    fig.delaxes(cax)
    new = fig.add_axes(pos)
    bar = fig.colorbar(ScalarMappable(norm=Normalize(0.0, 1.0), cmap=cmap), cax=new)
    bar.set_ticks(list(where))
    bar.set_ticklabels([f"{v:g}" if not whole else f"{int(v):,}" for v in values])
    bar.set_label(label, fontsize=label_size)
    if tick_size:
        new.tick_params(labelsize=tick_size)
    return new


def _thin_ticks(cax, renderer, axis=None) -> None:
    """Drop ticks whose labels would overlap (an equalised colour bar bunches them, long
    numbers crowd a narrow panel)."""
    if axis is None:
        axis = cax.yaxis if cax.get_position().height >= cax.get_position().width else cax.xaxis
    cax.get_tightbbox(renderer)   # formats the tick labels
    ticks = axis.get_major_ticks()
    locs = list(axis.get_majorticklocs())
    if len(ticks) < 2 or len(ticks) != len(locs):
        return
    vertical = axis is cax.yaxis
    kept, last = [], None
    spans = []
    vlo, vhi = sorted(axis.get_view_interval())
    for loc, tick in zip(locs, ticks):
        if not vlo <= loc <= vhi:
            continue
        label = tick.label2 if (tick.label2.get_visible() and tick.label2.get_text()) else tick.label1
        if not label.get_text():
            continue
        bb = label.get_window_extent(renderer)
        if not np.all(np.isfinite([bb.x0, bb.x1, bb.y0, bb.y1])):
            continue
        spans.append((bb.y0, bb.y1, loc) if vertical else (bb.x0, bb.x1, loc))
    if len(spans) < 2:
        return
    spans.sort()
    pad = 2.0 if vertical else 8.0
    for lo, hi, loc in spans:
        if last is None or lo >= last + pad:
            kept.append(loc)
            last = hi
    if len(kept) < len(spans):
        axis.set_ticks(sorted(kept))


def _wrap(text, room: float, renderer) -> None:
    """Break a title that is wider than ``room`` pixels onto more lines."""
    import textwrap
    s = text.get_text()
    if not s:
        return
    width = text.get_window_extent(renderer).width
    chars = len(s)
    for _ in range(4):
        if width <= room:
            return
        chars = max(int(chars * room / width * 0.95), 12)
        text.set_text(textwrap.fill(s, chars))
        width = text.get_window_extent(renderer).width


def _content_box(fig, artists, renderer):
    boxes = [b for b in (a.get_tightbbox(renderer) for a in artists) if b is not None]
    fw, fh = fig.bbox.width, fig.bbox.height
    return (min(b.x0 for b in boxes) / fw, min(b.y0 for b in boxes) / fh,
            max(b.x1 for b in boxes) / fw, max(b.y1 for b in boxes) / fh)


#: least gap between a plot and its colour bar, as a share of the figure width
_BAR_GAP = 0.02


def _fit(fig) -> None:
    axes = [a for a in fig.axes if a.get_visible()]
    bars = [a for a in axes if _is_colorbar(a)]
    main = [a for a in axes if a not in bars]
    if not main:
        return
    if len(main) > 1:
        _fit_grid(fig, main, bars)
        return
    ax = main[0]
    renderer = fig.canvas.get_renderer()
    _wrap(ax.title, fig.bbox.width * (1 - 2 * _MARGIN), renderer)
    bars = [_equalised_colorbar(fig, cb) for cb in bars]
    for cb in bars:
        _thin_ticks(cb, renderer)
    # layout without full draws: apply the aspect by hand, measure, move (twice converges)
    ax.apply_aspect()
    box = ax.get_position(original=False)
    # the bar was placed beside the box before the aspect shrank it: keep it clear of the plot
    links = [(cb, max(cb.get_position().x0 - box.x1, _BAR_GAP), cb.get_position().width) for cb in bars]
    for _ in range(2):
        x0, y0, x1, y1 = _content_box(fig, [ax, *bars], renderer)
        pos = ax.get_position(original=True)
        left = pos.x0 + (_MARGIN - x0)
        right = pos.x1 + ((1 - _MARGIN) - x1)
        bottom = pos.y0 + (_MARGIN - y0)
        top = pos.y1 + ((1 - _MARGIN) - y1)
        if right - left < 0.2 or top - bottom < 0.2:
            break
        ax.set_position([left, bottom, right - left, top - bottom])
        ax.apply_aspect()
        drawn = ax.get_position(original=False)
        for cb, gap, w in links:
            cb.set_position([drawn.x1 + gap, drawn.y0, w, drawn.height])
    _thin_ticks(ax, renderer, ax.xaxis)
    # a box held to a fixed aspect leaves free width: centre the plot in it
    x0, _, x1, _ = _content_box(fig, [ax, *bars], renderer)
    shift = 0.5 * ((_MARGIN - x0) + ((1 - _MARGIN) - x1))
    if abs(shift) > 1e-3:
        p = ax.get_position(original=True)
        ax.set_position([p.x0 + shift, p.y0, p.width, p.height])
        for cb in bars:
            q = cb.get_position()
            cb.set_position([q.x0 + shift, q.y0, q.width, q.height])


def _fit_grid(fig, main, bars) -> None:
    """A grid of panels: equal boxes, each column and row as wide as its labels need.

    Decorations (tick labels, axis labels, titles wider than their box) are
    measured per panel; every column gets room for its widest left and right
    decoration, every row for its tallest top and bottom one, and the boxes
    share what is left. The figure title sits above.
    """
    renderer = fig.canvas.get_renderer()
    fw, fh = fig.bbox.width, fig.bbox.height
    title = getattr(fig, "_suptitle", None)
    top_px = _MARGIN * fh
    if title is not None and title.get_text():
        _wrap(title, fw * (1 - 2 * _MARGIN), renderer)
        title.set_y(1 - _MARGIN)
        title.set_va("top")
        top_px += title.get_window_extent(renderer).height + 0.02 * fh
    cells = []
    for ax in main:
        spec = ax.get_subplotspec()
        if spec is None:
            return
        gs = spec.get_gridspec()
        cells.append((ax, spec.rowspan.start, spec.colspan.start, gs.nrows, gs.ncols))
    nrows = max(c[3] for c in cells)
    ncols = max(c[4] for c in cells)
    for ax, *_ in cells:
        _wrap(ax.title, 0.9 * fw * (1 - 2 * _MARGIN) / ncols, renderer)
    # decorations change a little with the box size (titles wider than it): measure twice
    for _ in range(2):
        dec_l, dec_r = np.zeros(ncols), np.zeros(ncols)
        dec_t, dec_b = np.zeros(nrows), np.zeros(nrows)
        for ax, r, c, _, _ in cells:
            tb = ax.get_tightbbox(renderer)
            bb = ax.get_window_extent(renderer)
            dec_l[c] = max(dec_l[c], bb.x0 - tb.x0)
            dec_r[c] = max(dec_r[c], tb.x1 - bb.x1)
            dec_t[r] = max(dec_t[r], tb.y1 - bb.y1)
            dec_b[r] = max(dec_b[r], bb.y0 - tb.y0)
        gap = 0.015 * fw
        width = (fw * (1 - 2 * _MARGIN) - dec_l.sum() - dec_r.sum() - gap * (ncols - 1)) / ncols
        height = (fh - top_px - _MARGIN * fh - dec_t.sum() - dec_b.sum() - gap * (nrows - 1)) / nrows
        if width < 0.05 * fw or height < 0.05 * fh:
            return
        for ax, r, c, _, _ in cells:
            x0 = _MARGIN * fw + dec_l[:c + 1].sum() + dec_r[:c].sum() + c * (width + gap)
            ytop = fh - top_px - dec_t[:r + 1].sum() - dec_b[:r].sum() - r * (height + gap)
            ax.set_position([x0 / fw, (ytop - height) / fh, width / fw, height / fh])
    for ax, *_ in cells:
        _thin_ticks(ax, renderer, ax.xaxis)
