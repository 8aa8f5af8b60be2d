"""Data health of one frame: what is usable but suspicious (vectorised; reads the columns it needs).

Opening a snapshot only notes what is free to see (an empty species); these counts need the
position, momentum and key columns, so ``inspect`` asks for them explicitly.
"""

from __future__ import annotations

from contextlib import ExitStack

import numpy as np

from ..core.layout import nonfinite_rows as _nonfinite_rows


def duplicate_count(cols: list[np.ndarray]) -> int:
    """Particles whose key repeats an earlier particle's: n minus the number of distinct keys."""
    n = cols[0].shape[0] if cols else 0
    if n < 2:
        return 0
    if len(cols) == 1:       # one sorted copy: a third of what sorting by an index and gathering take
        s = np.sort(cols[0])
        return int(np.count_nonzero(s[1:] == s[:-1]))
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
    key columns (no id). The positions, the momenta and the key are read (and let go) in turn,
    and only what the frame already held stays in memory (``Frame.peek``).
    """
    with ExitStack() as stack:
        # every file the counts read stays open until they are done (one open per file, not per column)
        for c in dict.fromkeys(list(frame.position_names) + frame.momentum_names()
                               + list(frame.key_columns() or ())):
            stack.enter_context(frame.loader(c).hold())
        return _health(frame, layout)


def _health(frame, layout) -> dict:
    n = frame.length
    pos_names = frame.position_names
    pos = [np.asarray(frame.peek(c)) for c in pos_names]
    bad_pos = _nonfinite_rows(pos, n)
    out = {
        "species": frame.species,
        "particles": n,
        "position_columns": pos_names,
        "nonfinite_positions": int(np.count_nonzero(bad_pos)),
        "nonfinite_momenta": 0,
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
    del pos, bad_pos
    mom = [np.asarray(frame.peek(c)) for c in frame.momentum_names()]
    out["nonfinite_momenta"] = int(np.count_nonzero(_nonfinite_rows(mom, n)))
    del mom
    key = frame.key_columns()
    if key:
        out["key"] = list(key)
        out["duplicate_keys"] = duplicate_count([np.asarray(frame.peek(c)) for c in key])
    return out
