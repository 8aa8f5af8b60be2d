"""Halo counts against a brute-force distance computation with plain numpy.

The brute force cuts the domain along every block edge into elementary boxes, gives each box
to the highest-level block containing its centre (a particle's block, by the layout rule),
and measures the Chebyshev distance from every particle to every elementary box and each of
its periodic images (the minimum image on periodic axes). A particle is in its block's halo
when a box owned by another block, or by its own block across a periodic face, is closer than
the halo width. It shares no code with the module under test.
"""

import itertools

import numpy as np
import pytest

from swarmaudit.core.layout import BlockLayout, assign_blocks, regular_layout
from swarmaudit.diagnostics.halo import halo_counts


def _elementary_boxes(layout):
    d = layout.ndim
    edges = [np.unique(np.concatenate([layout.lower[:, a], layout.upper[:, a]])) for a in range(d)]
    lo, hi, owner = [], [], []
    for idx in itertools.product(*[range(len(e) - 1) for e in edges]):
        a = np.array([edges[k][i] for k, i in enumerate(idx)])
        b = np.array([edges[k][i + 1] for k, i in enumerate(idx)])
        mid = 0.5 * (a + b)
        inside = np.all((layout.lower <= mid) & (mid < layout.upper), axis=1)
        if not inside.any():
            continue                                   # space in no block needs nothing
        best = np.flatnonzero(inside)[np.argmax(layout.level[inside])]
        lo.append(a)
        hi.append(b)
        owner.append(best)
    return np.array(lo), np.array(hi), np.array(owner)


def _brute_force(pts, blocks, layout, width_cells):
    r = width_cells * layout.cell_size
    rows = layout.block_index(blocks)
    lo, hi, owner = _elementary_boxes(layout)
    shifts = [(-1, 0, 1) if layout.periodic[a] else (0,) for a in range(layout.ndim)]
    halo = np.zeros(len(pts), dtype=bool)
    for s in itertools.product(*shifts):
        off = np.array(s) * layout.extent
        # Chebyshev distance, in units of the width per axis, from each particle to each box
        gap = np.maximum(np.maximum((lo + off)[None] - pts[:, None], pts[:, None] - (hi + off)[None]), 0.0)
        close = np.all(gap < r, axis=2)
        if not any(s):
            close &= owner[None] != rows[:, None]      # a block does not need its own particles
        halo |= close.any(axis=1)
    halo &= rows >= 0
    return np.bincount(rows[halo], minlength=layout.nblocks)


def _halo_as_brute_force(pts, lay, width):
    """halo_counts of ``pts`` in ``lay``, asserted equal to the brute-force count; returns the table."""
    b = assign_blocks(pts, lay)
    got = halo_counts(pts, b, lay, width_cells=width)
    np.testing.assert_array_equal(got["halo"].to_numpy(), _brute_force(pts, b, lay, width))
    return got


def _nested_layout(periodic, d=2):
    """4×4 (×4) coarse blocks over [0, 1)^d, 16 cells a side; level-1 blocks, one across two
    coarse blocks, and a level-2 block inside a level-1 one; two ranks."""
    coarse = regular_layout([0, 1] * d, [16] * d, [4] * d, periodic=periodic)
    lower, upper = list(coarse.lower), list(coarse.upper)
    level = [0] * coarse.nblocks
    fine = [([0.3125, 0.25, 0.25], [0.5625, 0.5, 0.5], 1),     # straddles two coarse blocks
            ([0.0, 0.75, 0.0], [0.125, 1.0, 0.25], 1),          # on the domain's faces
            ([0.75, 0.0, 0.75], [1.0, 0.25, 1.0], 1),
            ([0.375, 0.3125, 0.3125], [0.4375, 0.375, 0.375], 2)]
    for lo, up, lev in fine:
        lower.append(lo[:d])
        upper.append(up[:d])
        level.append(lev)
    n = len(level)
    return BlockLayout(lower, upper, level, np.arange(n) % 2, [0] * d, [1] * d, [16] * d, periodic)


@pytest.mark.parametrize("periodic", [(), ("x",), ("x", "y")])
@pytest.mark.parametrize("width", [0.5, 1, 2.5])
def test_nested_layout_matches_brute_force(periodic, width):
    lay = _nested_layout(periodic)
    lay.validate()
    rng = np.random.default_rng(len(periodic) + int(10 * width))
    pts = rng.random((3000, 2))
    got = _halo_as_brute_force(pts, lay, width)
    assert 0 < got["halo"].sum() and (width > 2 or got["halo"].sum() < len(pts))


@pytest.mark.parametrize("periodic", [(), ("x", "y", "z")])
def test_nested_3d_layout_matches_brute_force(periodic):
    lay = _nested_layout(periodic, d=3)
    rng = np.random.default_rng(9)
    pts = rng.random((800, 3))
    got = _halo_as_brute_force(pts, lay, 1)


