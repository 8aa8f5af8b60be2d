"""Figures of an exact pixel size on the Agg canvas, laid out to fit, written as PNG.

A figure is a plain matplotlib ``Figure`` on its own Agg canvas (no pyplot,
no display, nothing kept by a global registry: it is freed like any object).
Axes are placed by figure fractions, which either waste a third of the
picture or clip long labels, so :func:`fit_layout` moves them until their
labels, titles and colour bars just fit inside the picture; the PNG is then
written at exactly the asked size (no tight bounding box, which would change it).
"""

from __future__ import annotations

import os

import numpy as np


#: margin around the content, as a fraction of the picture
_MARGIN = 0.02
#: zlib effort of the PNGs (1 to 9): 6 is the common default, the smallest files for the time
PNG_COMPRESSION = 6


def new_figure(width: int, height: int, dpi: int):
    """A white matplotlib Figure of exactly ``width`` x ``height`` pixels on its own Agg canvas."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure
    fig = Figure(figsize=(width / dpi, height / dpi), dpi=dpi, facecolor="white")
    FigureCanvasAgg(fig)
    # inches * dpi must land on the whole pixel count (333 / 120 * 120 is 332.99999...)
    w, h = fig.canvas.get_width_height()
    if (w, h) != (width, height):
        fig.set_size_inches((width + 1e-6) / dpi, (height + 1e-6) / dpi, forward=False)
    return fig


def figure_pixels(fig, drawn: bool = False) -> np.ndarray:
    """The figure drawn on its Agg canvas, as an (height, width, 3) uint8 RGB array.

    The same pixels ``save_png`` writes (on white, as it saves). ``drawn``: the
    canvas holds the picture already (nothing is drawn again).
    """
    if not drawn:
        fig.canvas.draw()
    rgba = np.asarray(fig.canvas.buffer_rgba())
    if (rgba[..., 3] == 255).all():
        return np.ascontiguousarray(rgba[..., :3])
    rgb = rgba[..., :3].astype(np.float32)
    alpha = rgba[..., 3:4].astype(np.float32) / 255.0
    return np.round(rgb * alpha + 255.0 * (1.0 - alpha)).astype(np.uint8)


def write_png(pixels: np.ndarray, path) -> str:
    """Write an RGB array to ``path`` as PNG, atomically (a ``.part`` file renamed)."""
    from PIL import Image
    tmp = f"{path}.part"
    try:
        Image.fromarray(pixels, mode="RGB").save(tmp, format="PNG", compress_level=PNG_COMPRESSION)
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.remove(tmp)
        raise
    return os.fspath(path)


def save_png(fig, path) -> str:
    """Draw ``fig`` and write it to ``path`` as a PNG of the figure's pixel size."""
    return write_png(figure_pixels(fig), path)


def _is_colorbar(ax) -> bool:
    return getattr(ax, "_colorbar", None) is not None or ax.get_label() == "<colorbar>"


def _thin_ticks(axis, renderer) -> None:
    """Drop ticks whose labels would overlap (an equalised colour bar bunches them, long
    numbers crowd a narrow panel)."""
    axis.get_tightbbox(renderer)   # places and formats the tick labels
    ticks = axis.get_major_ticks()
    locs = list(axis.get_majorticklocs())
    if len(ticks) < 2 or len(ticks) != len(locs):
        return
    vertical = axis.axis_name == "y"
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


def _bar_axis(cax):
    """The long axis of a colour bar (the one its ticks are on)."""
    p = cax.get_position()
    return cax.yaxis if p.height >= p.width else cax.xaxis


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


def _content_box(fig, axes, renderer):
    """The box of the axes with their decorations (ticks, labels, titles), as picture shares.

    What is drawn inside an axes (bars, blocks, an image) stays inside it: only the
    decorations are measured.
    """
    boxes = [b for b in (a.get_tightbbox(renderer, bbox_extra_artists=[]) for a in axes)
             if b is not None]
    fw, fh = fig.bbox.width, fig.bbox.height
    return (min(b.x0 for b in boxes) / fw, min(b.y0 for b in boxes) / fh,
            max(b.x1 for b in boxes) / fw, max(b.y1 for b in boxes) / fh)


