"""Compiled loops for the migration and drift diagnostics, where numpy would need several passes.

Optional: numba is declared, but when it is missing, or an input is
small, callers use their numpy path (same answers; tests compare both).
Kernels compile on first use and numba caches them on disk.

Matching two snapshots of N particles is bound by random memory access
(looking ids up, gathering the second snapshot's blocks and positions). The
kernels avoid numpy's full-size temporaries and extra passes. The totals of a
snapshot (count, weight, charge, momentum, kinetic energy, their non-finite
counts) are one pass over its columns instead of one numpy pass per total.
"""

from __future__ import annotations

import importlib.util
import os
import threading

import numpy as np

#: below this size the numpy path is used (no compile, and fast enough)
MIN_SIZE = 200_000

available = importlib.util.find_spec("numba") is not None
_compiled: dict = {}
_lock = threading.Lock()


def _axis_cells(a, b, h, periodic, n):
    # |b - a| in cells, minimum image on a periodic axis
    t = (np.float64(b) - np.float64(a)) / h
    if periodic:
        t -= n * np.rint(t / n)
    return abs(t)


def _wider(m, t):
    # the larger of two displacements; NaN on either side wins, as with np.maximum
    return m if (m > t or m != m) else t


def _dense(ka, kb, span, pos_b, ia, ib, lost, created):
    # pos_b[key]: row of b (>= 0), -1 never seen, -2 matched by a, -3 seen only in a
    nb = kb.shape[0]
    for j in range(nb):   # write-only scatter: no read stalls on the random access
        pos_b[kb[j]] = j
    filled = 0
    for k in range(span):
        filled += pos_b[k] >= 0
    if filled != nb:
        return -(nb - filled), 0, 0, 0
    m = 0
    nl = 0
    dup_a = 0
    for i in range(ka.shape[0]):
        k = ka[i]
        j = pos_b[k]
        if j >= 0:
            ia[m] = i
            ib[m] = j
            m += 1
            pos_b[k] = -2
        elif j == -1:
            lost[nl] = i
            nl += 1
            pos_b[k] = -3
        else:
            dup_a += 1
    if dup_a:
        return 0, dup_a, 0, 0
    nc = 0
    for j in range(nb):
        if pos_b[kb[j]] >= 0:
            created[nc] = j
            nc += 1
    return 1, m, nl, nc


# Gathering the second snapshot's block and coordinates in a separate pass over the matched
# pairs (not inside the matching loop) keeps the random reads independent of each other, so
# the memory system overlaps them. The cell facts go into scalars before the loop: read from
# arrays inside it they would be reloaded every iteration (the outputs might alias them).
def _pairs(ia, ib, want_block, block_b, tb, d, xa, ya, za, xb, yb, zb, h, per, n, disp):
    h0, h1, h2, p0, p1, p2, n0, n1, n2 = h[0], h[1], h[2], per[0], per[1], per[2], n[0], n[1], n[2]
    for k in range(ia.shape[0]):
        i = ia[k]
        j = ib[k]
        if want_block:
            tb[k] = block_b[j]
        w = _axis_cells(xa[i], xb[j], h0, p0, n0)
        if d > 1:
            w = _wider(w, _axis_cells(ya[i], yb[j], h1, p1, n1))
        if d > 2:
            w = _wider(w, _axis_cells(za[i], zb[j], h2, p2, n2))
        disp[k] = w


