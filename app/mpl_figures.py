"""The export's figures, drawn with matplotlib's object API on the Agg canvas.

Each figure is drawn from the record that decides what it shows: a particle
view from the view policy's :class:`~.view_policy.ParticleView` and its
aggregate, an audit figure from its ``app.figure_data`` record (the records
the screen's holoviews figures are built from). Colour maps and scales come
from ``app.colours`` (the palettes holoviews draws with; ``eq_hist`` fixed
once computed). No pyplot, no holoviews: a figure is a plain ``Figure`` of
exact pixel size (``png.new_figure``), fitted by ``png.fit_layout``.

An image figure (a density view, a deposit) is laid out once and later
images of the same kind are swapped into it (:class:`ImageFigure`): the
export draws every snapshot of a view that way, and a movie every frame.

Sizes of the lettering are holoviews' matplotlib defaults (title 12 pt,
labels and ticks 10 pt) times the figure's ``fontscale``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from . import colours
from . import figure_data as D
from .png import _MARGIN, figure_pixels, fit_layout, new_figure, save_png

TITLE_PT, LABEL_PT, TICK_PT = 12.0, 10.0, 10.0
#: a block's count on the census map (not scaled: it must fit its block)
BLOCK_LABEL_PT = 11.0
#: the title over a grid of panels, and a legend
SUPTITLE_PT, LEGEND_PT = 16.0, 10.0
#: a colour bar beside its plot: width and least gap, as shares of the figure width
BAR_WIDTH, BAR_GAP = 0.035, 0.02
#: where a single plot starts before it is fitted
_FIRST_BOX = (0.1, 0.1, 0.72, 0.8)


@dataclass(frozen=True)
class FigureSize:
    """Pixels, dots per inch and the lettering's scale of a figure."""

    width: int
    height: int
    dpi: int = 100
    fontscale: float = 1.0

    @classmethod
    def of(cls, opts) -> "FigureSize":
        return cls(int(opts.width), int(opts.height), int(opts.dpi), float(opts.fontscale))

    def figure(self):
        return new_figure(self.width, self.height, self.dpi)


def _plot_axes(fig, size: FigureSize, title, xlabel, ylabel, *, frame: bool, equal: bool):
    """One plot's axes with the title, labels and tick size of a figure of ``size``."""
    s = size.fontscale
    return _dress(fig.add_axes(_FIRST_BOX), title, xlabel, ylabel, frame=frame, equal=equal,
                  title_pt=TITLE_PT * s, label_pt=LABEL_PT * s, tick_pt=TICK_PT * s)


def _dress(ax, title, xlabel, ylabel, *, frame, equal, title_pt, label_pt, tick_pt):
    ax.set_title(title, fontsize=title_pt)
    ax.set_xlabel(xlabel, fontsize=label_pt)
    ax.set_ylabel(ylabel, fontsize=label_pt)
    ax.tick_params(labelsize=tick_pt)
    if not frame:
        ax.spines["top"].set_visible(False)
        ax.spines["right"].set_visible(False)
    ax.set_aspect("equal" if equal else "auto", adjustable="box")
    return ax


def _bar_axes(fig, ax):
    """Colour-bar axes beside the plot as drawn (after its aspect has shrunk it)."""
    ax.apply_aspect()
    box = ax.get_position(original=False)
    return fig.add_axes([box.x1 + BAR_GAP, box.y0, BAR_WIDTH, box.height])


# colour bars ------------------------------------------------------------------------------------
def _whole(lo: float, hi: float) -> bool:
    """Counts (whole ends) are labelled as whole numbers; anything else keeps its decimals."""
    return float(lo).is_integer() and float(hi).is_integer()


def _nice(v: float) -> float:
    if v == 0 or not np.isfinite(v):
        return v
    mag = 10 ** np.floor(np.log10(abs(v)))
    return float(np.round(v / mag, 1) * mag) if abs(v) >= 10 else float(np.round(v, 2))