def _tick_locs(ax):
    """The tick places of both axes (they follow the axes' length in pixels)."""
    return tuple(tuple(np.round(a.get_major_locator()(), 12)) for a in (ax.xaxis, ax.yaxis))


def fit_layout(fig) -> None:
    """Move the axes of ``fig`` so titles, labels and colour bars just fit inside the picture.

    One plot with its colour bars (each bar kept at its gap and width beside the plot as
    drawn) is fitted as a box, centred in the picture; several plots (a grid of panels)
    by :func:`_fit_grid`. Text wider than the picture is wrapped first.

    The decorations around the plot (tick labels, axis labels, title, bars) are measured
    once and the plot is sized to what is left of the picture; only when the new size
    puts the ticks elsewhere (new labels) is it measured again.
    """
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
    fw, fh = fig.bbox.width, fig.bbox.height
    _wrap(ax.title, fw * (1 - 2 * _MARGIN), renderer)
    ax.apply_aspect()
    drawn = ax.get_position(original=False)
    links = [(cb, cb.get_position().x0 - drawn.x1, cb.get_position().width) for cb in bars]
    for _ in range(3):
        ticks = _tick_locs(ax)
        x0, y0, x1, y1 = _content_box(fig, [ax, *bars], renderer)
        drawn = ax.get_position(original=False)
        # decorations on each side of the drawn plot, as shares of the picture
        dl, dr = drawn.x0 - x0, x1 - drawn.x1
        db, dt = drawn.y0 - y0, y1 - drawn.y1
        w = 1 - 2 * _MARGIN - dl - dr
        h = 1 - 2 * _MARGIN - db - dt
        if w < 0.1 or h < 0.1:
            break
        left, bottom = _MARGIN + dl, _MARGIN + db
        if ax.get_aspect() != "auto":
            # a plot held to its data's shape fills one way and is centred the other
            ratio = ax.get_data_ratio() * float(ax.get_aspect())      # height / width in pixels
            pw, ph = w * fw, h * fh
            if ph / pw > ratio:
                nh = pw * ratio / fh
                bottom, h = bottom + 0.5 * (h - nh), nh
            else:
                nw = ph / ratio / fw
                left, w = left + 0.5 * (w - nw), nw
        ax.set_position([left, bottom, w, h])
        ax.apply_aspect()
        drawn = ax.get_position(original=False)
        for cb, gap, bw in links:
            cb.set_position([drawn.x1 + gap, drawn.y0, bw, drawn.height])
        # a title wider than the plot hangs over it by an amount that follows the plot's width
        overhang = ax.title.get_text() and ax.title.get_window_extent(renderer).width > drawn.width * fw
        if _tick_locs(ax) == ticks and not overhang:
            break
    _thin_ticks(ax.xaxis, renderer)
    for cb in bars:
        _thin_ticks(_bar_axis(cb), renderer)


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
    # decorations change with the box size only through the ticks: measure again while they move
    for _ in range(3):
        ticks = [_tick_locs(ax) for ax, *_ in cells]
        dec_l, dec_r = np.zeros(ncols), np.zeros(ncols)
        dec_t, dec_b = np.zeros(nrows), np.zeros(nrows)
        for ax, r, c, _, _ in cells:
            tb = ax.get_tightbbox(renderer, bbox_extra_artists=[])
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
        overhang = any(ax.title.get_text() and ax.title.get_window_extent(renderer).width > width
                       for ax, *_ in cells)
        if [_tick_locs(ax) for ax, *_ in cells] == ticks and not overhang:
            break
    for ax, *_ in cells:
        _thin_ticks(ax.xaxis, renderer)