# A migration summary of dense keys (counts, moves, displacement; no per-pair arrays). The
# second snapshot's block and coordinates are scattered into one record per key (write-only:
# no read stalls), so that the pass over the first snapshot finds all it needs about a
# particle's partner in one cache line, and stayers are counted per block on the spot.
# Record field 0 says what is known of the key: 0 never seen, 0.5 seen only in a, -1 matched,
# >= 1 in b and not (yet) matched, as 1 + its block - blo.
def _dense_summary(ka, kb, rec, block_a, block_b, blo, diag, d, xa, ya, za, xb, yb, zb, h, per, n,
                   steps, mf, mt, stats):
    nb = kb.shape[0]
    for j in range(nb):
        k = kb[j]
        rec[k, 0] = 1.0 + (block_b[j] - blo)
        if d > 0:
            rec[k, 1] = xb[j]
        if d > 1:
            rec[k, 2] = yb[j]
        if d > 2:
            rec[k, 3] = zb[j]
    h0, h1, h2, p0, p1, p2, n0, n1, n2 = h[0], h[1], h[2], per[0], per[1], per[2], n[0], n[1], n[2]
    m = 0
    nl = 0
    dup_a = 0
    moved = 0
    nonfinite = 0
    over = 0
    widest = 0.0
    for i in range(ka.shape[0]):
        k = ka[i]
        r = rec[k, 0]
        if r >= 1.0:
            fb = block_a[i]
            tb = np.int64(r - 1.0) + blo
            if fb == tb:
                diag[fb - blo] += 1
            else:
                mf[moved] = fb
                mt[moved] = tb
                moved += 1
            if d > 0:
                w = _axis_cells(xa[i], rec[k, 1], h0, p0, n0)
                if d > 1:
                    w = _wider(w, _axis_cells(ya[i], rec[k, 2], h1, p1, n1))
                if d > 2:
                    w = _wider(w, _axis_cells(za[i], rec[k, 3], h2, p2, n2))
                if abs(w) < np.inf:
                    if w > widest:
                        widest = w
                else:
                    nonfinite += 1
                over += w > steps
            m += 1
            rec[k, 0] = -1.0
        elif r == 0.0:
            nl += 1
            rec[k, 0] = 0.5
        else:
            dup_a += 1
    nc = 0
    for k in range(rec.shape[0]):
        nc += rec[k, 0] >= 1.0
    stats[0] = m
    stats[1] = nl
    stats[2] = nc
    stats[3] = dup_a
    stats[4] = nb - nc - m          # rows of b beyond the distinct keys: repeated ids
    stats[5] = moved
    stats[6] = nonfinite
    stats[7] = over
    return widest


# (The record writes and the displacement are spelled out in each pass below: numba-inlined
# helpers for them measured about 2x slower on 10 M pairs, side by side.)
# Comparing two runs' particles with dense keys: the candidate's row, coordinates and momentum
# are scattered into one record per key (write-only), so the pass over the reference finds all
# it needs about a particle's partner in one cache line (separate gathers of the coordinates and
# of the momenta would each miss the cache on every pair). Record field 0: 0 never seen, 1 + row
# of b for a key of b not (yet) matched, -1 matched, -2 seen only in a. Per pair the displacement
# (as _pairs gives it, bit for bit) and |du| (from |du|^2 as _momentum gives it); the finite
# ones' largest values and compensated (Kahan) sums of squares on the way.
def _kahan(s, c, v):
    # compensated sum without a branch (a data-dependent branch would stall the loop's reads);
    # the terms are squares, all of one sign, where Kahan's form is as good as Neumaier's
    y = v - c
    t = s + y
    return t, (t - s) - y


def _dense_pairs(ka, kb, rec, d, dm, xa, ya, za, xb, yb, zb, ua0, ua1, ua2, ub0, ub1, ub2, h, per,
                 n, ib, disp, du, stats, sums):
    nb = kb.shape[0]
    dup_b = 0
    for j in range(nb):
        k = kb[j]
        # the line is fetched for the write anyway; the test adds no stall between iterations
        dup_b += rec[k, 0] != 0.0
        rec[k, 0] = j + 1.0
        if d > 0:
            rec[k, 1] = xb[j]
        if d > 1:
            rec[k, 2] = yb[j]
        if d > 2:
            rec[k, 3] = zb[j]
        if dm > 0:
            rec[k, 1 + d] = ub0[j]
        if dm > 1:
            rec[k, 2 + d] = ub1[j]
        if dm > 2:
            rec[k, 3 + d] = ub2[j]
    h0, h1, h2, p0, p1, p2, n0, n1, n2 = h[0], h[1], h[2], per[0], per[1], per[2], n[0], n[1], n[2]
    m = 0
    nl = 0
    dup_a = 0
    pbad = 0
    ubad = 0
    pmax = 0.0
    ps, pc = 0.0, 0.0
    umax = 0.0
    us, uc = 0.0, 0.0
    rs, rc = 0.0, 0.0
    for i in range(ka.shape[0]):
        k = ka[i]
        r = rec[k, 0]
        if r >= 1.0:
            ib[m] = np.int64(r) - 1
            if d > 0:
                w = _axis_cells(xa[i], rec[k, 1], h0, p0, n0)
                if d > 1:
                    w = _wider(w, _axis_cells(ya[i], rec[k, 2], h1, p1, n1))
                if d > 2:
                    w = _wider(w, _axis_cells(za[i], rec[k, 3], h2, p2, n2))
                disp[m] = w
                if abs(w) < np.inf:
                    if w > pmax:
                        pmax = w
                    ps, pc = _kahan(ps, pc, w * w)
                else:
                    pbad += 1
            if dm > 0:
                a = np.float64(ua0[i])
                t = rec[k, 1 + d] - a
                s = t * t
                q = a * a
                if dm > 1:
                    a = np.float64(ua1[i])
                    t = rec[k, 2 + d] - a
                    s += t * t
                    q += a * a
                if dm > 2:
                    a = np.float64(ua2[i])
                    t = rec[k, 3 + d] - a
                    s += t * t
                    q += a * a
                du[m] = np.sqrt(s)
                if abs(s) < np.inf and abs(q) < np.inf:
                    if s > umax:
                        umax = s
                    us, uc = _kahan(us, uc, s)
                    rs, rc = _kahan(rs, rc, q)
                else:
                    ubad += 1
            m += 1
            rec[k, 0] = -1.0
        elif r == 0.0:
            nl += 1
            rec[k, 0] = -2.0
        else:
            dup_a += 1
    stats[0] = m
    stats[1] = nl
    stats[2] = nb - dup_b - m       # distinct keys of b not matched
    stats[3] = dup_a
    stats[4] = dup_b                # rows of b repeating a key already seen
    stats[5] = pbad
    stats[6] = ubad
    sums[0] = pmax
    sums[1] = ps
    sums[2] = np.sqrt(umax)
    sums[3] = us
    sums[4] = rs


