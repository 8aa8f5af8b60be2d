"""Colour maps by name and the colour scales of a picture, without the plotting stack.

A colour-map name is resolved the way holoviews resolves it for both of its
backends, so the screen and the export colour alike: a name (or its lower
case) in matplotlib's registry, else a colorcet name (``fire``, ``kbc``, …;
colorcet is only imported for such a name). The palette is 256 hex colours.

The colour scales are matplotlib normalisations: linear, log, and ``eq_hist``,
which is holoviews' histogram equalisation (its ``EqHistNormalize`` binning,
with ``rescale_discrete_levels``) computed once from the values of a picture
and then kept fixed, so the image, its colour bar and every frame of a movie
map a value to the same colour. Nothing here imports holoviews, bokeh or
panel (only matplotlib's colour module): the export starts without them.
"""

from __future__ import annotations

import functools

import numpy as np
from matplotlib.colors import Normalize

#: colours of the equalised scale: as many steps as a palette has colours
EQ_HIST_COLOURS = 256
#: fine bins of the value range the equalisation counts in (holoviews' default)
EQ_HIST_BINS = 256 ** 2


# colour maps -------------------------------------------------------------------------------------
def _registry():
    import matplotlib
    return matplotlib.colormaps


def _matplotlib_name(name: str) -> str | None:
    reg = _registry()
    for cand in (name, name.lower()):
        if cand in reg:
            return cand
    return None


def _colorcet_palette(name: str):
    """colorcet's palette of ``name`` (``NAME_r`` reversed), or None; imports colorcet."""
    try:
        import colorcet
    except ImportError:
        return None
    table = dict(colorcet.palette_n)
    table.setdefault("glasbey_hv", colorcet.glasbey_hv)
    if name in table:
        return list(table[name])
    if name.endswith("_r") and name[:-2] in table:
        return list(reversed(table[name[:-2]]))
    return None


def _resampled(palette, n: int):
    """A palette of ``n`` colours picked evenly from ``palette`` (holoviews' resampling)."""
    if len(palette) == n:
        return list(palette)
    idx = np.linspace(-0.5, len(palette) - 1 + 0.49999999999, n)
    return [palette[int(np.round(v))] for v in idx]


@functools.lru_cache(maxsize=64)
def _palette(name: str, n: int) -> tuple[str, ...] | None:
    from matplotlib.colors import ListedColormap
    mpl = _matplotlib_name(name)
    if mpl is None:
        cet = _colorcet_palette(name)
        if cet is not None:
            return tuple(_resampled(cet, n))
        mpl = _matplotlib_name(name)      # importing colorcet registers its cet_* maps
        if mpl is None:
            return None
    cmap = _registry()[mpl]
    if isinstance(cmap, ListedColormap) and cmap.N > n:
        full = _hex(cmap(np.arange(cmap.N)))
        return tuple(full[int(v)] for v in np.linspace(0, len(full) - 1, n))
    return tuple(_hex(cmap(np.linspace(0.0, 1.0, n))))


def _hex(rgba) -> list[str]:
    """Hex colours of RGBA rows in [0, 1], each channel cut to 8 bits as holoviews cuts it."""
    return ["#{:02x}{:02x}{:02x}".format(*(int(v * 255) for v in c[:3])) for c in rgba]


def palette(name: str, n: int = 256) -> list[str]:
    """The colour map ``name`` as ``n`` hex colours, low to high; ValueError for an unknown name."""
    got = _palette(str(name), int(n))
    if got is None:
        raise ValueError(cmap_problem(name))
    return list(got)


def cmap_problem(name) -> str | None:
    """Why ``name`` is not a colour map (None when it is one): the one check of a map's name."""
    if isinstance(name, str) and name and _palette(name, 8) is not None:
        return None
    return (f"no colour map named '{name}' (try viridis, magma, cividis, fire, kbc, or any "
            "matplotlib or colorcet name)")


@functools.lru_cache(maxsize=64)
def colour_map(name: str, bad=(0.0, 0.0, 0.0, 0.0)):
    """A matplotlib colour map of ``palette(name)``; ``bad`` (NaN, an empty bin) is transparent."""
    from matplotlib.colors import ListedColormap
    return ListedColormap(palette(name), name=str(name)).with_extremes(bad=bad)


# which bins get a colour -----------------------------------------------------------------------------
def shown_values(values, reduction: str, scaling: str) -> np.ndarray:
    """The values a density picture colours, as float64; NaN where a bin is left blank.

    A count of zero is no particle, so blank; on a log scale nothing at or below
    zero has a colour. A sum or mean keeps its zeros and negative values.
    """
    data = np.asarray(values, dtype=np.float64)
    if reduction == "count" or scaling == "log":
        data = np.where(data > 0, data, np.nan)
    return data


