"""Data health of one frame: what is usable but suspicious (vectorised; reads the columns it needs).

Opening a snapshot only notes what is free to see (an empty species); these counts need the
position, momentum and key columns, so ``inspect`` asks for them explicitly.
"""

from __future__ import annotations

import numpy as np

from ..core.layout import nonfinite_rows as _nonfinite_rows


def duplicate_count(cols: list[np.ndarray]) -> int:
    """Particles whose key repeats an earlier particle's: n minus the number of distinct keys."""
    n = cols[0].shape[0] if cols else 0
    if n < 2:
        return 0
    order = np.lexsort(cols[::-1])
    same = np.ones(n - 1, dtype=bool)
    for c in cols:
        s = c[order]
        same &= s[1:] == s[:-1]
    return int(np.count_nonzero(same))


def frame_health(frame, layout=None) -> dict:
    """Counts of non-finite positions and momenta, particles outside the domain, duplicate keys.

    ``outside_domain`` counts finite positions outside ``[domain_lower, domain_upper)`` on the
    axes the layout has (None without a layout); ``duplicate_keys`` is None when the frame has no
    key columns (no id).
    """
    n = frame.length
    pos_names = frame.position_names
    pos = [np.asarray(frame[c]) for c in pos_names]
    bad_pos = _nonfinite_rows(pos, n)
    mom = [np.asarray(frame[c]) for c in frame.momentum_names()]
    out = {
        "species": frame.species,
        "particles": n,
        "position_columns": pos_names,
        "nonfinite_positions": int(np.count_nonzero(bad_pos)),
        "nonfinite_momenta": int(np.count_nonzero(_nonfinite_rows(mom, n))),
        "outside_domain": None,
        "key": None,
        "duplicate_keys": None,
    }
    if layout is not None and pos:
        d = min(len(pos), layout.ndim)
        outside = np.zeros(n, dtype=bool)
        for a in range(d):
            with np.errstate(invalid="ignore"):
                outside |= (pos[a] < layout.domain_lower[a]) | (pos[a] >= layout.domain_upper[a])
        out["outside_domain"] = int(np.count_nonzero(outside & ~bad_pos))
    key = frame.key_columns()
    if key:
        out["key"] = list(key)
        out["duplicate_keys"] = duplicate_count([np.asarray(frame[c]) for c in key])
    return out