def dense_pairs(ka, kb, span, pa, pb, layout, mom_a, mom_b):
    """Match dense keys and measure each pair in one compiled pass.

    ``pa``/``pb`` coordinate arrays (or None: no displacement), ``mom_a``/``mom_b``
    momentum components (possibly empty). Returns ``("dup", side, count)``, or a dict:
    ``ib`` the matched rows of b, in the order of their partners in a (a's matched rows are not
    kept: with nothing lost they are ``arange(na)``); per pair ``disp``, the
    displacement in cells as :func:`matched_pairs` gives it, and ``du`` = ``|u_b - u_a|``
    (None without positions / momenta); ``lost``, ``created`` the numbers of keys only in a
    and only in b; over the pairs whose values are finite, ``position`` = (non-finite count,
    largest, Σ disp²) and ``momentum`` = (non-finite count, largest |du|, Σ|du|², Σ|u_a|²),
    the sums compensated.
    """
    na, nb = ka.shape[0], kb.shape[0]
    d, pa, pb, h, per, n = _geometry(pa, pb, layout)
    dm = len(mom_a)
    if dm:
        dt = np.result_type(*[np.asarray(u).dtype for u in mom_a], *[np.asarray(u).dtype for u in mom_b])
        ua = [np.ascontiguousarray(u, dtype=dt) for u in mom_a]
        ub = [np.ascontiguousarray(u, dtype=dt) for u in mom_b]
        ua, ub = (ua + [ua[0]] * 3)[:3], (ub + [ub[0]] * 3)[:3]
    else:
        ua = ub = [np.zeros(1)] * 3
    rec = np.zeros((span, 1 + d + dm))
    k = min(na, nb)
    ib = np.empty(k, dtype=np.int64)
    disp, du = np.empty(k if d else 0), np.empty(k if dm else 0)
    stats = np.zeros(7, dtype=np.int64)
    sums = np.zeros(5)
    _get("dense_pairs")(np.ascontiguousarray(ka), np.ascontiguousarray(kb), rec, d, dm, *pa, *pb,
                        *ua, *ub, h, per, n, ib, disp, du, stats, sums)
    del rec
    m, nl, nc, dup_a, dup_b, pbad, ubad = (int(v) for v in stats)
    if dup_b:
        return ("dup", "second", dup_b)
    if dup_a:
        return ("dup", "first", dup_a)
    return {"ib": _trim(ib, m), "disp": _trim(disp, m) if d else None,
            "du": _trim(du, m) if dm else None, "lost": nl, "created": nc,
            "position": (pbad, float(sums[0]), float(sums[1])),
            "momentum": (ubad, float(sums[2]), float(sums[3]), float(sums[4]))}


def _get(name):
    with _lock:
        if name not in _compiled:
            import numba
            g = globals()
            for helper in ("_axis_cells", "_wider", "_fin", "_terms", "_fill", "_kahan"):
                if not hasattr(g[helper], "py_func"):
                    g[helper] = numba.njit(nogil=True, inline="always")(g[helper])
            if name == "totals_file":
                _get_unlocked("totals")
                g["_totals_rows"] = _compiled["totals"]
                g["_pread"] = _pread_function()
            _get_unlocked(name)
    return _compiled[name]


