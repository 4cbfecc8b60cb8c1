"""Symmetry-inequivalent placements of point defects on the sites of a periodic supercell.

:func:`site_permutations` turns the space-group operations spglib finds for the supercell
(lattice translations included) into permutations of the sites; :func:`count_placements`
counts the placements exactly, so that too large a request is refused before anything is
allocated; :func:`distinct_placements` enumerates them and returns one representative
(the lexicographically smallest member) and the size of each orbit.

A *request* is ``(hosts, count)``: take ``count`` of the site indices ``hosts``. Requests
are labelled (a vacancy and a substitution swapped is another placement), the sites of one
request are unordered, and no site is used twice.
"""
from __future__ import annotations

import math
import warnings

import numpy as np
from scipy.spatial import cKDTree

#: Largest number of placements :func:`distinct_placements` enumerates.
MAX_PLACEMENTS = 1_000_000

#: Site-matching tolerance in fractional units of the cell (per axis, Chebyshev distance).
MATCH_TOL = 1e-4

#: Elements of a temporary (rows x candidates x sites) array built at once while
#: combining overlapping requests; bounds memory, not results.
_CHUNK = 1 << 22


class TooManyPlacements(ValueError):
    """More placements (``count``) than the enumeration limit (``limit``)."""

    def __init__(self, count: int, limit: int):
        super().__init__(f"{count:,} placements exceed the limit of {limit:,}")
        self.count = count
        self.limit = limit


def _wrap(x: np.ndarray) -> np.ndarray:
    """Fractional coordinates in [0, 1): x - floor(x) can round to exactly 1.0 for a tiny
    negative x, which a periodic cKDTree (boxsize 1) refuses."""
    x = x - np.floor(x)
    x[x >= 1.0] = 0.0
    return x


def _matcher(frac: np.ndarray, types: np.ndarray, tol: float):
    """Function mapping image coordinates (m, n, 3) of the n sites to site indices (m, n).

    One periodic tree per type: an image must land on a site of its own type.
    """
    trees = [(idx, cKDTree(_wrap(frac[idx]), boxsize=1.0))
             for idx in (np.flatnonzero(types == t) for t in np.unique(types))]

    def match(images: np.ndarray) -> np.ndarray:
        out = np.empty(images.shape[:2], np.int64)
        for idx, tree in trees:
            dist, j = tree.query(_wrap(images[:, idx].reshape(-1, 3)), p=np.inf)
            if dist.size and dist.max() > tol:
                raise RuntimeError(f"a symmetry operation maps a site {dist.max():.2g} "
                                   f"(fractional) off every site of its type")
            out[:, idx] = idx[j].reshape(len(images), len(idx))
        if not (np.sort(out, axis=1) == np.arange(out.shape[1])).all():
            raise RuntimeError("a symmetry operation maps two sites onto one "
                               "(sites closer than the matching tolerance?)")
        return out

    return match