def test_a_coarse_particle_near_a_refined_block_inside_its_block():
    # one coarse block [0, 1)² of 10 cells and a refined block [0.3, 0.7)² inside it: a coarse
    # particle 0.4 cell from the refined block's face is a ghost the refined block needs, and
    # the refined block's particle 0.4 cell inside its face is one the coarse block needs
    lay = BlockLayout([[0, 0], [0.3, 0.3]], [[1, 1], [0.7, 0.7]], [0, 1], [0, 1], [0, 0], [1, 1],
                      [10, 10], ())
    pts = np.array([[0.26, 0.5], [0.34, 0.5], [0.5, 0.5], [0.05, 0.05]])
    b = assign_blocks(pts, lay)
    assert b.tolist() == [0, 1, 1, 0]
    got = halo_counts(pts, b, lay, width_cells=1)
    assert got["halo"].tolist() == [1, 1]
    np.testing.assert_array_equal(got["halo"].to_numpy(), _brute_force(pts, b, lay, 1))


@pytest.mark.parametrize("periodic", [(), ("x",), ("x", "y")])
@pytest.mark.parametrize("width", [1, 2])
def test_regular_layout_matches_brute_force(periodic, width):
    rng = np.random.default_rng(4)
    lay = regular_layout([0, 2, 0, 1], [16, 8], [4, 2], periodic=periodic)
    pts = rng.random((3000, 2)) * [2, 1]
    b = assign_blocks(pts, lay)
    got = halo_counts(pts, b, lay, width_cells=width)
    assert list(got.columns) == ["block", "count", "halo"]
    np.testing.assert_array_equal(got["halo"].to_numpy(), _brute_force(pts, b, lay, width))
    np.testing.assert_array_equal(got["count"].to_numpy(), np.bincount(b, minlength=8))


def test_uneven_tiling_with_partly_shared_faces():
    # a coarse left half and four finer blocks on the right: faces are only partly shared
    lower = [[0, 0], [0.5, 0], [0.75, 0], [0.5, 0.5], [0.75, 0.5]]
    upper = [[0.5, 1], [0.75, 0.5], [1, 0.5], [0.75, 1], [1, 1]]
    lay = BlockLayout(lower, upper, 0, [0, 1, 1, 2, 2], [0, 0], [1, 1], [16, 16], (True, False))
    rng = np.random.default_rng(2)
    pts = rng.random((4000, 2))
    got = _halo_as_brute_force(pts, lay, 1.5)


def test_single_block_on_a_periodic_axis_is_its_own_neighbour():
    lay = regular_layout([0, 1, 0, 1], [10, 10], [1, 1], periodic=("x",))
    pts = np.array([[0.05, 0.5], [0.95, 0.5], [0.5, 0.05], [0.5, 0.5]])
    got = halo_counts(pts, assign_blocks(pts, lay), lay)
    # x faces wrap onto the block itself; the y faces are the domain wall
    assert got["halo"].tolist() == [2]


def test_particles_in_no_block_get_their_own_row():
    lay = regular_layout([0, 1], [4], [2])
    x = np.array([0.1, 0.49, 3.0])
    got = halo_counts([x], assign_blocks([x], lay), lay)
    assert got["block"].tolist() == [0, 1, -1]
    assert got["halo"].tolist() == [1, 0, 0]
    assert got["count"].tolist() == [2, 0, 1]


@pytest.mark.parametrize("where", ["serial", "threads", "dask"])
def test_halo_accumulator_in_pieces_matches_brute_force(where, monkeypatch):
    # the per-snapshot halo table runs the accumulator through the one runner; cut into many
    # pieces on any engine it counts what the brute force counts on the whole snapshot
    from swarmaudit.core.frame import Frame
    from swarmaudit.diagnostics.halo import Halo
    from swarmaudit.engine import pieces
    from swarmaudit.engine.reduce import reduce
    monkeypatch.setattr(pieces, "PIECE_ROWS", 256)
    lay = _nested_layout(("x",))
    rng = np.random.default_rng(21)
    pts = rng.random((3000, 2))
    frame = Frame("e", 3000, {"x": lambda: pts[:, 0].copy(), "y": lambda: pts[:, 1].copy()})
    got = reduce(Halo(lay, ("x", "y"), 1.5), frame, where=where)
    b = assign_blocks(pts, lay)
    np.testing.assert_array_equal(got["halo"].to_numpy(), _brute_force(pts, b, lay, 1.5))
    np.testing.assert_array_equal(got["count"].to_numpy(), np.bincount(lay.block_index(b), minlength=lay.nblocks))