def _get_unlocked(name):
    if name not in _compiled:
        import numba
        # IEEE results (inf, NaN) instead of exceptions on a zero division: the totals count
        # them; 'reassoc' lets the block sums vectorise (no 'nnan'/'ninf': NaNs are counted)
        opts = {"fastmath": {"reassoc", "nsz"}} if name == "totals" else {}
        _compiled[name] = numba.njit(cache=True, nogil=True, error_model="numpy",
                                     **opts)(globals()["_" + name])
    return _compiled[name]


def _pread_function():
    """libc's ``pread`` for compiled code (POSIX; found by name when the kernel is linked)."""
    from numba import types
    return types.ExternalFunction("pread", types.intp(types.intc, types.uintp, types.uintp,
                                                      types.int64))


#: whether compiled code can read files itself (a POSIX ``pread``; not on Windows)
can_read_files = available and hasattr(os, "pread")


def _geometry(pa, pb, layout):
    """Three coordinate arrays per side (unused axes repeat x) in one dtype, and the cell facts."""
    if pa is None or layout is None:
        z = np.zeros(1)
        return 0, (z, z, z), (z, z, z), np.ones(3), np.zeros(3, np.bool_), np.ones(3)
    d = len(pa)
    dt = np.result_type(*[p.dtype for p in pa], *[p.dtype for p in pb])
    pa = [np.ascontiguousarray(p, dtype=dt) for p in pa]
    pb = [np.ascontiguousarray(p, dtype=dt) for p in pb]
    pa, pb = (pa + [pa[0]] * 3)[:3], (pb + [pb[0]] * 3)[:3]
    h = np.ones(3)
    per = np.zeros(3, np.bool_)
    n = np.ones(3)
    h[:d] = layout.cell_size
    per[:d] = layout.periodic[:d]
    n[:d] = layout.cells
    return d, tuple(pa), tuple(pb), h, per, n


def _blocks(block_b, size):
    if block_b is None:
        return False, np.zeros(1, np.int64), np.zeros(1, np.int64)
    return True, np.ascontiguousarray(block_b, dtype=np.int64), np.empty(size, np.int64)


def dense_match(ka: np.ndarray, kb: np.ndarray, span: int):
    """(ia, ib, lost, created) for keys in ``[0, span)``, or ("dup", side, count)."""
    na, nb = ka.shape[0], kb.shape[0]
    idx_t = np.int32 if max(na, nb) < 2 ** 31 - 1 else np.int64
    pos = np.full(span, -1, dtype=idx_t)
    ia = np.empty(min(na, nb), dtype=np.int64)
    ib = np.empty(min(na, nb), dtype=np.int64)
    lost = np.empty(na, dtype=np.int64)
    created = np.empty(nb, dtype=np.int64)
    status, m, nl, nc = _get("dense")(np.ascontiguousarray(ka), np.ascontiguousarray(kb), span, pos,
                                      ia, ib, lost, created)
    if status < 0:
        return ("dup", "second", -status)
    if status == 0:
        return ("dup", "first", m)
    return _trim(ia, m), _trim(ib, m), _trim(lost, nl), _trim(created, nc)


def matched_pairs(ia, ib, block_b, pa, pb, layout):
    """(block in b or None, displacement in cells) of each matched pair (ia[k], ib[k])."""
    ia = np.asarray(ia, dtype=np.int64)
    ib = np.asarray(ib, dtype=np.int64)
    want, blocks, tb = _blocks(block_b, ia.shape[0])
    d, pa, pb, h, per, n = _geometry(pa, pb, layout)
    disp = np.empty(ia.shape[0], dtype=np.float64)
    _get("pairs")(ia, ib, want, blocks, tb, d, *pa, *pb, h, per, n, disp)
    return (tb if want else None), disp


