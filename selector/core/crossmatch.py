"""Positional cross-matching on the unit sphere.

Positions are turned into 3-D unit vectors and matched with a k-d tree (Bentley 1975, Commun. ACM 18,
509) using the chord ``2 sin(θ/2)`` as the ball radius, the approach recommended for sky catalogues
because it has no trouble at the poles or across RA = 0/360 (see e.g. Gray, Nieto-Santisteban &
Szalay 2007, arXiv:cs/0701171, for the discussion of spherical matching). Every function works on
plain float64 arrays and returns a named tuple, so that it can sit in the inner loop of a tile run.

The inclusion test is the one of :func:`astropy.coordinates.search_around_sky`: a pair is kept when
the squared chord between the two unit vectors, summed over x, y, z in that order, is at most the
square of ``2 sin(radius/2)``. The unit vectors are computed with the same floating-point
operations, so the two pair sets agree exactly, boundary cases included.
"""

from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor
from typing import NamedTuple
import numpy as np
from scipy.spatial import cKDTree

from selector.core.frames import as_1d, radec_to_xyz, worker_count


__all__ = [
    "NearestMatch",
    "PairSet",
    "arcsec_from_chord",
    "chord_from_arcsec",
    "count_within",
    "nearest_within",
    "pairs_within",
    "radec_to_xyz",
]


# pi/648000 rounds to the same double as the arcsec->radian scale of astropy.units, which keeps the
# ball radius bit-identical to the reference (checked in the tests).
_RAD_PER_ARCSEC = np.pi / 648000.0


_ARCSEC_PER_RAD = 648000.0 / np.pi


# Below this many rows threads and spatial sorting cost more than they save.
_SMALL = 1 << 15


# Query rows per k-d tree call: small blocks balance the threads and keep temporaries in cache.
_QUERY_BLOCK = 1 << 15


# Neighbours asked for in the first pass. Real catalogues rarely have more than one counterpart
# inside a few arcsec, and k = 2 costs about as much as k = 1.
_FIRST_K = 2


# Largest (rows x k) answer asked of the tree at once when a field is crowded.
_MAX_ANSWER = 1 << 22


# The tree search uses a slightly larger radius; the exact test is then applied to each candidate,
# so rounding inside the tree traversal can never decide membership.
_BOUND_SLACK = 1e-8


# Beyond a chord of sqrt(2) (90 deg) asin loses accuracy; the cross-product form is used there.
_CHORD_ASIN_MAX = np.sqrt(2.0)


class PairSet(NamedTuple):
    """Every pair of sources closer than a radius.

    Attributes
    ----------
    index_a : numpy.ndarray of int64
        Row in catalogue ``a``.
    index_b : numpy.ndarray of int64
        Row in catalogue ``b``.
    separation_arcsec : numpy.ndarray of float64
        Angular separation of the pair (arcsec).
    """

    index_a: np.ndarray
    index_b: np.ndarray
    separation_arcsec: np.ndarray


class NearestMatch(NamedTuple):
    """The closest ``b`` of each ``a`` within the radius.

    Attributes
    ----------
    index_b : numpy.ndarray of int64
        Row in ``b`` of the nearest counterpart, ``-1`` when there is none.
    separation_arcsec : numpy.ndarray of float64
        Its separation (arcsec), NaN when there is none.
    n_within : numpy.ndarray of int64
        How many ``b`` lie within the radius.
    """

    index_b: np.ndarray
    separation_arcsec: np.ndarray
    n_within: np.ndarray


def chord_from_arcsec(radius_arcsec) -> float:
    """Chord length on the unit sphere for an angular radius.

    Parameters
    ----------
    radius_arcsec : float
        Angle θ (arcsec), 0 < θ <= 180 deg.

    Returns
    -------
    float
        ``2 sin(θ/2)``, the straight-line distance between two unit vectors θ apart.
    """
    r = float(radius_arcsec)
    if not np.isfinite(r) or r <= 0.0 or r > 648000.0:
        raise ValueError(f"radius_arcsec = {radius_arcsec!r} is out of range; it must be a number in "
                         "(0, 648000] arcsec (at most 180 deg)")
    # (r/2) converted to radians by one multiplication, as the reference does
    return float(2.0 * np.sin(np.float64(0.5 * r) * _RAD_PER_ARCSEC))