# colour scales ---------------------------------------------------------------------------------------
def eq_hist_edges(values, vmin: float, vmax: float, ncolors: int = EQ_HIST_COLOURS,
                  nbins: int = EQ_HIST_BINS) -> np.ndarray:
    """The ``ncolors + 1`` values at the borders of the equalised colour steps.

    Histogram equalisation: the values are counted on ``nbins`` even bins of
    ``[vmin, vmax]``, and each colour step gets an equal share of the
    cumulative count. With few distinct levels (counts of 1, 2, 3 particles)
    the low end of the palette is left unused, so the lowest level is not
    drawn near black (datashader's ``rescale_discrete_levels``). This is the
    binning of holoviews' ``EqHistNormalize``, step for step.
    """
    data = np.asarray(values, dtype=np.float64).ravel()
    data = data[np.isfinite(data)]
    edges = np.linspace(vmin, vmax, nbins + 1)
    counts, _ = np.histogram(data, edges)
    filled = np.nonzero(counts)[0]
    levels = len(filled)
    if levels <= 1:
        # one value (or none) has no distribution to equalise (holoviews' binning gives NaN):
        # the value sits where a lowest level would sit, the scale rises evenly from there
        start = _cdf_start(levels) if levels else 0.0
        low = -start / (1.0 - start)      # where a cdf of 0 falls on the scale
        out = vmin + (np.linspace(0.0, 1.0, ncolors + 1) - low) / (1.0 - low) * (vmax - vmin)
        out[-1] = vmax
        return out
    # the cumulative count over the filled bins, after a leading virtual bin for the stretch
    hist = np.zeros(levels + 1)
    hist[1:] = counts[filled]
    centres = np.concatenate([[0.0], 0.5 * (edges[filled] + edges[filled + 1])])
    centres[0] = 2 * centres[1] - centres[-1]
    cdf = np.cumsum(hist)
    cdf = (cdf - cdf[1]) / (cdf[-1] - cdf[1])
    cdf[0] = -1.0
    out = np.interp(np.linspace(_cdf_start(levels), 1, ncolors + 1), cdf, centres)
    out[-1] = vmax
    return out


def _cdf_start(levels: int) -> float:
    """Where the colour steps start on the cdf: 0 for many levels, below 0 for few.

    The span is 1.5 times the cdf's for two levels, falling by 0.5 over the next 98
    (datashader's rescale_discrete_levels), so the lowest of few levels is not drawn
    in the palette's darkest colour.
    """
    slope = -0.5 / 98.0
    multiple = slope * levels + (1.5 - 2 * slope)
    return 1 - multiple if multiple > 1 else 0.0


class EqHistNorm(Normalize):
    """A histogram-equalised colour scale, fixed once made (see :func:`eq_hist_edges`).

    holoviews' own normaliser re-bins every array it is handed, so an image, its
    colour bar and its tick labels would each be equalised on other values; this
    one maps a value to the same colour wherever it is asked.
    """

    def __init__(self, edges, vmin, vmax):
        super().__init__(vmin=vmin, vmax=vmax, clip=False)
        self.edges = np.asarray(edges, dtype=np.float64)
        self.steps = np.linspace(0.0, 1.0, len(self.edges))

    def __call__(self, value, clip=None):
        scalar = np.isscalar(value)
        arr = np.asarray(np.ma.getdata(value), dtype=np.float64)
        mask = np.ma.getmaskarray(value) | ~np.isfinite(arr)
        out = np.ma.masked_array(np.interp(arr, self.edges, self.steps), mask=mask)
        return out[()] if scalar else out

    def inverse(self, value):
        return np.interp(np.asarray(value, dtype=np.float64), self.steps, self.edges)

    @property
    def lowest(self) -> float:
        """Where the smallest value sits on the scale (above 0 when few levels leave the low end unused)."""
        return float(np.interp(self.vmin, self.edges, self.steps))


def eq_hist_norm(values, vmin: float, vmax: float) -> EqHistNorm:
    """The equalised colour scale of ``values`` over ``[vmin, vmax]``, frozen."""
    return EqHistNorm(eq_hist_edges(values, vmin, vmax), vmin, vmax)


def value_range(arrays) -> tuple[float, float] | None:
    """The smallest and largest finite value over ``arrays`` (None when there is none)."""
    lo, hi = np.inf, -np.inf
    for a in arrays:
        v = np.asarray(a, dtype=np.float64)
        v = v[np.isfinite(v)]
        if v.size:
            lo, hi = min(lo, float(v.min())), max(hi, float(v.max()))
    return (lo, hi) if hi >= lo else None


def scale_norm(arrays, scaling: str, vrange=None):
    """One colour scale for the finite values of ``arrays``: (norm, (low, high)).

    ``vrange`` fixes the ends; by default they are the smallest and largest finite
    value (a one-value range is widened by one, as matplotlib would, but said).
    ``eq_hist`` equalises over every array pooled, then keeps that mapping.
    """
    from matplotlib.colors import LogNorm
    arrays = [np.asarray(a, dtype=np.float64) for a in arrays]
    ends = tuple(vrange) if vrange is not None else value_range(arrays)
    if ends is None:
        return Normalize(0.0, 1.0), (0.0, 1.0)
    lo, hi = float(ends[0]), float(ends[1])
    if hi <= lo:
        hi = lo + 1.0
    if scaling == "linear":
        return Normalize(lo, hi), (lo, hi)
    if scaling == "log":
        return LogNorm(lo, hi), (lo, hi)
    pooled = np.concatenate([a[np.isfinite(a)].ravel() for a in arrays]) if arrays else np.zeros(0)
    return eq_hist_norm(pooled, lo, hi), (lo, hi)