def dense_summary(ka, kb, span, block_a, block_b, pa, pb, layout, steps):
    """Match dense keys and summarise the moves in one compiled pass, or None.

    Returns ``("dup", side, count)``, or ``(counts, stats, moved_from, moved_to, blo)``:
    ``counts[b - blo]`` particles stayed in block ``b``; the movers' blocks; stats
    ``matched, lost, created, migrated, nonfinite, over, widest`` (over: displacement >
    ``steps``; widest: the largest finite displacement, 0.0 when none). None when the
    block ids span too wide a range to count stayers in an array.
    """
    na, nb = ka.shape[0], kb.shape[0]
    block_a = np.ascontiguousarray(block_a, dtype=np.int64)
    block_b = np.ascontiguousarray(block_b, dtype=np.int64)
    lo = min(int(block_a.min(initial=0)), int(block_b.min(initial=0)))
    hi = max(int(block_a.max(initial=0)), int(block_b.max(initial=0)))
    if hi - lo >= 2 ** 26:
        return None
    d, pa, pb, h, per, n = _geometry(pa, pb, layout)
    rec = np.zeros((span, 1 + d))
    diag = np.zeros(hi - lo + 1, dtype=np.int64)
    k = min(na, nb)
    mf = np.empty(k, dtype=np.int64)
    mt = np.empty(k, dtype=np.int64)
    stats = np.zeros(8, dtype=np.int64)
    widest = _get("dense_summary")(np.ascontiguousarray(ka), np.ascontiguousarray(kb), rec, block_a,
                                    block_b, lo, diag, d, *pa, *pb, h, per, n, float(steps), mf, mt,
                                    stats)
    del rec
    m, nl, nc, dup_a, dup_b, moved, nonfinite, over = (int(v) for v in stats)
    if dup_b:
        return ("dup", "second", dup_b)
    if dup_a:
        return ("dup", "first", dup_a)
    return diag, (m, nl, nc, moved, nonfinite, over, float(widest)), mf[:moved].copy(), mt[:moved].copy(), lo


def _trim(buf, n):
    # a slice pins the whole buffer: copy when that would waste more than half of it
    return buf[:n] if 2 * n >= buf.shape[0] else buf[:n].copy()


# Conserved totals ------------------------------------------------------------------------
#: slots of the totals accumulators (see :func:`snapshot_sums`)
TOTAL_SLOTS = ("weight", "charge", "abs_charge", "momentum_0", "momentum_1", "momentum_2",
               "abs_momentum", "kinetic_energy")
#: rows summed plainly before their sum joins the compensated total: short enough that the
#: plain part loses no more than numpy's pairwise sum does, long enough to vectorise
TOTALS_BLOCK = 256
#: below this many rows the totals use numpy (no compile)
TOTALS_MIN_SIZE = 100_000

_INF = np.inf


def _fin(t):
    # a term and whether it is finite (NaN fails the comparison)
    return t if abs(t) < _INF else 0.0, 0 if abs(t) < _INF else 1


def _terms(j, wb, qb, mb, ab, bb, cb, kind, rel, ke, cc, c2c):
    # The eight terms of row j (TOTAL_SLOTS order), formed with the numpy path's operations in
    # its order. A missing momentum component is read as 0 (its terms add exactly nothing).
    wj = np.float64(wb[j])
    mj = np.float64(mb[j])
    t = wj * np.float64(qb[j])
    f = wj if kind == 2 else wj * mj
    va = np.float64(ab[j])
    vb = np.float64(bb[j])
    vc = np.float64(cb[j])
    q2 = va * va + vb * vb + vc * vc
    if rel and kind == 0:
        # p = γ m v from a velocity; γ = sqrt(1 + u²/c²) with u² = v²/(1 − v²/c²), as the
        # energy below and the numpy path form it (v >= c: non-finite, counted)
        f = f * np.sqrt(1.0 + (q2 / (1.0 - q2 / c2c)) / c2c)
    pa = f * va
    pb = f * vb
    pc = f * vc
    if ke == 1:
        e = wj * (0.5 * mj * q2)
    elif ke == 2:
        e = wj * (0.5 * q2 / mj)
    elif ke == 3:
        gamma = np.sqrt(1.0 + (q2 / (mj * mj)) / c2c)
        e = wj * (np.sqrt(q2) * cc if mj == 0 else q2 / (mj * (gamma + 1.0)))
    elif ke == 4:
        u2 = q2 / (1.0 - q2 / c2c) if kind == 0 else q2
        gamma = np.sqrt(1.0 + u2 / c2c)
        e = wj * (mj * u2 / (gamma + 1.0))
    else:
        e = 0.0
    return wj, t, abs(t), pa, pb, pc, np.sqrt(pa * pa + pb * pb + pc * pc), e