def site_permutations(cell, frac, types, symprec: float = 1e-5) -> np.ndarray:
    """Space-group operations of a periodic structure as permutations of its sites.

    Args:
        cell: (3, 3) lattice vectors as rows, Angstrom.
        frac: (n, 3) fractional coordinates of the sites.
        types: (n,) ints; sites of different type are never exchanged (sublattices,
            interstitial sites given as extra sites of their own type).
        symprec: spglib tolerance, Angstrom.

    Returns:
        (n_ops, n) int64, ``perm[g, i]`` = the site that site i goes to under operation g.
        Row 0 is the identity, duplicated rows are removed, the rest keep spglib's order.

    Raises RuntimeError if spglib finds no symmetry or an operation maps a site off every
    site of its type (within ``max(MATCH_TOL, 2 symprec |b|)`` fractional, b the
    reciprocal vectors, so a loose symprec is honoured).
    """
    import spglib

    cell = np.asarray(cell, float)
    frac = np.asarray(frac, float).reshape(-1, 3)
    types = np.asarray(types).astype(np.intc).ravel()
    n = len(frac)
    with warnings.catch_warnings():
        # spglib 2.x warns about its error-handling mode on every call
        warnings.simplefilter("ignore", DeprecationWarning)
        sym = spglib.get_symmetry((cell, frac, types), symprec=symprec)
    if sym is None or len(sym["rotations"]) == 0:
        raise RuntimeError("spglib found no symmetry operations")
    rots = np.asarray(sym["rotations"], np.int64).reshape(-1, 9)
    trans = np.asarray(sym["translations"], float)
    recip = np.linalg.norm(np.linalg.inv(cell), axis=0)  # |b_i|, 1/Angstrom
    tol = max(MATCH_TOL, 2.0 * symprec * recip.max())
    match = _matcher(frac, types, tol)

    # Pure translations (rotation = identity) are mapped once ...
    rot_ids, rot_of_op = np.unique(rots, axis=0, return_inverse=True)
    rot_of_op = rot_of_op.ravel()
    ident = np.flatnonzero((rot_ids == np.eye(3, dtype=np.int64).ravel()).all(axis=1))
    if len(ident) == 0:
        raise RuntimeError("spglib returned no identity rotation")
    pure = trans[rot_of_op == ident[0]]
    t_perm = match(frac[None] + pure[:, None])
    t_tree = cKDTree(_wrap(pure), boxsize=1.0)

    # ... and an operation (R, t) is the coset representative (R, t0) of its rotation
    # followed by the pure translation t - t0: perm = T[t - t0][perm(R, t0)]. This maps
    # only n_rotations * n points instead of n_ops * n.
    perms = np.empty((len(trans), n), np.int64)
    for r in range(len(rot_ids)):
        ops = np.flatnonzero(rot_of_op == r)
        rmat = rot_ids[r].reshape(3, 3).astype(float)
        base = match((frac @ rmat.T + trans[ops[0]])[None])[0]
        dist, j = t_tree.query(_wrap(trans[ops] - trans[ops[0]]), p=np.inf)
        ok = dist <= tol
        perms[ops[ok]] = t_perm[j[ok]][:, base]
        if not ok.all():  # not a group coset (should not happen): map those directly
            perms[ops[~ok]] = match(frac[None] @ rmat.T + trans[ops[~ok]][:, None])

    # Duplicates (e.g. a mirror through a flat structure) compared as raw bytes.
    keys = np.ascontiguousarray(perms).view(np.dtype((np.void, 8 * n))).ravel()
    perms = perms[np.sort(np.unique(keys, return_index=True)[1])]
    is_id = (perms == np.arange(n)).all(axis=1)
    if not is_id.any():
        raise RuntimeError("no identity among the symmetry operations")
    return np.concatenate([perms[is_id], perms[~is_id]])


def _requests(groups) -> list[tuple[np.ndarray, int]]:
    """Groups as (sorted unique int64 hosts, int count), counts checked."""
    out = [(np.unique(np.asarray(h, np.int64).ravel()), int(c)) for h, c in groups]
    if any(c < 0 for _, c in out):
        raise ValueError("negative count in a request")
    return out


