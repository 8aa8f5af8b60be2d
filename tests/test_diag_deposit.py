"""Particle shapes and deposition."""

import itertools

import numpy as np
import pytest

from swarmaudit.core.layout import regular_layout
from swarmaudit.diagnostics.deposit import deposit, shape_weights


def _hockney_eastwood(x, order):
    """Outside source: assignment functions W(x) of Hockney & Eastwood, Computer Simulation Using
    Particles (from memory), x = distance from a cell centre in cells."""
    x = np.abs(x)
    if order == "ngp":
        return np.where(x < 0.5, 1.0, 0.0)
    if order == "cic":
        return np.where(x < 1.0, 1.0 - x, 0.0)
    return np.where(x <= 0.5, 0.75 - x * x, np.where(x < 1.5, 0.5 * (1.5 - x) ** 2, 0.0))


@pytest.mark.parametrize("order", ["ngp", "cic", "tsc"])
def test_shape_weights_match_the_book_and_sum_to_one(order):
    frac = np.linspace(0.0, 1.0, 41, endpoint=False)[1:]   # away from the NGP tie at ½
    shift, w = shape_weights(frac, order)
    np.testing.assert_allclose(w.sum(axis=1), 1.0, atol=1e-15)
    for k in range(w.shape[1]):
        centre = shift + k + 0.5                  # centre of the k-th stencil cell, relative to the own cell
        np.testing.assert_allclose(w[:, k], _hockney_eastwood(frac - centre, order), atol=1e-15)
    # cells the stencil leaves out get no weight from the book either
    for c in (-2, 2):
        outside = _hockney_eastwood(frac - (c + 0.5), order)
        inside_stencil = (c >= shift) & (c < shift + w.shape[1])
        assert np.all(outside[~inside_stencil] == 0)


def test_ngp_deposit_equals_histogramdd():
    rng = np.random.default_rng(0)
    lay = regular_layout([0, 2, -1, 1, 0, 1], [8, 6, 5], [1, 1, 1])
    pts = rng.random((4000, 3)) * [2, 2, 1] + [0, -1, 0]
    w = rng.random(4000)
    got = deposit(pts, w, lay, order="ngp")
    # outside source: numpy.histogramdd on the level-0 cell edges
    edges = [np.linspace(lay.domain_lower[a], lay.domain_upper[a], lay.cells[a] + 1) for a in range(3)]
    ref, _ = np.histogramdd(pts, bins=edges, weights=w)
    np.testing.assert_allclose(got, ref, rtol=1e-12)


@pytest.mark.parametrize("order", ["cic", "tsc"])
@pytest.mark.parametrize("periodic", [(), ("x", "y")])
def test_totals_are_conserved(order, periodic):
    rng = np.random.default_rng(1)
    lay = regular_layout([0, 1, 0, 1], [16, 12], [1, 1], periodic=periodic)
    pts = rng.uniform(-0.1, 1.1, (3000, 2))      # some outside: wrapped or clamped
    w = rng.random(3000)
    grid = deposit(pts, w, lay, order=order)
    assert grid.shape == (16, 12)
    assert grid.sum() == pytest.approx(w.sum(), rel=1e-12)


def test_periodic_wrap_and_clamp_and_drop():
    lay = regular_layout([0, 1], [4], [1], periodic=("x",))
    # a particle at the centre of cell 0 under TSC: 3/4 in cell 0, 1/8 in cells 1 and (wrapped) 3
    g = deposit([np.array([0.125])], 1.0, lay, order="tsc")
    np.testing.assert_allclose(g, [0.75, 0.125, 0.0, 0.125])
    wall = regular_layout([0, 1], [4], [1])
    g = deposit([np.array([0.125])], 1.0, wall, order="tsc")
    np.testing.assert_allclose(g, [0.875, 0.125, 0.0, 0.0])           # clamped into the edge cell
    g = deposit([np.array([0.125])], 1.0, wall, order="tsc", outside="drop")
    np.testing.assert_allclose(g, [0.75, 0.125, 0.0, 0.0])


def test_cic_by_hand_and_nan_positions_skipped():
    lay = regular_layout([0, 4, 0, 4], [4, 4], [1, 1])
    x = np.array([1.75, np.nan])
    y = np.array([2.5, 1.0])
    g = deposit([x, y], np.array([2.0, 5.0]), lay, order="cic")
    # by hand: x = 1.75 is ¾ of the way from centre 1.5 towards centre 2.5 -> 0.75/0.25 split;
    # y = 2.5 sits on the centre of cell 2
    expect = np.zeros((4, 4))
    expect[1, 2], expect[2, 2] = 2 * 0.75, 2 * 0.25
    np.testing.assert_allclose(g, expect)


