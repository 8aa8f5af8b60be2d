"""frame_health against pandas: isna/isin for non-finite rows, between() for the domain, duplicated()."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from swarmaudit.core.frame import Frame
from swarmaudit.core.layout import regular_layout
from swarmaudit.core.roles import RoleMap
from swarmaudit.readers.checks import duplicate_count, frame_health


def _frame(cols, role_map=None):
    n = len(next(iter(cols.values())))
    return Frame("s", n, {k: (lambda v=v: v) for k, v in cols.items()}, role_map=role_map)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_counts_match_pandas(seed):
    rng = np.random.default_rng(seed)
    n = 5000
    x = rng.uniform(-0.2, 1.2, n)
    y = rng.uniform(-0.1, 1.1, n)
    vx = rng.normal(size=n)
    for arr, frac in ((x, 0.01), (y, 0.02), (vx, 0.01)):
        idx = rng.choice(n, int(frac * n), replace=False)
        arr[idx] = rng.choice([np.nan, np.inf, -np.inf], idx.size)
    x[:3] = [0.0, 1.0, np.nextafter(1.0, 0.0)]     # half-open domain: 1.0 is outside
    ids = rng.integers(0, 4000, n)
    frame = _frame({"x": x, "y": y, "vx": vx, "id": ids})
    lay = regular_layout([0, 1, 0, 1], [4, 4], [2, 2])
    got = frame_health(frame, lay)

    df = pd.DataFrame({"x": x, "y": y, "vx": vx, "id": ids})
    nonfinite = (df[["x", "y"]].isna() | df[["x", "y"]].isin([np.inf, -np.inf])).any(axis=1)
    inside = df["x"].between(0, 1, inclusive="left") & df["y"].between(0, 1, inclusive="left")
    assert got["nonfinite_positions"] == int(nonfinite.sum())
    assert got["nonfinite_momenta"] == int((~np.isfinite(df["vx"])).sum())
    assert got["outside_domain"] == int((~inside & ~nonfinite).sum())
    assert got["duplicate_keys"] == int(df["id"].duplicated().sum())
    assert got["key"] == ["id"] and got["particles"] == n


def test_composite_key_matches_pandas():
    rng = np.random.default_rng(4)
    ident = rng.integers(0, 50, 3000)
    cpu = rng.integers(0, 3, 3000).astype(np.int32)
    frame = _frame({"x": np.zeros(3000), "ident": ident, "cpu": cpu},
                   role_map=RoleMap(key=("ident", "cpu")))
    got = frame_health(frame)
    ref = pd.DataFrame({"ident": ident, "cpu": cpu}).duplicated().sum()
    assert got["duplicate_keys"] == int(ref)
    assert got["outside_domain"] is None


def test_no_key_no_positions():
    got = frame_health(_frame({"a": np.arange(3.0)}))
    assert got["duplicate_keys"] is None and got["nonfinite_positions"] == 0


def test_duplicate_count_edges():
    assert duplicate_count([np.array([], dtype=np.int64)]) == 0
    assert duplicate_count([np.array([5, 5, 5])]) == 2


def test_suspicious_data_opens_and_is_counted(tmp_path):
    # NaN positions and repeated ids are usable data: no error, no open-time warning; inspect counts
    from swarmaudit.readers import registry
    x = np.array([0.1, np.nan, 0.5, np.inf])
    ids = np.array([1, 2, 2, 3])
    np.savez(tmp_path / "s.npz", x=x, id=ids)
    snap = registry.open_snapshot(str(tmp_path / "s.npz"))
    assert snap.warnings == []
    got = frame_health(snap.species["particles"])
    assert (got["nonfinite_positions"], got["duplicate_keys"]) == (2, 1)   # counted by hand