def count_placements(groups) -> int:
    """Exact number of placements of the requests ``groups`` = [(hosts, count), ...].

    Sites are split into classes by the set of requests allowed on them; giving x[r] of a
    class's s sites to each of its requests r (in order) can be done in
    prod_r C(s - x[earlier], x[r]) ways. A DP over classes sums this over allocations, the
    state being the counts still to place (exact Python ints in object arrays, vectorized
    over states x allocations). A request's allocation is forced in its last class and
    classes are taken greedily to keep few requests part-placed, so identical or disjoint
    host sets cost one step each; only partially overlapping requests branch.
    """
    reqs = [(h, c) for h, c in _requests(groups) if c > 0]
    if not reqs:
        return 1
    if any(len(h) < c for h, c in reqs):
        return 0
    counts = np.array([c for _, c in reqs], np.int64)
    sites = np.unique(np.concatenate([h for h, _ in reqs]))
    member = np.stack([np.isin(sites, h) for h, _ in reqs], axis=1)  # (sites, requests)
    sigs, sizes = np.unique(member, axis=0, return_counts=True)
    order, left, started = [], list(range(len(sigs))), np.zeros(len(reqs), bool)
    while left:  # greedy: fewest part-placed requests after each class, then fewest starts
        def cost(k):
            done = ~sigs[[m for m in left if m != k]].any(axis=0)
            return int(((started | sigs[k]) & ~done).sum()), int((sigs[k] & ~started).sum())
        k = min(left, key=cost)
        left.remove(k)
        order.append(k)
        started |= sigs[k]
    last = {r: max(i for i, k in enumerate(order) if sigs[k, r]) for r in range(len(reqs))}
    rem = counts[None].copy()                   # states: counts still to place
    ways = np.array([1], dtype=object)
    for step, k in enumerate(order):
        s, users = int(sizes[k]), np.flatnonzero(sigs[k])
        free = [r for r in users if last[r] != step]
        dims = [min(int(counts[r]), s) + 1 for r in free]
        grid = np.indices(dims).reshape(len(free), -1).T if free else np.zeros((1, 0), int)
        grid = grid[grid.sum(axis=1) <= s]      # (Q, free) allocations to free users
        chunk = max(1, _CHUNK // (len(grid) * len(users)))
        parts = []
        for c0 in range(0, len(rem), chunk):  # bounded memory for states x allocations
            r_c = rem[c0:c0 + chunk]
            x = np.repeat(r_c[:, None, users], len(grid), axis=1)  # forced: all left
            x[:, :, np.searchsorted(users, free)] = grid[None]
            si, qi = np.nonzero((x <= r_c[:, None, users]).all(axis=2) & (x.sum(axis=2) <= s))
            x = x[si, qi]
            # exact multinomial as a product of binomials, one user after another
            before = s - np.cumsum(x, axis=1) + x
            new_rem = r_c[si]
            new_rem[:, users] -= x
            # binomials computed once per distinct (a, b) pair, exact Python ints
            ab, inv = np.unique(before * (s + 1) + x, return_inverse=True)
            binom = np.array([math.comb(*divmod(int(v), s + 1)) for v in ab], dtype=object)
            coef = np.prod(binom[inv.reshape(x.shape)], axis=1)
            parts.append(_sum_by_state(new_rem, ways[c0:c0 + chunk][si] * coef, counts))
        rem, ways = _sum_by_state(np.concatenate([p[0] for p in parts]),
                                  np.concatenate([p[1] for p in parts]), counts)
        if len(rem) == 0:
            return 0
    return int(ways[0])


def _sum_by_state(rem: np.ndarray, ways: np.ndarray, counts: np.ndarray):
    """Unique rows of ``rem`` (counts still to place) and the summed ``ways`` of each."""
    if len(rem) == 0:
        return rem, ways
    if math.prod(int(c) + 1 for c in counts) < 2 ** 63:  # mixed-radix int64 keys
        radix = np.r_[counts[1:] + 1, 1][::-1].cumprod()[::-1]
        _, first, inv = np.unique(rem @ radix, return_index=True, return_inverse=True)
    else:
        _, first, inv = np.unique(rem, axis=0, return_index=True, return_inverse=True)
    srt = np.argsort(inv.ravel(), kind="stable")
    starts = np.flatnonzero(np.r_[True, np.diff(inv.ravel()[srt]) != 0])
    return rem[first], np.add.reduceat(ways[srt], starts)


def _combinations(n: int, c: int) -> np.ndarray:
    """All c-subsets of range(n) as ascending rows, in lexicographic order, (C(n, c), c).

    Built column by column: each row is repeated once per admissible next element
    (greater than its last, leaving room for the columns still to come)."""
    rows = np.zeros((1, 0), np.int64)
    for j in range(c):
        last = rows[:, -1] if j else np.full(len(rows), -1, np.int64)
        reps = np.clip(n - c + j - last, 0, None)
        start = np.cumsum(reps) - reps
        owner = np.repeat(np.arange(len(rows)), reps)
        nxt = last[owner] + 1 + np.arange(len(owner)) - start[owner]
        rows = np.column_stack([rows[owner], nxt])
    return rows


def _all_placements(reqs, n_sites: int) -> np.ndarray:
    """Every placement as a row (request 0's sites ascending, then request 1's, ...),
    in lexicographic order: rows so far x combinations of the next request, dropping
    rows that reuse a site (checked only when the hosts overlap earlier ones)."""
    rows = np.zeros((1, 0), np.int64)
    seen = np.zeros(n_sites, bool)
    for hosts, c in reqs:
        comb = hosts[_combinations(len(hosts), c)]
        overlap = bool(seen[hosts].any())
        seen[hosts] = True
        q, m = len(comb), len(rows)
        if not overlap:
            rows = np.column_stack([np.repeat(rows, q, axis=0), np.tile(comb, (m, 1))])
            continue
        step = max(1, _CHUNK // max(q * max(c, 1), n_sites))
        parts = []
        for s in range(0, m, step):
            blk = rows[s:s + step]
            b = np.arange(len(blk))
            used = np.zeros((len(blk), n_sites), bool)
            used[b[:, None], blk] = True
            ri, ci = np.repeat(b, q), np.tile(np.arange(q), len(blk))
            ok = ~used[ri[:, None], comb[ci]].any(axis=1)
            parts.append(np.column_stack([blk[ri[ok]], comb[ci[ok]]]))
        rows = np.concatenate(parts) if parts else np.zeros((0, rows.shape[1] + c), np.int64)
    return rows


def _encoder(n_sites: int, k: int):
    """Rows (m, k) of site indices -> sortable keys with the rows' lexicographic order:
    a mixed-radix int64 when n_sites**k fits, else big-endian bytes viewed as np.void."""
    if n_sites ** k < 2 ** 63:
        weights = n_sites ** np.arange(k - 1, -1, -1, dtype=np.int64)
        return lambda rows: rows @ weights
    be = np.dtype(">u2" if n_sites <= 1 << 16 else ">u4" if n_sites <= 1 << 32 else ">u8")
    void = np.dtype((np.void, be.itemsize * k))
    return lambda rows: np.ascontiguousarray(rows.astype(be)).view(void).ravel()


def distinct_placements(perms, groups, limit: int = MAX_PLACEMENTS
                        ) -> tuple[np.ndarray, np.ndarray]:
    """Symmetry-inequivalent placements of the requests under the group of ``perms``.

    Args:
        perms: (n_ops, n) site permutations (:func:`site_permutations`); each must map
            every request's host set onto itself.
        groups: [(hosts, count), ...] as for :func:`count_placements`.
        limit: largest number of placements to enumerate.

    Returns:
        (representatives (n_configs, k) int64, multiplicities (n_configs,) int64),
        k = total count; the columns are request 0's sites ascending, then request 1's...
        Each representative is the lexicographic minimum of its orbit, configurations are
        in ascending order, multiplicities (orbit sizes) sum to count_placements(groups).

    Raises TooManyPlacements (before allocating) when there are more than ``limit``
    placements, ValueError when a host index is out of range or perms do not keep a
    request's hosts.
    """
    perms = np.asarray(perms, np.int64)
    reqs = _requests(groups)
    total = count_placements(groups)
    if total > limit:
        raise TooManyPlacements(total, limit)
    n_sites = perms.shape[1]
    k = sum(c for _, c in reqs)
    if any(len(h) and (h[0] < 0 or h[-1] >= n_sites) for h, _ in reqs):
        raise ValueError(f"host site index outside 0..{n_sites - 1}")
    if total == 0:
        return np.zeros((0, k), np.int64), np.zeros(0, np.int64)
    rows = _all_placements(reqs, n_sites)
    encode = _encoder(n_sites, k)
    keys = encode(rows)
    bounds = np.cumsum([0] + [c for _, c in reqs])
    spans = [(a, b) for a, b in zip(bounds[:-1], bounds[1:]) if b - a > 1]
    todo = np.ones(len(rows), bool)
    reps, mult, i = [], [], 0
    while True:  # one pass per orbit; the pointer only moves forward
        i += int(np.argmax(todo[i:]))
        if not todo[i]:
            break
        images = perms[:, rows[i]]
        for a, b in spans:  # sites within one request are unordered
            images[:, a:b].sort(axis=1)
        found = np.unique(encode(images))
        pos = np.searchsorted(keys, found)
        if (pos >= len(keys)).any() or (keys[np.minimum(pos, len(keys) - 1)] != found).any():
            raise ValueError("a permutation maps a request's sites outside its hosts")
        todo[pos] = False
        reps.append(i)
        mult.append(len(found))
    return rows[reps], np.asarray(mult, np.int64)