def _totals(n, w, sw, q, sq, m, sm, c0, c1, c2, sc, nc, want_q, want_ke, kind, rel, cc,
            acc, comp, bad):
    # Every total in one pass over the rows, a short block at a time. Within a block each
    # total is a plain float64 sum held in a register (the loop vectorises); the block sums
    # join the running totals by Neumaier-compensated addition. A block whose sums are not
    # all finite (a NaN or infinite term, or an overflow) is summed again term by term,
    # leaving the non-finite terms out and counting them: finite terms give the same sums
    # either way. A column given as one value has stride 0 (sw, sq, sm) and is read from a
    # block-long constant buffer; an absent momentum component from a block of zeros.
    B = TOTALS_BLOCK
    c2c = cc * cc
    wk = np.full(B, w[0])
    qk = np.full(B, q[0])
    mk = np.full(B, m[0])
    zk = np.zeros(B, c0.dtype)     # same type as the components (float32 stays float32)
    # the kinetic-energy term: 0 none, 1 w ½ m v², 2 w p²/2m, 3 and 4 relativistic (p; v or u)
    ke = 0 if not (want_ke and nc > 0) else (3 if kind == 2 else 4) if rel else (2 if kind == 2 else 1)
    part = np.zeros(8)
    nbad = np.zeros(8, np.int64)
    start = 0
    while start < n:
        stop = min(start + B, n)
        L = stop - start
        wb = w[start:stop] if sw else wk[:L]
        qb = q[start:stop] if sq else qk[:L]
        mb = m[start:stop] if sm else mk[:L]
        ab = c0[start:stop] if nc > 0 else zk[:L]
        bb = c1[start:stop] if nc > 1 else zk[:L]
        cb = c2[start:stop] if nc > 2 else zk[:L]
        s0 = s1 = s2 = s3 = s4 = s5 = s6 = s7 = 0.0
        for j in range(L):
            t0, t1, t2, t3, t4, t5, t6, t7 = _terms(j, wb, qb, mb, ab, bb, cb, kind, rel, ke, cc, c2c)
            s0 += t0
            s1 += t1
            s2 += t2
            s3 += t3
            s4 += t4
            s5 += t5
            s6 += t6
            s7 += t7
        part[0] = s0
        part[1] = s1
        part[2] = s2
        part[3] = s3
        part[4] = s4
        part[5] = s5
        part[6] = s6
        part[7] = s7
        finite = True
        for k in range(8):
            finite = finite and abs(part[k]) < _INF
        if not finite:
            part[:] = 0.0
            for j in range(L):
                terms = _terms(j, wb, qb, mb, ab, bb, cb, kind, rel, ke, cc, c2c)
                for k in range(8):
                    x, b = _fin(terms[k])
                    part[k] += x
                    nbad[k] += b
        for k in range(8):
            # Neumaier: the low bits a large running total would drop are kept in comp
            x = part[k]
            t = acc[k] + x
            if abs(acc[k]) >= abs(x):
                comp[k] += (acc[k] - t) + x
            else:
                comp[k] += (x - t) + acc[k]
            acc[k] = t
        start = stop
    if not want_q:
        nbad[1] = nbad[2] = 0
    for k in range(8):
        bad[k] += nbad[k]


# bound by _get before _totals_file compiles: libc's pread, and the compiled _totals it calls
_pread = None
_totals_rows = None


def _fill(fd, buf, size, offset, r, L):
    # rows r..r+L of a column of `size`-byte values whose row 0 is at byte `offset` of descriptor
    # fd, into buf; a column not read from a file (size 0) is left alone. False when short.
    want = L * size
    where = offset + r * size
    got = 0
    addr = buf.ctypes.data
    while got < want:
        k = _pread(fd, addr + got, want - got, where + got)
        if k <= 0:
            return False
        got += k
    return True