def eq_hist_ticks(norm, count: int = 7):
    """Values to label an equalised bar with, and where each sits on a bar of the used colours.

    The bar shows the colours from the smallest value's (``norm.lowest``) to the top,
    so its bottom is the smallest value; a value ``v`` sits at ``norm(v)`` rescaled
    into that span: the very colour the image gives ``v``.
    """
    lo, hi, low = float(norm.vmin), float(norm.vmax), norm.lowest
    probe = np.clip(norm.inverse(np.linspace(low, 1.0, count)), lo, hi)
    whole = _whole(lo, hi)
    values = np.unique(np.concatenate([[lo, hi], np.round(probe) if whole else
                                       [_nice(v) for v in probe]]))
    values = values[(values >= lo) & (values <= hi)]
    where = (np.asarray(norm(values), dtype=float) - low) / max(1.0 - low, 1e-12)
    keep = np.isfinite(where)
    values, where = values[keep], np.clip(where[keep], 0.0, 1.0)
    # one label per place: a flat stretch of the scale puts several values at one spot
    where, first = np.unique(np.round(where, 9), return_index=True)
    values = values[first]
    labels = [f"{int(v):,}" if whole else f"{v:g}" for v in values]
    return values, where, labels


def colour_bar(fig, cax, norm, cmap, label: str, size: FigureSize) -> None:
    """Draw the colour bar of ``norm`` and ``cmap`` into ``cax`` (cleared first)."""
    from matplotlib.cm import ScalarMappable
    from matplotlib.colors import ListedColormap, Normalize
    from matplotlib.ticker import FixedLocator, FuncFormatter
    cax.clear()
    pt = LABEL_PT * size.fontscale
    if isinstance(norm, colours.EqHistNorm):
        low = norm.lowest
        used = ListedColormap(cmap(np.linspace(low, 1.0, cmap.N)))
        bar = fig.colorbar(ScalarMappable(norm=Normalize(0.0, 1.0), cmap=used), cax=cax)
        _, where, labels = eq_hist_ticks(norm)
        text = dict(zip(np.round(where, 9), labels))
        bar.locator = FixedLocator(list(where))
        # a label looked up by its place, so dropping crowded ticks keeps the others' names
        bar.formatter = FuncFormatter(lambda t, _pos: text.get(round(float(t), 9), ""))
        bar.update_ticks()
    else:
        bar = fig.colorbar(ScalarMappable(norm=norm, cmap=cmap), cax=cax)
    bar.set_label(label, fontsize=pt)
    cax.tick_params(labelsize=TICK_PT * size.fontscale)


# image figures ------------------------------------------------------------------------------------
class ImageFigure:
    """An image and its colour bar in a figure of exact size, laid out once.

    :meth:`show` draws an image (rows from the lowest y up) with its colour
    scale and title; a later call swaps the next image into the same laid-out
    figure, and fits it again only when its title or colour-bar labels need
    other room (:meth:`_needs`). ``pixels``/``save`` draw the figure as it is,
    redrawing only what changed since the layout was last drawn.
    """

    def __init__(self, size: FigureSize, *, extent, xlabel: str, ylabel: str, clabel: str,
                 cmap: str, equal: bool, bad=None):
        self.size = size
        self.extent = tuple(float(v) for v in extent)
        self.clabel = clabel
        self.cmap = colours.colour_map(cmap) if bad is None else \
            colours.colour_map(cmap).with_extremes(bad=bad)
        self.fig = size.figure()
        self.ax = _plot_axes(self.fig, size, "", xlabel, ylabel, frame=True, equal=equal)
        self.cax = None
        self.im = None
        self._room = None
        self._background = None

    def show(self, data, norm, title: str, *, extent=None) -> "ImageFigure":
        data = np.asarray(data, dtype=np.float64)
        if extent is not None:
            self.extent = tuple(float(v) for v in extent)
        if self.im is None or self.im.get_array().shape != data.shape:
            if self.im is not None:
                self.im.remove()
            self.im = self.ax.imshow(data, origin="lower", extent=self.extent, cmap=self.cmap,
                                     norm=norm, interpolation="nearest",
                                     aspect=self.ax.get_aspect())
        else:
            self.im.set_data(data)
            self.im.set_norm(norm)
            self.im.set_extent(self.extent)
        self.ax.set_xlim(self.extent[0], self.extent[1])
        self.ax.set_ylim(self.extent[2], self.extent[3])
        first = self.cax is None
        if first:
            self.cax = _bar_axes(self.fig, self.ax)
        colour_bar(self.fig, self.cax, norm, self.cmap, self.clabel, self.size)
        self.ax.title.set_text(title)
        room = self._needs()
        if first or room != self._room:
            fit_layout(self.fig)
            self._room = room
            self._background = None
        return self

    def _needs(self):
        """What the layout depends on beyond the axis labels: the extent, whether the title
        must wrap (and then its text), and how wide the colour bar's tick labels are in pixels.
        The same needs give the same layout, so an image swapped in is the figure built afresh."""
        r = self.fig.canvas.get_renderer()
        room = self.fig.bbox.width * (1 - 2 * _MARGIN)
        wraps = self.ax.title.get_window_extent(r).width > room
        axis = self.cax.yaxis
        locs = [v for v in axis.get_major_locator()() if axis.get_view_interval()[0] - 1e-12 <= v
                <= axis.get_view_interval()[1] + 1e-12]
        labels = axis.get_major_formatter().format_ticks(locs)
        prop = axis.get_ticklabels()[0].get_fontproperties() if axis.get_ticklabels() else None
        widest = max((r.get_text_width_height_descent(t, prop, ismath="$" in t)[0]
                      for t in labels if t), default=0.0) if prop is not None else 0.0
        return (self.extent, wraps, self.ax.title.get_text() if wraps else "", round(widest, 1))

    def _changing(self):
        """What differs from one image to the next: drawn over a saved picture of the rest."""
        return [self.im, *self.ax.spines.values(), self.ax.title, self.cax]

    def pixels(self) -> np.ndarray:
        """The figure as an (height, width, 3) RGB array.

        The first draw of a layout saves the picture without the image, its frame, the
        title and the colour bar; later ones restore it and draw just those (the
        same pixels as a full draw: the frame goes over the image either way).
        """
        canvas = self.fig.canvas
        changing = self._changing()
        if self._background is None:
            # the title is placed as the axes draw: made clear, not hidden, so it is placed
            hidden = [a for a in changing if a is not self.ax.title]
            for a in hidden:
                a.set_visible(False)
            self.ax.title.set_alpha(0.0)
            try:
                canvas.draw()
                self._background = canvas.copy_from_bbox(self.fig.bbox)
            finally:
                for a in hidden:
                    a.set_visible(True)
                self.ax.title.set_alpha(None)
        canvas.restore_region(self._background)
        renderer = canvas.get_renderer()
        for a in changing:
            a.draw(renderer)
        return figure_pixels(self.fig, drawn=True)

    def save(self, path) -> str:
        return save_png(self.fig, path)

    def drawn(self) -> np.ndarray:
        """The image as drawn (rows from the lowest y up; NaN where a bin is blank)."""
        return np.ma.filled(np.ma.asarray(self.im.get_array(), dtype=np.float64), np.nan)


