"""Density images and column ranges as accumulators: the one definition of every picture's numbers.

:class:`Image` bins particles onto a ``width`` x ``height`` pixel grid over
a canvas ``[x0, x1] x [y0, y1]``, and counts them (``count``), sums a value
column (``sum``) or averages it (``mean``). The binning rule is datashader's
points rule, kept exactly so an image equals ``datashader.Canvas.points`` on
the whole frame: with ``s = width / (x1 - x0)`` and ``t = -x0 * s`` a point
with ``x0 <= x <= x1`` falls in column ``int(x * s + t)``, and a point on the
top edge in the last column (the canvas is closed, as in numpy.histogram2d);
the same for ``y``. Points outside the canvas, or with a NaN or infinite
coordinate, are left out; rows with a NaN value are left out of a sum or
mean. An empty pixel is 0 in a count and NaN in a sum or mean.

Each piece's rows are added to the state's grids in row order (a compiled
loop, or numpy passes with ``numpy.add.at`` for small pieces), so the rows
folded into one state give exactly datashader's numbers on those rows, bit
for bit; ``merge`` adds the grids of two row ranges (an empty pixel of a sum
takes the other side's). Counts never depend on how rows were cut; sums and
means of a frame folded into several states differ from the one-state
answer by rounding only (the engine folds up to ``task_pieces`` pieces, 16 M
rows, into one state).

:class:`ColumnRanges` is the finite (min, max) and the non-finite count of
columns, what a view opens on when no range is given.
"""

from __future__ import annotations

import importlib.util
import math

import numpy as np

from ._colstats import finite_stats
from .accumulate import Accumulator

REDUCTIONS = ("count", "sum", "mean")

#: below this many rows a piece is binned with numpy (no compile, and fast enough)
MIN_VALUES = 200_000

available = importlib.util.find_spec("numba") is not None
_loops: dict = {}


def _make_loop(reduction: str, slab: bool, mask: bool, count_bad: bool = True):
    """The row loop of one reduction, with or without a slab and a mask (fixed when numba compiles).

    ``count_bad`` False: the coordinates are known to be finite, nothing to count.

    datashader's points rule and its sum and mean: a count adds 1; a sum's
    pixel starts NaN, takes its first non-NaN value and adds the next ones; a
    mean adds non-NaN values to a sum from 0 and counts them. Returns (rows
    kept with a non-finite coordinate, rows kept).
    """
    kind = REDUCTIONS.index(reduction)

    def loop(x, y, v, s, m, sx, tx, sy, ty, x0, x1, y0, y1, slo, shi, h, w, counts, sums):
        bad = 0
        kept = 0
        for i in range(x.shape[0]):
            if mask:
                if not m[i]:
                    continue
            if slab:
                si = s[i]
                if not (si >= slo and si < shi):
                    continue
            kept += 1
            a = x[i]
            b = y[i]
            # a - a is 0 for a finite value, NaN for NaN or infinity: counted without a branch
            # (a branch on the points off the canvas costs a third of the loop)
            if count_bad:
                bad += not ((a - a) + (b - b) == 0)
            if x0 <= a <= x1 and y0 <= b <= y1:
                xx = int(a * sx + tx)
                yy = int(b * sy + ty)
                if xx >= w:
                    xx = w - 1
                if yy >= h:
                    yy = h - 1
                if kind == 0:
                    counts[yy, xx] += 1
                else:
                    val = v[i]
                    if val <= 0 or val > 0:          # not NaN
                        if kind == 1:
                            got = sums[yy, xx]
                            if got <= 0 or got > 0:
                                sums[yy, xx] = got + val
                            else:
                                sums[yy, xx] = val
                        else:
                            sums[yy, xx] += val
                            counts[yy, xx] += 1
        return bad, kept
    return loop


def _loop(reduction: str, slab: bool, mask: bool, count_bad: bool, compiled: bool):
    """The loop for these options, compiled with numba (``compiled``) or as plain Python."""
    key = (reduction, slab, mask, count_bad, compiled)
    fn = _loops.get(key)
    if fn is None:
        fn = _make_loop(reduction, slab, mask, count_bad)
        if compiled:
            import numba
            fn = numba.njit(cache=True, nogil=True)(fn)
        _loops[key] = fn
    return fn


