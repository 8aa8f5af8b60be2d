"""Block decompositions of the demo runs and the two ways they are stored.

A demo layout is a regular grid of level-0 blocks plus a few level-1 blocks
(refinement ratio 2) on top; ranks own blocks. The layout goes into every
HDF5 file as a ``blocks`` group, or next to CSV snapshots as ``layout.csv``.
"""

from __future__ import annotations

import numpy as np

from ..core.layout import BlockLayout, assign_blocks, regular_layout
from ..core.roles import AXES


def demo_layout(domain, cells, blocks, rank_of_block, refined=(), refined_ranks=(), periodic=()) -> BlockLayout:
    """Level-0 ``blocks`` over ``domain`` plus level-1 boxes ``refined``.

    ``rank_of_block`` maps the level-0 block indices ``(ix, iy)`` (arrays) to
    ranks; ``refined`` holds level-1 boxes ``(lower, upper)`` in physical
    units, which must sit on level-1 cell edges.
    """
    base = regular_layout(domain, cells, blocks, periodic=periodic)
    nb = np.asarray(blocks)
    idx = np.indices(nb[::-1]).reshape(len(nb), -1)[::-1]       # x fastest, like the block ids
    rank = np.asarray(rank_of_block(*idx), dtype=np.int64)
    lower = [base.lower] + [np.asarray(lo, dtype=np.float64)[None, :] for lo, _ in refined]
    upper = [base.upper] + [np.asarray(hi, dtype=np.float64)[None, :] for _, hi in refined]
    level = np.concatenate([np.zeros(base.nblocks, np.int64), np.ones(len(refined), np.int64)])
    rank = np.concatenate([rank, np.asarray(refined_ranks, dtype=np.int64)])
    lay = BlockLayout(np.concatenate(lower), np.concatenate(upper), level, rank,
                      base.domain_lower, base.domain_upper, base.cells, base.periodic,
                      regular=base.regular if not refined else None, source="demo")
    lay.validate()
    return lay


def with_ranks(layout: BlockLayout, rank) -> BlockLayout:
    """The same blocks with other owners."""
    return BlockLayout(layout.lower, layout.upper, layout.level, np.asarray(rank, dtype=np.int64),
                       layout.domain_lower, layout.domain_upper, layout.cells, layout.periodic,
                       block_id=layout.block_id, ratio=layout.ratio, regular=layout.regular,
                       source=layout.source)


def balance_ranks(load, nranks: int) -> np.ndarray:
    """Owner of each block so that the ranks' loads come out even.

    Greedy longest-processing-time-first: the heaviest block not yet placed
    goes to the least loaded rank (a loop over blocks, never particles).
    """
    load = np.asarray(load, dtype=np.float64)
    owner = np.empty(load.shape[0], dtype=np.int64)
    totals = np.zeros(nranks)
    for b in np.argsort(-load, kind="stable"):
        r = int(np.argmin(totals))
        owner[b] = r
        totals[r] += load[b]
    return owner


def particle_ranks(positions, layout: BlockLayout):
    """(block id, owner rank) of every particle; a particle in no block goes to rank 0."""
    block = assign_blocks(positions, layout)
    row = layout.block_index(block)
    rank = np.where(row >= 0, layout.rank[np.clip(row, 0, None)], 0)
    return block, rank


def split_by_rank(rank: np.ndarray, nranks: int) -> list[np.ndarray]:
    """Particle indices of each rank, ascending within a rank."""
    order = np.argsort(rank, kind="stable")
    bounds = np.concatenate([[0], np.cumsum(np.bincount(rank, minlength=nranks))])
    return [order[bounds[r]:bounds[r + 1]] for r in range(nranks)]


def write_blocks_group(h5file, layout: BlockLayout) -> None:
    """The layout as the ``blocks`` group of an open, writable h5py file."""
    g = h5file.create_group("blocks")
    g.create_dataset("lower", data=layout.lower)
    g.create_dataset("upper", data=layout.upper)
    g.create_dataset("level", data=layout.level.astype(np.int32))
    g.create_dataset("rank", data=layout.rank.astype(np.int32))
    g.attrs["domain_lower"] = layout.domain_lower
    g.attrs["domain_upper"] = layout.domain_upper
    g.attrs["cells"] = layout.cells.astype(np.int64)
    g.attrs["periodic"] = ",".join(a for a, p in zip(layout.axes, layout.periodic) if p)


def write_layout_csv(path: str, layout: BlockLayout) -> None:
    """The layout as a CSV sidecar with ``# domain``, ``# cells``, ``# periodic`` lines."""
    d = layout.ndim
    dom = ",".join(f"{float(lo)!r},{float(hi)!r}" for lo, hi in zip(layout.domain_lower, layout.domain_upper))
    lines = [f"# domain = {dom}",
             "# cells = " + ",".join(str(int(c)) for c in layout.cells),
             "# periodic = " + ",".join(a for a, p in zip(layout.axes, layout.periodic) if p),
             ",".join(["block", "level", "rank"] + [f"{a}_{s}" for a in AXES[:d] for s in ("lo", "hi")])]
    for b in range(layout.nblocks):
        bounds = [repr(float(v)) for a in range(d) for v in (layout.lower[b, a], layout.upper[b, a])]
        lines.append(",".join([str(int(layout.block_id[b])), str(int(layout.level[b])),
                               str(int(layout.rank[b]))] + bounds))
    with open(path, "w", encoding="utf-8") as fh:
        fh.write("\n".join(lines) + "\n")