def _totals_file(fds, offs, sizes, w, sw, q, sq, m, sm, c0, c1, c2, nc, want_q, want_ke, kind,
                 rel, cc, bounds, acc, comp, bad):
    # The totals of pieces read straight from files: piece p is rows bounds[p, 0]..bounds[p, 1],
    # its sums go to acc[p], comp[p], bad[p] (as _totals would give them for those rows in
    # memory, bit for bit). Column j (weight, charge, mass, components 0-2) with sizes[j] > 0
    # is read from descriptor fds[j], row 0 at byte offs[j], a buffer-full of rows at a time
    # into its buffer (w, q, m, c0, c1, c2); the others are single values (stride 0) or absent.
    # Returns 0, or 1 + the piece whose rows could not all be read (a file changed meanwhile).
    R = c0.shape[0] if nc > 0 else w.shape[0] if sw else 1 << 14
    if sw:
        R = min(R, w.shape[0])
    if sq:
        R = min(R, q.shape[0])
    if sm:
        R = min(R, m.shape[0])
    if R >= TOTALS_BLOCK:
        R -= R % TOTALS_BLOCK   # reads end on a piece's block edges: the blocks summed are _totals' own
    for p in range(bounds.shape[0]):
        r = bounds[p, 0]
        end = bounds[p, 1]
        while r < end:
            L = min(R, end - r)
            ok = (_fill(fds[0], w, sizes[0], offs[0], r, L) and _fill(fds[1], q, sizes[1], offs[1], r, L)
                  and _fill(fds[2], m, sizes[2], offs[2], r, L) and _fill(fds[3], c0, sizes[3], offs[3], r, L)
                  and _fill(fds[4], c1, sizes[4], offs[4], r, L) and _fill(fds[5], c2, sizes[5], offs[5], r, L))
            if not ok:
                return 1 + p
            _totals_rows(L, w, sw, q, sq, m, sm, c0, c1, c2, 1, nc, want_q, want_ke, kind, rel, cc,
                         acc[p], comp[p], bad[p])
            r += L
    return 0


def _column(value):
    """(array, stride): a float64 column as it is, anything else as float64; a scalar with stride 0."""
    a = np.asarray(value)
    if a.ndim == 0:
        return np.full(1, a, dtype=np.float64), 0
    if a.dtype != np.float64 and a.dtype != np.float32:
        a = a.astype(np.float64)
    return np.ascontiguousarray(a), 1


class TotalSums:
    """Running compensated sums of the totals; :func:`snapshot_sums` adds rows to them."""

    def __init__(self):
        self.acc = np.zeros(8)
        self.comp = np.zeros(8)
        self.bad = np.zeros(8, np.int64)
        self.rows = 0

    def result(self) -> tuple[np.ndarray, np.ndarray]:
        return self.acc + self.comp, self.bad

    def add(self, other: "TotalSums") -> "TotalSums":
        """Add another piece's sums (compensated, like the blocks inside a piece)."""
        x = other.acc
        t = self.acc + x
        big = np.abs(self.acc) >= np.abs(x)
        with np.errstate(invalid="ignore"):
            self.comp += np.where(big, (self.acc - t) + x, (x - t) + self.acc) + other.comp
        self.acc = t
        self.bad += other.bad
        return self


def file_piece_sums(bounds, sources, kind: str, relativistic: bool, c: float, want_ke: bool,
                    buffer, into: "TotalSums | None" = None) -> list["TotalSums"] | None:
    """The totals of row ranges ``bounds`` (``[(start, stop), ...]``) read straight from files.

    ``sources`` maps ``weight``, ``charge``, ``mass`` to ``(fd, offset, dtype)``
    of a file column or to a single value (charge None: no charge; mass None:
    none), and ``components`` to a list of 0-3 ``(fd, offset, dtype)`` of one
    dtype. ``buffer(key, dtype)`` gives this thread's read buffer for a column.
    One compiled call reads and reduces all the ranges without Python's lock.
    Returns one :class:`TotalSums` per range (what :func:`snapshot_sums` gives for
    the same rows in memory, bit for bit), or None when a file gave fewer bytes
    than expected (it changed: the caller reads through the usual path).
    With ``into`` (one range only) the sums go on from that one's, as
    :func:`snapshot_sums` ``into=`` does; ``into`` is left as it was on None.
    """
    fds = np.zeros(6, np.int32)
    offs = np.zeros(6, np.int64)
    sizes = np.zeros(6, np.int64)
    arrays = []
    for j, role in enumerate(("weight", "charge", "mass")):
        src = sources[role]
        if isinstance(src, tuple):
            fds[j], offs[j], dt = src[0], src[1], np.dtype(src[2])
            sizes[j] = dt.itemsize
            arrays.append((buffer(role, dt), 1))
        else:
            default = {"weight": 1.0, "charge": 0.0, "mass": 1.0}[role]
            arrays.append(_column(default if src is None else src))
    comps = list(sources["components"])
    nc = len(comps)
    if nc:
        cols = []
        for a, (fd, off, dt) in enumerate(comps):
            fds[3 + a], offs[3 + a], sizes[3 + a] = fd, off, np.dtype(dt).itemsize
            cols.append(buffer(f"component{a}", np.dtype(dt)))
    else:
        cols = [np.zeros(1)]
    cols = (cols + [cols[0]] * 3)[:3]
    (w, sw), (q, sq), (m, sm) = arrays
    k = len(bounds)
    if into is not None:
        if k != 1:
            raise ValueError("into= takes one row range")
        acc, comp, bad = into.acc[None, :].copy(), into.comp[None, :].copy(), into.bad[None, :].copy()
    else:
        acc, comp, bad = np.zeros((k, 8)), np.zeros((k, 8)), np.zeros((k, 8), np.int64)
    code = {"v": 0, "u": 1, "p": 2}[kind]
    status = _get("totals_file")(fds, offs, sizes, w, sw, q, sq, m, sm, cols[0], cols[1], cols[2], nc,
                                 sources["charge"] is not None, bool(want_ke and nc), code,
                                 bool(relativistic), float(c), np.asarray(bounds, np.int64).reshape(k, 2),
                                 acc, comp, bad)
    if status:
        return None
    if into is not None:
        into.acc[:], into.comp[:], into.bad[:] = acc[0], comp[0], bad[0]
        return [into]
    out = []
    for p in range(k):
        t = TotalSums()
        t.acc, t.comp, t.bad = acc[p], comp[p], bad[p]
        out.append(t)
    return out