def density_figure(view, size: FigureSize) -> ImageFigure:
    """An empty figure for aggregates of ``view`` (its labels, colour map and aspect)."""
    x0, x1 = view.x_range
    y0, y1 = view.y_range
    return ImageFigure(size, extent=(x0, x1, y0, y1), xlabel=view.xlabel, ylabel=view.ylabel,
                       clabel=view.clabel, cmap=view.cmap, equal=view.equal)


def show_density(figure: ImageFigure, view, agg, *, title=None, norm=None) -> ImageFigure:
    """Draw ``agg`` of ``view`` into ``figure``; ``norm`` is a scale shared by several (a movie),
    else the aggregate's own ``view.scaling`` scale."""
    return show_values(figure, view, *D.density_data(view, agg), title=title, norm=norm)


def show_values(figure: ImageFigure, view, data, extent, *, title=None, norm=None) -> ImageFigure:
    """Draw the values of a density view (``figure_data.density_data``) into ``figure``."""
    if norm is None and view.diverging:       # a difference: limits symmetric about zero
        from .view_policy import difference_limits
        norm, _ = colours.scale_norm([data], "linear", vrange=difference_limits(data))
    elif norm is None:
        norm, _ = colours.scale_norm([data], view.scaling)
    return figure.show(data, norm, view.title if title is None else title, extent=extent)


def deposit_figure(m: D.DepositMap, size: FigureSize) -> ImageFigure:
    x0, y0, x1, y1 = m.bounds
    return ImageFigure(size, extent=(x0, x1, y0, y1), xlabel=m.xlabel, ylabel=m.ylabel,
                       clabel=m.value_label, cmap=m.cmap, equal=True)


def show_deposit(figure: ImageFigure, m: D.DepositMap) -> ImageFigure:
    data = m.grid.T
    norm, _ = colours.scale_norm([data], "linear")
    return figure.show(data, norm, m.title)


