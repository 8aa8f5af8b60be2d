"""Halo (ghost-layer) load: particles close enough to a shared block face to be exchanged.

A particle of block B is in B's halo when it lies within ``width_cells``
level-0 cells of a face of B and, at the particle's place on that face, the
other side belongs to a block. The other side is probed half a finest-level
cell beyond the face, so a face only partly covered by neighbours (mesh
refinement) counts only where it is covered. Periodic faces are shared (on an
axis crossed by a single block, with that block itself); domain faces on
non-periodic axes are not.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from ..core.layout import BlockLayout, _as_columns, assign_blocks


def halo_mask(positions, block_ids, layout: BlockLayout, width_cells: float = 1) -> np.ndarray:
    """True for each particle in its block's halo."""
    cols = _as_columns(positions)
    if len(cols) != layout.ndim:
        raise ValueError(f"{len(cols)} position axes for a {layout.ndim}-D layout")
    rows = layout.block_index(np.asarray(block_ids))
    n = rows.shape[0]
    if width_cells < 0:
        raise ValueError("width_cells must not be negative")
    inb = rows >= 0
    safe = np.where(inb, rows, 0)
    reach = float(width_cells) * layout.cell_size
    finest = int(layout.level.max(initial=0))
    probe_step = 0.5 * layout.cell_size / float(layout.ratio) ** finest
    halo = np.zeros(n, dtype=bool)
    for a in range(layout.ndim):
        c = cols[a]
        for side in (0, 1):
            face = (layout.lower if side == 0 else layout.upper)[safe, a]
            dist = (c - face) if side == 0 else (face - c)
            with np.errstate(invalid="ignore"):
                near = inb & ~halo & (dist < reach[a])
            idx = np.flatnonzero(near)
            if idx.size == 0:
                continue
            probe = [cols[b][idx].astype(np.float64) for b in range(layout.ndim)]
            probe[a] = face[idx] + (probe_step[a] if side else -probe_step[a])
            if layout.periodic[a]:
                lo, span = layout.domain_lower[a], layout.extent[a]
                probe[a] = lo + np.mod(probe[a] - lo, span)
            other = assign_blocks(probe, layout)
            halo[idx[other >= 0]] = True
    return halo


def halo_counts(positions, block_ids, layout: BlockLayout, width_cells: float = 1) -> pd.DataFrame:
    """Per block: particles (``count``) and those within ``width_cells`` of a shared face (``halo``).

    Every layout block gets a row; a ``-1`` row (halo 0) collects particles in no block.
    """
    rows = layout.block_index(np.asarray(block_ids))
    mask = halo_mask(positions, block_ids, layout, width_cells)
    shifted = rows + 1
    count = np.bincount(shifted, minlength=layout.nblocks + 1)
    halo = np.bincount(shifted[mask], minlength=layout.nblocks + 1)
    df = pd.DataFrame({"block": layout.block_id.astype(np.int64), "count": count[1:].astype(np.int64),
                       "halo": halo[1:].astype(np.int64)})
    if count[0]:
        df = pd.concat([df, pd.DataFrame({"block": [-1], "count": [int(count[0])], "halo": [0]})],
                       ignore_index=True)
    return df