def snapshot_sums(n, weight, charge, mass, components, kind: str, relativistic: bool, c: float,
                  want_ke: bool, into: TotalSums | None = None) -> TotalSums:
    """Add ``n`` rows to the totals (slots :data:`TOTAL_SLOTS`), reading each column once.

    ``weight``, ``charge``, ``mass`` are arrays or single values (``charge`` None:
    no charge; ``mass`` None only with ``kind='p'``); ``components`` the 0-3
    momentum arrays. float32 columns are read as they are and widened per row.
    """
    out = into or TotalSums()
    w, sw = _column(weight)
    want_q = charge is not None
    q, sq = _column(charge if want_q else 0.0)
    m, sm = _column(1.0 if mass is None else mass)
    comps = [np.asarray(x) for x in components]
    nc = len(comps)
    if nc:
        dt = np.result_type(*[x.dtype for x in comps])
        dt = dt if dt in (np.float32, np.float64) else np.float64
        comps = [np.ascontiguousarray(x, dtype=dt) for x in comps]
        cs = 1
    else:
        comps, cs = [np.zeros(1)], 0
    comps = (comps + [comps[0]] * 3)[:3]
    code = {"v": 0, "u": 1, "p": 2}[kind]
    _get("totals")(int(n), w, sw, q, sq, m, sm, comps[0], comps[1], comps[2], cs, nc, want_q,
                   bool(want_ke and nc), code, bool(relativistic), float(c), out.acc, out.comp, out.bad)
    return out


# The momentum part of comparing two runs' matched particles: |Δu|² and |u_ref|² per pair in one
# pass over the pairs (numpy would gather every component of both sides into temporaries first).
def _momentum(ia, ib, d, ua0, ua1, ua2, ub0, ub1, ub2, du, uref):
    for k in range(ia.shape[0]):
        i = ia[k]
        j = ib[k]
        a = np.float64(ua0[i])
        t = np.float64(ub0[j]) - a
        s = t * t
        r = a * a
        if d > 1:
            a = np.float64(ua1[i])
            t = np.float64(ub1[j]) - a
            s += t * t
            r += a * a
        if d > 2:
            a = np.float64(ua2[i])
            t = np.float64(ub2[j]) - a
            s += t * t
            r += a * a
        du[k] = s
        uref[k] = r


def momentum_pairs(ia, ib, mom_a, mom_b):
    """(|u_b - u_a|², |u_a|²) of each matched pair (ia[k], ib[k]); 1 to 3 components per side."""
    ia = np.ascontiguousarray(ia, dtype=np.int64)
    ib = np.ascontiguousarray(ib, dtype=np.int64)
    d = len(mom_a)
    dt = np.result_type(*[np.asarray(u).dtype for u in mom_a], *[np.asarray(u).dtype for u in mom_b])
    ua = [np.ascontiguousarray(u, dtype=dt) for u in mom_a]
    ub = [np.ascontiguousarray(u, dtype=dt) for u in mom_b]
    ua, ub = (ua + [ua[0]] * 3)[:3], (ub + [ub[0]] * 3)[:3]
    du = np.empty(ia.shape[0])
    uref = np.empty(ia.shape[0])
    _get("momentum")(ia, ib, d, *ua, *ub, du, uref)
    return du, uref