# the other audit figures ------------------------------------------------------------------------------
def census_map(m: D.CensusMap, size: FigureSize):
    """The census map: blocks coloured by their count, refined ones outlined, counts written."""
    from matplotlib.collections import PatchCollection
    from matplotlib.colors import Normalize
    from matplotlib.patches import Rectangle
    fig = size.figure()
    ax = _plot_axes(fig, size, m.title, m.xlabel, m.ylabel, frame=False, equal=m.equal)
    t = m.table
    cmap = colours.colour_map(m.cmap)
    norm = Normalize(*m.clim)

    def boxes(df):
        return [Rectangle((a, b), c - a, d - b) for a, b, c, d in
                zip(df["x0"], df["y0"], df["x1"], df["y1"])]
    ax.add_collection(PatchCollection(boxes(t), facecolors=cmap(norm(t[m.value].to_numpy(float))),
                                      edgecolors=D.BLOCK_EDGE, linewidths=1.2))
    if m.refined is not None:
        ax.add_collection(PatchCollection(boxes(m.refined), facecolors="none",
                                          edgecolors=D.REFINED_EDGE, linewidths=2.0))
    if m.labels is not None:
        cx, cy, text, dark = m.labels
        for x, y, s, d in zip(cx, cy, text, dark):
            ax.text(x, y, s, ha="center", va="center", fontsize=BLOCK_LABEL_PT,
                    color="#111111" if d else "white")
    ax.set_xlim(*m.xlim)
    ax.set_ylim(*m.ylim)
    colour_bar(fig, _bar_axes(fig, ax), norm, cmap, m.value_label, size)
    fit_layout(fig)
    return fig


def _bars(ax, edges, heights, **kw):
    ax.bar(edges[:-1], np.nan_to_num(heights, nan=0.0), width=np.diff(edges), align="edge",
           color=D.BAR_COLOUR, edgecolor="white", linewidth=1.0, alpha=0.9, **kw)


def rank_bars(r: D.RankBars, size: FigureSize):
    """Load per rank from zero, the mean dashed."""
    fig = size.figure()
    ax = _plot_axes(fig, size, r.title, "rank", r.value_label, frame=False, equal=False)
    _bars(ax, r.edges, r.load)
    ax.axhline(r.mean, color=D.LINE_COLOUR, linewidth=2.5, linestyle="--")
    ax.set_xlim(*r.xlim)
    ax.set_ylim(*r.ylim)
    if r.xticks is not None:
        ax.set_xticks(r.xticks)
    fit_layout(fig)
    return fig


def transfer_matrix(t: D.TransferMatrix, size: FigureSize):
    """Block-to-block moves as a matrix: from on x, to on y, empty cells light grey."""
    from matplotlib.colors import LogNorm, Normalize
    fig = size.figure()
    ax = _plot_axes(fig, size, t.title, t.xlabel, t.ylabel, frame=True, equal=True)
    cmap = colours.colour_map(t.cmap).with_extremes(bad=D.EMPTY_CELL)
    norm = LogNorm(*t.clim) if t.logz else Normalize(*t.clim)
    n = t.ids.size
    if t.contiguous:
        lo, hi = t.ids[0] - 0.5, t.ids[-1] + 0.5
    else:
        # ids that skip: one row and column per id, named by it
        lo, hi = -0.5, n - 0.5
        ax.set_xticks(range(n), [str(i) for i in t.ids])
        ax.set_yticks(range(n), [str(i) for i in t.ids])
    ax.imshow(t.matrix.T, origin="lower", extent=(lo, hi, lo, hi), cmap=cmap, norm=norm,
              interpolation="nearest")
    ax.set_xlim(lo, hi)
    ax.set_ylim(lo, hi)
    colour_bar(fig, _bar_axes(fig, ax), norm, cmap, t.value_label, size)
    fit_layout(fig)
    return fig


def displacement_histogram(h: D.DisplacementHistogram, size: FigureSize):
    """How far matched particles went, on a log axis, the one-cell-per-step mark dashed."""
    fig = size.figure()
    ax = _plot_axes(fig, size, h.title, h.xlabel, h.ylabel, frame=False, equal=False)
    ax.set_yscale("log")
    shown = np.isfinite(h.counts)
    if shown.any():
        left = h.edges[:-1][shown]
        ax.bar(left, h.counts[shown], width=np.diff(h.edges)[shown], align="edge",
               color=D.BAR_COLOUR, edgecolor="white", linewidth=1.0, alpha=0.9)
    ax.axvline(h.limit, color=D.LINE_COLOUR, linewidth=2.5, linestyle="--")
    ax.set_xlim(*h.xlim)
    ax.set_ylim(*h.ylim)
    fit_layout(fig)
    return fig