def _points_numpy(reduction, count_bad, x, y, v, s, m, sx, tx, sy, ty, x0, x1, y0, y1, slo, shi,
                  h, w, counts, sums):
    """What the loop does, in numpy passes: same bins, the same sums added in the same order.

    None when a sum meets an infinite value: +inf and -inf in one pixel make
    its running sum NaN, which the loop then restarts from the next value
    (as datashader's sum does); only the loop says what that gives.
    """
    # compared and scaled in float64, as the loop does (a float32 array against a Python float
    # would be compared in float32)
    keep = m
    if s is not None:
        s = s.astype(np.float64, copy=False)
        with np.errstate(invalid="ignore"):
            inside = (s >= slo) & (s < shi)
        keep = inside if keep is None else (keep & inside)
    if keep is not None:
        x, y = x[keep], y[keep]
        v = v[keep] if v is not None else None
    kept = int(x.shape[0])
    x = x.astype(np.float64, copy=False)
    y = y.astype(np.float64, copy=False)
    with np.errstate(invalid="ignore"):
        on = (x0 <= x) & (x <= x1) & (y0 <= y) & (y <= y1)
    bad = int(np.count_nonzero(~(np.isfinite(x) & np.isfinite(y)))) if count_bad else 0
    xx = (x[on] * sx + tx).astype(np.int64)
    yy = (y[on] * sy + ty).astype(np.int64)
    np.minimum(xx, w - 1, out=xx)
    np.minimum(yy, h - 1, out=yy)
    flat = yy * w + xx
    if reduction == "count":
        counts.reshape(-1)[:] += np.bincount(flat, minlength=h * w).astype(counts.dtype)
        return bad, kept
    val = v[on].astype(np.float64)
    ok = ~np.isnan(val)
    if not ok.all():
        flat, val = flat[ok], val[ok]
    grid = sums.reshape(-1)
    if reduction == "sum":
        if np.isinf(val).any():
            return None
        # a pixel still empty (NaN) takes its first value as it is: -0.0 + v is v bit for bit
        first = np.bincount(flat, minlength=h * w).astype(bool)
        first &= np.isnan(grid)
        grid[first] = -0.0
    else:
        counts.reshape(-1)[:] += np.bincount(flat, minlength=h * w).astype(counts.dtype)
    np.add.at(grid, flat, val)                       # in row order, as the loop adds
    return bad, kept


def _numeric(arr: np.ndarray, name: str) -> np.ndarray:
    if arr.dtype.kind == "b":
        return arr.view(np.uint8)
    if arr.dtype.kind not in "fiu":
        raise TypeError(f"column '{name}' is not numeric and cannot be binned")
    return arr


def scale_and_translate(lo: float, hi: float, n: int) -> tuple[float, float]:
    """(s, t) of ``pixel = value * s + t`` for ``n`` pixels over ``[lo, hi]`` (datashader's)."""
    s = n / (hi - lo)
    return s, -lo * s


def pixel_centres(lo: float, hi: float, n: int) -> np.ndarray:
    """The centre of each of ``n`` pixels over ``[lo, hi]``, computed as datashader labels them."""
    s, t = scale_and_translate(lo, hi, n)
    return (np.arange(n) + 0.5 - t) / s