def _brute_force(pts, w, lay, order, outside="clamp"):
    """Outside reference: each particle in turn, its weight spread by the book's assignment
    function (Hockney & Eastwood; Birdsall & Langdon, Plasma Physics via Computer Simulation,
    from memory) over every cell within reach; a periodic axis wraps the cell index, a wall clamps
    a cell beyond it into the edge cell (or drops it)."""
    lay_lo = np.asarray(lay.domain_lower, dtype=np.float64)
    h = np.asarray(lay.cell_size, dtype=np.float64)
    cells = [int(c) for c in lay.cells]
    d = len(cells)
    grid = np.zeros(cells)
    reach = {"ngp": 0, "cic": 1, "tsc": 2}[order]
    for p in range(len(w)):
        pos = (np.asarray(pts[p], dtype=np.float64) - lay_lo) / h      # in cells
        if not np.all(np.isfinite(pos)) or not np.isfinite(w[p]):
            continue
        own = np.floor(pos).astype(int)
        axes = []
        for a in range(d):
            if lay.periodic[a]:
                pos_a = pos[a] - cells[a] * np.floor(pos[a] / cells[a])   # back in the box
                own_a = int(np.floor(pos_a))
            else:
                pos_a, own_a = pos[a], own[a]
            got = []
            for c in range(own_a - reach, own_a + reach + 1):
                off = pos_a - (c + 0.5)
                if order == "ngp":     # a point on a cell edge: the tie goes to the half-open cell
                    wt = 1.0 if -0.5 <= off < 0.5 else 0.0
                else:
                    wt = float(_hockney_eastwood(np.array([off]), order)[0])
                if wt == 0.0:
                    continue
                if lay.periodic[a]:
                    c %= cells[a]
                elif c < 0 or c >= cells[a]:
                    if outside == "drop":
                        continue
                    c = min(max(c, 0), cells[a] - 1)
                got.append((c, wt))
            axes.append(got)
        for combo in itertools.product(*axes):
            idx = tuple(c for c, _ in combo)
            grid[idx] += w[p] * np.prod([wt for _, wt in combo])
    return grid


@pytest.mark.parametrize("order", ["ngp", "cic", "tsc"])
@pytest.mark.parametrize("periodic", [(), ("x",), ("x", "y")])
@pytest.mark.parametrize("outside", ["clamp", "drop"])
def test_deposit_equals_the_particle_by_particle_book_loop(order, periodic, outside):
    rng = np.random.default_rng(7)
    lay = regular_layout([0, 2, -1, 1], [8, 6], [1, 1], periodic=periodic)
    n = 600
    pts = np.column_stack([rng.uniform(-0.4, 2.4, n), rng.uniform(-1.3, 1.3, n)])   # some outside
    # on cell edges in y (y = 0 is one), near them in x
    pts[:20] = [[0.25 * k + 0.01, 0.0] for k in range(20)]
    pts[20, 0] = np.nan
    w = rng.uniform(0.5, 2.0, n)
    w[21] = np.nan
    got = deposit(pts, w, lay, order=order, outside=outside)
    np.testing.assert_allclose(got, _brute_force(pts, w, lay, order, outside), rtol=1e-12, atol=1e-12)


def _frame_of(pts, w, parts):
    from swarmaudit.core.frame import Frame, concat_frames
    cuts = [0, *parts, len(w)]
    frames = [Frame("e", hi - lo, {"x": (lambda a=pts[lo:hi, 0]: a), "y": (lambda a=pts[lo:hi, 1]: a),
                                   "weight": (lambda a=w[lo:hi]: a)})
              for lo, hi in zip(cuts[:-1], cuts[1:])]
    return concat_frames(frames, species="e") if parts else frames[0]


@pytest.mark.parametrize("where", ["serial", "threads", "dask"])
@pytest.mark.parametrize("order", ["ngp", "cic", "tsc"])
def test_pieces_merged_equal_the_whole_array_deposit(where, order, monkeypatch):
    from swarmaudit.diagnostics.deposit import Deposit
    from swarmaudit.engine import pieces
    from swarmaudit.engine.reduce import reduce
    monkeypatch.setattr(pieces, "PIECE_ROWS", 700)
    rng = np.random.default_rng(3)
    lay = regular_layout([0, 1, 0, 1], [16, 12], [2, 2], periodic=("y",))
    n = 9000
    pts = rng.uniform(-0.1, 1.1, (n, 2))
    w = rng.uniform(0.1, 3.0, n)
    frame = _frame_of(pts, w, [2500, 2500, 6100])          # per-rank parts, one of them empty
    frame["x"], frame["y"], frame["weight"]                # held: cut into pieces of 700 rows
    acc = Deposit.of_frame(frame, lay, order=order)
    assert acc.columns == ("x", "y", "weight")
    got = reduce(acc, frame, where=where)
    whole = deposit(pts, w, lay, order=order)
    np.testing.assert_allclose(got, whole, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(got, _brute_force(pts, w, lay, order), rtol=1e-12, atol=1e-12)
    assert got.sum() == pytest.approx(w.sum(), rel=1e-12)          # clamped and wrapped: all of it
    # a species weight (one number) multiplies the mesh of shapes once
    from swarmaudit.core.frame import Frame
    bare = Frame("e", n, {"x": lambda: pts[:, 0], "y": lambda: pts[:, 1]}, attrs={"weight": 2.5})
    np.testing.assert_allclose(reduce(Deposit.of_frame(bare, lay, order=order), bare, where=where),
                               2.5 * deposit(pts, 1.0, lay, order=order), rtol=1e-12)