def drift_curves(c: D.DriftCurves, size: FigureSize):
    """One panel per total: each species' drift, the ±rtol band where the gate judges, exits crossed."""
    from matplotlib.ticker import MaxNLocator
    fig = size.figure()
    panels = c.panels or [D.DriftPanel("no totals", "", (-1.0, 1.0), "", None)]
    ncols = max(c.ncols, 1)
    nrows = -(-len(panels) // ncols)
    # near where the fit puts the panels, so their ticks are mostly measured once
    grid = fig.add_gridspec(nrows, ncols, left=0.09, right=0.98, bottom=0.07, top=0.88,
                            wspace=0.35, hspace=0.55)
    for k, p in enumerate(panels):
        ax = _dress(fig.add_subplot(grid[k // ncols, k % ncols]), p.title, c.xlabel, p.ylabel,
                    frame=False, equal=False, title_pt=TITLE_PT, label_pt=LABEL_PT, tick_pt=TICK_PT)
        if p.band is not None:
            ax.axhspan(-p.band, p.band, color=D.BAND_COLOUR, alpha=0.16, linewidth=0)
            for s in (-1, 1):
                ax.axhline(s * p.band, color=D.BAND_COLOUR, linewidth=1.0, linestyle="--")
        xs = [x for _, x, _, _ in p.curves]
        for sp, x, y, colour in p.curves:
            ax.plot(x, y, color=colour, linewidth=1.8, label=sp)
        if p.exits is not None:
            ax.scatter(*p.exits, marker="X", s=110, color=D.LINE_COLOUR, edgecolors="white",
                       linewidths=0.8, zorder=3)
            xs.append(p.exits[0])
        if xs:
            allx = np.concatenate(xs)
            lo, hi = float(allx.min()), float(allx.max())
            # a cross at the last snapshot needs room beyond it
            pad = 0.1 * (hi - lo) if p.exits is not None else 0.0
            if hi > lo:
                ax.set_xlim(lo - pad, hi + pad)
        ax.set_ylim(*p.ylim)
        ax.xaxis.set_major_locator(MaxNLocator(3 if ncols >= 3 else 5))
        ax.yaxis.set_major_locator(MaxNLocator(5))
        if p.legend and p.curves:
            ax.legend(loc="upper left", fontsize=LEGEND_PT)
    fig.suptitle(c.title, fontsize=SUPTITLE_PT * size.fontscale)
    fit_layout(fig)
    return fig


# figure jobs ---------------------------------------------------------------------------------------
#: what draws each kind of audit figure record into a figure of its own
DRAW = {"census_map": census_map, "rank_bars": rank_bars, "transfer_matrix": transfer_matrix,
        "displacement_histogram": displacement_histogram, "drift_curves": drift_curves}


def _image_key(kind, payload):
    """Which laid-out figure an image goes into: pictures of one kind, on one grid, labelled alike."""
    if kind == "density":
        v = payload[0]
        return (kind, v.xcol, v.ycol, v.grid, v.x_range, v.y_range, v.xlabel, v.ylabel, v.clabel,
                v.cmap, v.scaling, v.equal, v.diverging)
    m = payload
    return (kind, m.grid.shape, m.bounds, m.xlabel, m.ylabel, m.value_label, m.cmap)


def draw_job(job, size: FigureSize, laid_out: dict) -> None:
    """Draw one figure and write its PNG: ``job`` is (kind, payload, path).

    ``density`` takes (view, values, extent) of ``figure_data.density_data``, ``deposit`` a
    ``DepositMap``: both go into the figure ``laid_out`` keeps for their kind; every
    other kind is a ``figure_data`` record drawn by ``DRAW[kind]``. The same wherever
    it runs: in the export's process or in the process that draws for it.
    """
    kind, payload, path = job
    if kind in ("density", "deposit"):
        key = _image_key(kind, payload)
        if kind == "density":
            view, data, extent = payload
            if key not in laid_out:
                laid_out[key] = density_figure(view, size)
            show_values(laid_out[key], view, data, extent).save(path)
        else:
            if key not in laid_out:
                laid_out[key] = deposit_figure(payload, size)
            show_deposit(laid_out[key], payload).save(path)
        return
    save_png(DRAW[kind](payload, size), path)


def warm_up() -> None:
    """Draw a small figure once: the fonts, text layout and colour tables are then ready."""
    size = FigureSize(160, 120, 100)
    data = np.arange(12.0).reshape(3, 4)
    fig = ImageFigure(size, extent=(0, 1, 0, 1), xlabel="x", ylabel="y", clabel="c",
                      cmap="viridis", equal=False)
    fig.show(data, colours.scale_norm([data], "eq_hist")[0], "t").pixels()
    figure_pixels(displacement_histogram(D.displacement_histogram(np.arange(5.0), 1, "t"), size))