class Image(Accumulator):
    """Particles binned on a pixel grid: a count, or the sum or mean of column ``value``.

    ``x``/``y`` name the columns on the axes, ``x_range``/``y_range`` the
    (closed) canvas. ``slab=(column, lo, hi)`` keeps only rows with
    ``lo <= column < hi``; ``mask`` is a boolean array over the frame's rows
    (a selection), indexed by each piece's row offset. ``finish`` gives an
    ``xarray.DataArray`` of shape (height, width), dims ``(y, x)`` (``_y``,
    ``_x`` when both axes are one column) with pixel-centre coordinates and
    ``attrs`` ``nonfinite`` (kept rows with a non-finite coordinate),
    ``particles`` (kept rows with finite coordinates, inside the canvas or
    not), ``x_range`` and ``y_range``. ``finite=True`` says the caller knows
    both columns hold no NaN or infinite value (from their
    :class:`ColumnRanges`): the loop then has nothing to count (an eighth
    of its time).
    """

    reads_once = True
    #: 16 M rows (64 pieces) per state: a fresh grid and a merge cost about what binning a few
    #: million rows does, so a frame of up to 16 M rows is folded into one grid in row order
    task_pieces = 64

    def __init__(self, x: str, y: str, *, width: int, height: int, x_range, y_range,
                 reduction: str = "count", value: str | None = None, slab=None, mask=None,
                 finite: bool = False):
        if reduction not in REDUCTIONS:
            raise ValueError(f"reduction takes one of {', '.join(REDUCTIONS)}, got '{reduction}'")
        if reduction != "count" and not value:
            raise ValueError(f"reduction '{reduction}' needs a value column")
        self.width, self.height = int(width), int(height)
        if self.width < 1 or self.height < 1:
            raise ValueError("an image needs at least one pixel each way")
        self.x, self.y = x, y
        self.x_range = (float(x_range[0]), float(x_range[1]))
        self.y_range = (float(y_range[0]), float(y_range[1]))
        for lo, hi in (self.x_range, self.y_range):
            if not (math.isfinite(lo) and math.isfinite(hi) and hi > lo):
                raise ValueError(f"a canvas range needs two finite numbers, low below high; got {(lo, hi)}")
        self.reduction = reduction
        self.value = value if reduction != "count" else None
        self.slab = None if slab is None else (slab[0], float(slab[1]), float(slab[2]))
        self.mask = None if mask is None else np.asarray(mask, dtype=bool)
        self.finite = bool(finite)
        cols = [x, y, self.value, self.slab[0] if self.slab else None]
        self.columns = tuple(dict.fromkeys(c for c in cols if c))

    def start(self):
        shape = (self.height, self.width)
        state = {"nonfinite": 0, "kept": 0}
        if self.reduction != "sum":
            state["counts"] = np.zeros(shape, np.uint32)
        if self.reduction == "sum":
            state["sums"] = np.full(shape, np.nan)        # NaN: no value yet
        elif self.reduction == "mean":
            state["sums"] = np.zeros(shape)
        return state

    def add(self, state, piece):
        n = len(piece)
        if n == 0:
            return state
        x = _numeric(piece[self.x], self.x)
        y = _numeric(piece[self.y], self.y)
        v = _numeric(piece[self.value], self.value) if self.value is not None else None
        s = _numeric(piece[self.slab[0]], self.slab[0]) if self.slab is not None else None
        slo, shi = (self.slab[1], self.slab[2]) if self.slab is not None else (0.0, 0.0)
        m = None
        if self.mask is not None:
            m = self.mask[piece.start:piece.stop]
            if m.shape != (n,):
                raise ValueError(f"the selection mask has {self.mask.size} rows, fewer than the frame")
        sx, tx = scale_and_translate(*self.x_range, self.width)
        sy, ty = scale_and_translate(*self.y_range, self.height)
        counts = state.get("counts", _EMPTY2U)
        sums = state.get("sums", _EMPTY2)
        args = (sx, tx, sy, ty, self.x_range[0], self.x_range[1], self.y_range[0], self.y_range[1],
                slo, shi, self.height, self.width, counts, sums)
        got = None
        key = (self.reduction, s is not None, m is not None, not self.finite, available)
        if not available or (n < MIN_VALUES and key not in _loops):
            # a small piece is not worth numba's import and compile; once compiled, the loop
            # takes every piece (both give the same numbers)
            got = _points_numpy(self.reduction, not self.finite, x, y, v, s, m, *args)
        if got is None:
            loop = _loop(*key)
            with np.errstate(invalid="ignore", over="ignore"):   # plain Python: inf - inf, as numba
                got = loop(x, y, _EMPTY if v is None else v, _EMPTY if s is None else s,
                           _EMPTY_MASK if m is None else m, *args)
        state["nonfinite"] += int(got[0])
        state["kept"] += int(got[1])
        return state

    def merge(self, a, b):
        if "counts" in a:
            a["counts"] += b["counts"]
        if self.reduction == "sum":
            # NaN is an empty pixel: it takes the other side's sum as it is
            sa, sb = a["sums"], b["sums"]
            empty_a = np.isnan(sa)
            np.add(sa, sb, out=sa, where=~(empty_a | np.isnan(sb)))
            np.copyto(sa, sb, where=empty_a)
        elif self.reduction == "mean":
            a["sums"] += b["sums"]
        a["nonfinite"] += b["nonfinite"]
        a["kept"] += b["kept"]
        return a

    def finish(self, state):
        import xarray as xr
        if self.reduction == "count":
            values = state["counts"]
        elif self.reduction == "sum":
            values = state["sums"]
        else:
            counts = state["counts"]
            with np.errstate(divide="ignore", invalid="ignore"):
                values = np.where(counts > 0, state["sums"] / counts, np.nan)
        xdim, ydim = (self.x, self.y) if self.x != self.y else ("_x", "_y")
        coords = {xdim: pixel_centres(*self.x_range, self.width),
                  ydim: pixel_centres(*self.y_range, self.height)}
        return xr.DataArray(values, coords=coords, dims=[ydim, xdim], attrs={
            "nonfinite": int(state["nonfinite"]),
            "particles": int(state["kept"]) - int(state["nonfinite"]),
            "x_range": self.x_range, "y_range": self.y_range})


_EMPTY = np.empty(0)
_EMPTY_MASK = np.empty(0, dtype=bool)
_EMPTY2 = np.empty((0, 0))
_EMPTY2U = np.empty((0, 0), dtype=np.uint32)


class ColumnRanges(Accumulator):
    """Finite (min, max) and the count of NaN or infinite values of each column in ``columns``.

    ``finish`` gives ``{column: (min, max, nonfinite)}``; min and max are
    None when a column has no finite value.
    """

    reads_once = True

    def __init__(self, columns):
        self.columns = tuple(dict.fromkeys(columns))

    def start(self):
        return {c: (None, None, 0) for c in self.columns}

    def add(self, state, piece):
        if len(piece) == 0:
            return state
        got = {c: finite_stats(piece[c]) for c in self.columns}
        return self.merge(state, got)

    def merge(self, a, b):
        out = {}
        for c in self.columns:
            lo_a, hi_a, bad_a = a[c]
            lo_b, hi_b, bad_b = b[c]
            if lo_a is None:
                lo, hi = lo_b, hi_b
            elif lo_b is None:
                lo, hi = lo_a, hi_a
            else:
                lo, hi = min(lo_a, lo_b), max(hi_a, hi_b)
            out[c] = (lo, hi, bad_a + bad_b)
        return out