def arcsec_from_chord(chord) -> np.ndarray:
    """Angle subtended by a chord of the unit sphere.

    Parameters
    ----------
    chord : array_like of float
        Chord length(s) in [0, 2]; values above 2 are treated as 2.

    Returns
    -------
    numpy.ndarray of float64
        ``2 asin(chord/2)`` (arcsec). Accurate to a few ulp below 90 deg; near 180 deg the chord
        itself carries too little information and errors grow to ~1e-3 arcsec.
    """
    c = np.asarray(chord, dtype=np.float64)
    return 2.0 * np.arcsin(np.minimum(0.5 * c, 1.0)) * _ARCSEC_PER_RAD


def _spatial_order(xyz: np.ndarray) -> np.ndarray:
    """A permutation that puts nearby points next to each other.

    Queries in spatial order hit the same tree nodes one after another and run about three times
    faster than in random order. A 16-bit grid key over the two widest axes (plus a hemisphere bit
    when the points straddle the third axis) lets numpy use its radix sort. The grid only has to be
    roughly right, so its extent is taken from a subsample.
    """
    n = xyz.shape[0]
    sample = xyz[:: max(1, n // 65536)]
    lo = sample.min(axis=0)
    hi = sample.max(axis=0)
    ext = hi - lo
    a1, a2, a3 = np.argsort(-ext, kind="stable")
    split = lo[a3] < 0.0 < hi[a3]
    bits = 7 if split else 8
    cells = 1 << bits

    def cell(axis):
        c = xyz[:, axis] - lo[axis]
        c *= cells / ext[axis] if ext[axis] > 0 else 0.0
        np.clip(c, 0.0, cells - 1, out=c)
        return c.astype(np.uint16)

    i = cell(a1)
    j = cell(a2)
    # serpentine (odd grid rows run backwards) so that consecutive rows meet end to end
    j ^= (i & 1) * np.uint16(cells - 1)
    key = (i << bits) | j
    if split:
        key |= (xyz[:, a3] >= 0.0).astype(np.uint16) << (2 * bits)
    return np.argsort(key, kind="stable")


def _hits(start: int, rows, dist: np.ndarray, idx: np.ndarray, n_tree: int):
    """Flatten one k-nearest answer into (query row, tree index, chord) of the real neighbours."""
    k = idx.shape[1]
    flat = idx.ravel()
    pos = np.flatnonzero(flat < n_tree)
    row = pos // k
    return (start + (row if rows is None else rows[row]), flat[pos].astype(np.int64, copy=False),
            dist.ravel()[pos])


def _block_candidates(tree: cKDTree, n_tree: int, block: np.ndarray, start: int, bound: float):
    """(query row, tree index, chord) of every tree point within ``bound`` of the rows of one block."""
    k = min(_FIRST_K, n_tree)
    dist, idx = tree.query(block, k=k, distance_upper_bound=bound)
    dist, idx = dist.reshape(-1, k), idx.reshape(-1, k)
    full = np.flatnonzero(idx[:, -1] < n_tree) if k < n_tree else np.empty(0, np.int64)
    idx[full] = n_tree  # rows that may have more neighbours are answered again below
    parts = [_hits(start, None, dist, idx, n_tree)]
    if full.size:
        # Exact neighbour counts first, then one k-nearest query per power-of-two class of k: the
        # (rows, k) answers never exceed twice the pairs they hold, however crowded the field.
        pts = block[full]
        count = np.asarray(tree.query_ball_point(pts, bound, return_length=True))
        k_row = np.left_shift(1, np.ceil(np.log2(np.maximum(count, 1))).astype(np.int64))
        k_row = np.minimum(np.maximum(k_row, 2 * _FIRST_K), n_tree)
        for k in np.unique(k_row):
            k = int(k)
            sel = np.flatnonzero(k_row == k)
            step = max(1, _MAX_ANSWER // k)
            for s in range(0, sel.size, step):
                rows = sel[s:s + step]
                dist, idx = tree.query(pts[rows], k=k, distance_upper_bound=bound)
                parts.append(_hits(start, full[rows], dist.reshape(-1, k), idx.reshape(-1, k), n_tree))
    return parts


def _candidates(tree: cKDTree, n_tree: int, xq: np.ndarray, bound: float, nthreads: int):
    """Every tree point within ``bound`` of each query row.

    Returns (query row, tree index, chord) for all hits. Each row's hits are contiguous and in the
    tree's distance order, because every row is answered by exactly one k-nearest query. Blocks go
    to a thread pool rather than to the tree's own ``workers``: the tree splits its work into equal
    shares up front, which stalls on a machine where other processes hold some of the cores.
    """
    starts = range(0, xq.shape[0], _QUERY_BLOCK)

    def job(s):
        return _block_candidates(tree, n_tree, xq[s:s + _QUERY_BLOCK], s, bound)

    if nthreads > 1 and len(starts) > 1:
        with ThreadPoolExecutor(max_workers=nthreads) as pool:  # the tree releases the GIL
            blocks = list(pool.map(job, starts))
    else:
        blocks = [job(s) for s in starts]
    parts = [p for b in blocks for p in b]
    if not parts:
        e = np.empty(0, np.int64)
        return e, e, np.empty(0, np.float64)
    return tuple(np.concatenate(c) for c in zip(*parts))


def _sq_chord(xa: np.ndarray, xb: np.ndarray) -> np.ndarray:
    # x, y, z summed left to right, exactly as the tree's own leaf test does
    d = xa - xb
    np.multiply(d, d, out=d)
    return d[:, 0] + d[:, 1] + d[:, 2]


def _separation_arcsec(chord: np.ndarray, vectors) -> np.ndarray:
    """Separations (arcsec) from chords; ``vectors(sel)`` gives the two unit vectors of pairs ``sel``."""
    sep = arcsec_from_chord(chord)
    wide = np.flatnonzero(chord > _CHORD_ASIN_MAX)
    if wide.size:
        # atan2(|u x v|, u.v) stays accurate all the way to antipodal points
        u, v = vectors(wide)
        cross = np.linalg.norm(np.cross(u, v), axis=1)
        dot = np.einsum("ij,ij->i", u, v)
        sep[wide] = np.arctan2(cross, dot) * _ARCSEC_PER_RAD
    return sep


def _sort_within_groups(ia: np.ndarray, ib: np.ndarray, sep: np.ndarray, n_a: int):
    """Order pairs by (separation, index_b) inside each run of equal ``ia`` (already grouped)."""
    if ia.size < 2:
        return ia, ib, sep
    same = ia[1:] == ia[:-1]
    bad = same & ((sep[1:] < sep[:-1]) | ((sep[1:] == sep[:-1]) & (ib[1:] < ib[:-1])))
    if not bad.any():
        return ia, ib, sep
    flag = np.zeros(n_a, bool)
    flag[ia[1:][bad]] = True
    members = np.flatnonzero(flag[ia])  # whole groups, each contiguous, so sorting keeps them in place
    o = np.lexsort((ib[members], sep[members], ia[members]))
    ia[members] = ia[members][o]
    ib[members] = ib[members][o]
    sep[members] = sep[members][o]
    return ia, ib, sep


def _empty_pairs() -> PairSet:
    return PairSet(np.empty(0, np.int64), np.empty(0, np.int64), np.empty(0, np.float64))


def _finite_rows(xyz: np.ndarray):
    """(vectors with a position, their original rows or None when all have one)."""
    ok = np.isfinite(xyz[:, 0])
    if ok.all():
        return xyz, None
    keep = np.flatnonzero(ok)
    return np.ascontiguousarray(xyz[keep]), keep


def _build_tree(xyz: np.ndarray) -> cKDTree:
    # the sliding-midpoint tree without node shrinking builds twice as fast as the median tree
    # and answers these sparse fixed-radius queries just as quickly (measured)
    return cKDTree(xyz, leafsize=16, balanced_tree=False, compact_nodes=False)


def pairs_within(ra_a_deg, dec_a_deg, ra_b_deg, dec_b_deg, radius_arcsec, *, workers: int = -1) -> PairSet:
    """Every pair (a, b) closer than a radius on the sky.

    Parameters
    ----------
    ra_a_deg, dec_a_deg : array_like of float
        Positions of catalogue ``a`` (deg).
    ra_b_deg, dec_b_deg : array_like of float
        Positions of catalogue ``b`` (deg).
    radius_arcsec : float
        Match radius (arcsec); pairs with separation <= radius are returned.
    workers : int, optional
        Threads; -1 (default) uses every core available to the process.

    Returns
    -------
    PairSet
        Sorted by (index_a, separation, index_b), so the result does not depend on thread
        scheduling. Rows with a NaN or infinite position match nothing.

    Notes
    -----
    Both catalogues become unit vectors and are put in a coarse spatial order (cache locality). A
    k-d tree (Bentley 1975) is built on the smaller one, in a background thread while the larger one
    is being prepared, and the larger one asks it for its nearest neighbours within a chord a
    relative 1e-8 larger than ``2 sin(radius/2)``, on every core. Candidates whose chord lies within
    a relative 1e-9 of the radius are then re-tested with the exact inequality of
    :func:`astropy.coordinates.search_around_sky` (squared chord summed over x, y, z <= squared
    radius), so the pair set is identical to that reference. Separations are ``2 asin(chord/2)``,
    good to a few ulp at sub-arcsec scales where the cosine formula fails, and
    ``atan2(|u×v|, u·v)`` beyond 90 deg.
    """
    r = chord_from_arcsec(radius_arcsec)
    nthreads = worker_count(workers)
    ra_a, dec_a = as_1d(ra_a_deg, "ra_a_deg"), as_1d(dec_a_deg, "dec_a_deg")
    ra_b, dec_b = as_1d(ra_b_deg, "ra_b_deg"), as_1d(dec_b_deg, "dec_b_deg")
    if ra_a.shape != dec_a.shape or ra_b.shape != dec_b.shape:
        raise ValueError(f"positions of equal length needed; got ra_a_deg {ra_a.size}, dec_a_deg {dec_a.size}, "
                         f"ra_b_deg {ra_b.size}, dec_b_deg {dec_b.size}")
    if ra_a.size == 0 or ra_b.size == 0:
        for ra, dec in ((ra_a, dec_a), (ra_b, dec_b)):
            radec_to_xyz(ra, dec, workers=1)  # still reject out-of-range declinations
        return _empty_pairs()

    # tree on the smaller side: building is serial, querying runs on every core
    query_is_a = ra_a.size >= ra_b.size
    (ra_q, dec_q), (ra_t, dec_t) = ((ra_a, dec_a), (ra_b, dec_b)) if query_is_a else ((ra_b, dec_b), (ra_a, dec_a))
    xt, keep_t = _finite_rows(radec_to_xyz(ra_t, dec_t, workers=nthreads))
    # a tree over spatially sorted points builds twice as fast and has its leaves together in memory
    perm_t = _spatial_order(xt) if xt.shape[0] > _SMALL else None
    if perm_t is not None:
        xt = np.take(xt, perm_t, axis=0)
    background = None
    if nthreads > 1 and ra_q.size > _SMALL and xt.shape[0] > 0:
        background = ThreadPoolExecutor(max_workers=1)
        tree_job = background.submit(_build_tree, xt)  # cKDTree releases the GIL while building
    try:
        xq, keep_q = _finite_rows(radec_to_xyz(ra_q, dec_q, workers=nthreads))
        perm = _spatial_order(xq) if xq.shape[0] > _SMALL else None
        if perm is not None:
            xq = np.take(xq, perm, axis=0)
        if background is not None:
            tree = tree_job.result()
        elif xt.shape[0] and xq.shape[0]:
            tree = _build_tree(xt)
    finally:
        if background is not None:
            background.shutdown(wait=True)
    n_q, n_t = xq.shape[0], xt.shape[0]
    if n_q == 0 or n_t == 0:
        return _empty_pairs()

    rows, it, chord = _candidates(tree, n_t, xq, r * (1.0 + _BOUND_SLACK), nthreads)
    # the tree's own distances settle every candidate except those within rounding of the radius
    edge = np.flatnonzero(chord >= r * (1.0 - 1e-9))
    if edge.size:
        sq = _sq_chord(np.take(xq, rows[edge], axis=0), np.take(xt, it[edge], axis=0))
        inside = np.ones(rows.size, bool)
        inside[edge] = sq <= r * r
        chord[edge] = np.sqrt(sq)
        if not inside.all():
            rows, it, chord = rows[inside], it[inside], chord[inside]
    sep = _separation_arcsec(chord, lambda sel: (xq[rows[sel]], xt[it[sel]]))
    iq = perm[rows] if perm is not None else rows
    if perm_t is not None:
        it = perm_t[it]

    if query_is_a:
        ia, ib = iq, it
        m_a = n_q
        # grouped by query row in distance order already: scatter into index_a order, no sort needed
        count = np.bincount(ia, minlength=m_a)
        start = np.cumsum(count) - count
        pos = start[ia] + _rank_in_row(rows)
        order = np.empty_like(pos)
        order[pos] = np.arange(pos.size, dtype=np.int64)
    else:
        ia, ib = it, iq
        m_a = n_t
        order = np.argsort(ia, kind="stable")
    ia, ib, sep = ia[order], ib[order], sep[order]
    ia, ib, sep = _sort_within_groups(ia, ib, sep, m_a)
    keep_a, keep_b = (keep_q, keep_t) if query_is_a else (keep_t, keep_q)
    if keep_a is not None:
        ia = keep_a[ia]
    if keep_b is not None:
        ib = keep_b[ib]
    return PairSet(ia.astype(np.int64, copy=False), ib.astype(np.int64, copy=False), sep)


def _rank_in_row(rows: np.ndarray) -> np.ndarray:
    """0-based position of each candidate within its (contiguous) run of equal query row."""
    n = rows.size
    if n == 0:
        return rows
    first = np.ones(n, bool)
    first[1:] = rows[1:] != rows[:-1]
    at = np.arange(n, dtype=np.int64)
    return at - np.maximum.accumulate(np.where(first, at, 0))


def _check_pairs(pairs: PairSet, n: int, which: str, name: str) -> np.ndarray:
    idx = np.asarray(getattr(pairs, which), dtype=np.int64)
    if idx.ndim != 1 or np.asarray(pairs.separation_arcsec).shape != idx.shape \
            or np.asarray(pairs.index_a).shape != np.asarray(pairs.index_b).shape:
        raise ValueError("pairs must hold three one-dimensional arrays of equal length")
    if n < 0:
        raise ValueError(f"{name} = {n!r} must be non-negative")
    if idx.size and (idx.min() < 0 or idx.max() >= n):
        raise ValueError(f"pairs.{which} holds values outside [0, {name}) with {name} = {n}")
    return idx


def nearest_within(pairs: PairSet, n_a: int) -> NearestMatch:
    """The nearest ``b`` for every ``a``, from a pair set.

    Parameters
    ----------
    pairs : PairSet
        As returned by :func:`pairs_within` (any order is accepted).
    n_a : int
        Number of rows in catalogue ``a``.

    Returns
    -------
    NearestMatch
        Arrays of length ``n_a``. Equal separations are resolved in favour of the lower ``index_b``.
    """
    n_a = int(n_a)
    ia = _check_pairs(pairs, n_a, "index_a", "n_a")
    ib = np.asarray(pairs.index_b, dtype=np.int64)
    sep = np.asarray(pairs.separation_arcsec, dtype=np.float64)
    if ia.size > 1:
        step_a = np.diff(ia)
        same = step_a == 0
        ordered = np.all(step_a >= 0) and not np.any(
            same & ((sep[1:] < sep[:-1]) | ((sep[1:] == sep[:-1]) & (ib[1:] < ib[:-1]))))
        if not ordered:
            o = np.lexsort((ib, sep, ia))
            ia, ib, sep = ia[o], ib[o], sep[o]
    index_b = np.full(n_a, -1, np.int64)
    separation = np.full(n_a, np.nan)
    if ia.size:
        first = np.ones(ia.size, bool)
        first[1:] = ia[1:] != ia[:-1]
        index_b[ia[first]] = ib[first]
        separation[ia[first]] = sep[first]
    n_within = np.bincount(ia, minlength=n_a).astype(np.int64, copy=False)
    return NearestMatch(index_b, separation, n_within)


def count_within(pairs: PairSet, n_b: int) -> np.ndarray:
    """For each ``b``, how many ``a`` lie within the radius (the blend count).

    Parameters
    ----------
    pairs : PairSet
        As returned by :func:`pairs_within`.
    n_b : int
        Number of rows in catalogue ``b``.

    Returns
    -------
    numpy.ndarray of int64, length ``n_b``
    """
    n_b = int(n_b)
    ib = _check_pairs(pairs, n_b, "index_b", "n_b")
    return np.bincount(ib, minlength=n_b).astype(np.int64, copy=False)
