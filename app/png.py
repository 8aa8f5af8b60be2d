"""Writing a holoviews figure as a PNG of an exact pixel size, with no display.

The matplotlib backend of holoviews places axes by fixed figure fractions,
which either wastes a third of the picture or clips long labels. After
rendering, the axes are moved so their labels, titles and colour bars just
fit inside the picture, then the figure is saved without a tight bounding
box (that would change the pixel size).
"""

from __future__ import annotations

import os


def use_headless_matplotlib() -> None:
    """Select the Agg canvas so nothing needs a display (batch jobs, CI)."""
    import matplotlib
    if matplotlib.get_backend().lower() != "agg":
        matplotlib.use("Agg", force=True)


#: margin around the content, as a fraction of the picture
_MARGIN = 0.02


def render_figure(obj, width: int, height: int, dpi: int, fontscale: float = 1.0):
    """The matplotlib Figure of a holoviews object, sized width x height pixels at dpi."""
    use_headless_matplotlib()
    import holoviews as hv
    from .figures import ensure_backends
    ensure_backends()
    inches = (width / dpi, height / dpi)
    obj = obj.opts(fig_inches=inches, fontscale=fontscale, backend="matplotlib", clone=True)
    fig = hv.render(obj, backend="matplotlib")
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    if not isinstance(fig.canvas, FigureCanvasAgg):
        FigureCanvasAgg(fig)
    fig.set_dpi(dpi)
    fig.set_size_inches(*inches, forward=False)
    _fit(fig)
    return fig


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
    # remember each colour bar's gap and width relative to the drawn axes box
    fig.canvas.draw()
    box = ax.get_position(original=False)
    links = []
    for cb in bars:
        p = cb.get_position()
        links.append((cb, p.x0 - box.x1, p.width))
    for _ in range(3):
        fig.canvas.draw()
        r = fig.canvas.get_renderer()
        boxes = [a.get_tightbbox(r) for a in [ax, *bars]]
        boxes = [b for b in boxes if b is not None]
        fw, fh = fig.bbox.width, fig.bbox.height
        x0 = min(b.x0 for b in boxes) / fw
        x1 = max(b.x1 for b in boxes) / fw
        y0 = min(b.y0 for b in boxes) / fh
        y1 = max(b.y1 for b in boxes) / fh
        pos = ax.get_position(original=True)
        left = pos.x0 + (_MARGIN - x0)
        right = pos.x1 + ((1 - _MARGIN) - x1)
        bottom = pos.y0 + (_MARGIN - y0)
        top = pos.y1 + ((1 - _MARGIN) - y1)
        if right - left < 0.2 or top - bottom < 0.2:
            break
        ax.set_position([left, bottom, right - left, top - bottom])
        fig.canvas.draw()
        drawn = ax.get_position(original=False)
        # a box kept to a fixed aspect leaves free space on one side: centre it
        for cb, gap, w in links:
            cb.set_position([drawn.x1 + gap, drawn.y0, w, drawn.height])
        if abs(x0 - _MARGIN) < 2e-3 and abs(x1 - 1 + _MARGIN) < 2e-3 and \
                abs(y0 - _MARGIN) < 2e-3 and abs(y1 - 1 + _MARGIN) < 2e-3:
            break
    _centre(fig, ax, [cb for cb, _, _ in links])


def _centre(fig, ax, bars) -> None:
    """Shift a fixed-aspect plot (and its colour bars) to the middle of the free width."""
    fig.canvas.draw()
    r = fig.canvas.get_renderer()
    boxes = [b for b in (a.get_tightbbox(r) for a in [ax, *bars]) if b is not None]
    fw = fig.bbox.width
    x0 = min(b.x0 for b in boxes) / fw
    x1 = max(b.x1 for b in boxes) / fw
    shift = 0.5 * ((_MARGIN - x0) + ((1 - _MARGIN) - x1))
    if abs(shift) < 1e-3:
        return
    for a in [ax, *bars]:
        p = a.get_position(original=False) if a is not ax else a.get_position(original=True)
        a.set_position([p.x0 + shift, p.y0, p.width, p.height])


def _fit_grid(fig, main, bars) -> None:
    """A grid of panels: let matplotlib's tight layout place them under the title."""
    import warnings
    title = getattr(fig, "_suptitle", None)
    top = 1.0
    if title is not None and title.get_text():
        fig.canvas.draw()
        h = title.get_window_extent(fig.canvas.get_renderer()).height / fig.bbox.height
        title.set_y(1 - _MARGIN)
        title.set_va("top")
        top = 1 - _MARGIN - h - 0.01
    # holoviews builds its grid with fixed spacing, which tight layout refuses to move;
    # hand every panel the same cell of a plain grid instead
    from matplotlib.gridspec import GridSpec
    plain = {}
    for ax in main:
        spec = ax.get_subplotspec()
        if spec is None:
            continue
        gs = spec.get_gridspec()
        new = plain.setdefault(id(gs), GridSpec(gs.nrows, gs.ncols, figure=fig))
        r, c = spec.rowspan, spec.colspan
        ax.set_subplotspec(new[r.start:r.stop, c.start:c.stop])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        fig.tight_layout(rect=(_MARGIN, _MARGIN, 1 - _MARGIN, top), h_pad=1.2, w_pad=1.0)
