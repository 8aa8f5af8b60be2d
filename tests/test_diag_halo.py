"""Halo counts against a brute-force overlap test with plain numpy."""

import itertools

import numpy as np
import pytest

from swarmaudit.core.layout import BlockLayout, assign_blocks, regular_layout
from swarmaudit.diagnostics.halo import halo_counts


def _brute_force(pts, blocks, layout, width_cells):
    """Outside check, plain numpy: a particle is in the halo when the open box of half-width
    ``width_cells`` cells around it reaches into another block (or a periodic image of any
    block, its own included). On a tiling without nested blocks that is the same as being within
    that distance of a shared face; it loops over blocks and images, not over faces."""
    d = layout.ndim
    r = width_cells * layout.cell_size
    rows = layout.block_index(blocks)
    shifts = [(-1, 0, 1) if layout.periodic[a] else (0,) for a in range(d)]
    halo = np.zeros(len(pts), dtype=bool)
    for other in range(layout.nblocks):
        for s in itertools.product(*shifts):
            off = np.array(s) * layout.extent
            unshifted = not any(s)
            lo = layout.lower[other] + off
            hi = layout.upper[other] + off
            reach = np.all((pts - r < hi) & (pts + r > lo), axis=1)
            if unshifted:   # a block is not its own neighbour, except through a periodic image
                reach &= rows != other
            halo |= reach & (rows >= 0)
    return np.bincount(rows[halo], minlength=layout.nblocks)


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
    b = assign_blocks(pts, lay)
    got = halo_counts(pts, b, lay, width_cells=1.5)
    np.testing.assert_array_equal(got["halo"].to_numpy(), _brute_force(pts, b, lay, 1.5))


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
