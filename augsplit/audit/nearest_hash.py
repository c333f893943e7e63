"""Near-duplicate search over 64-bit hashes by multi-index hashing, and its audit check.

Multi-index hashing (Norouzi, Punjani & Fleet, CVPR 2012): cut the 64 bits into m
substrings; if two hashes differ in at most r bits, some substring differs in at most
floor(r / m) bits (pigeonhole), so probing each substring's table at that radius finds
every candidate; candidates are then verified with a full popcount. Exact, never sampled.
"""

from __future__ import annotations

from dataclasses import dataclass
from itertools import combinations
from math import comb, log2

import numpy as np
import pandas as pd

from .result import FAIL, PASS, WARN, CheckResult, ids_at, top_rows

NBITS = 64
_DIRECT_BITS = 22  # substrings up to this length get a dense offset table (<= 32 MiB)
_CHUNK = 1 << 22  # candidates verified per batch; bounds temporary memory (~100 MiB)


def hamming(a, b) -> np.ndarray:
    """Bitwise Hamming distance of uint64 arrays (broadcasting)."""
    return np.bitwise_count(np.bitwise_xor(np.asarray(a, np.uint64), np.asarray(b, np.uint64))).astype(np.int16)


def _substrings(m: int) -> list[tuple[int, int]]:
    """(shift, length) of m near-equal substrings covering the 64 bits."""
    base, extra = divmod(NBITS, m)
    out, shift = [], 0
    for j in range(m):
        length = base + (1 if j < extra else 0)
        out.append((shift, length))
        shift += length
    return out


def _flip_masks(length: int, radius: int) -> np.ndarray:
    """All masks of `length` bits with at most `radius` bits set (the probe offsets)."""
    masks = [0]
    for k in range(1, min(radius, length) + 1):
        for bits in combinations(range(length), k):
            masks.append(sum(1 << b for b in bits))
    return np.array(masks, dtype=np.uint64)


def _plan_cost(n: int, radius: int, m: int) -> float:
    # Probes cost one table look-up each; candidates one popcount each. Long substrings
    # use binary search (log n) instead of a dense table. A model, not a measurement.
    r_sub = radius // m
    cost = 0.0
    for _, length in _substrings(m):
        probes = sum(comb(length, k) for k in range(min(r_sub, length) + 1))
        lookup = 1.0 if length <= _DIRECT_BITS else max(1.0, log2(max(n, 2)))
        cost += probes * (lookup + n / 2.0 ** length)
    return cost


def choose_substrings(n: int, radius: int) -> int:
    """Number of substrings m minimising the modelled cost; 0 means brute force is cheaper."""
    best_m, best = 0, float(max(n, 1))  # brute force: one popcount per stored hash
    for m in range(1, 17):
        if sum(comb(NBITS // m + 1, k) for k in range(min(radius // m, NBITS // m + 1) + 1)) > 50_000:
            continue  # too many probes per query to hold in memory
        c = _plan_cost(n, radius, m)
        if c < best:
            best_m, best = m, c
    return best_m


@dataclass(frozen=True, eq=False)
class HashIndex:
    """Multi-index over distinct stored hashes for radius-`radius` queries."""

    hashes: np.ndarray  # distinct stored hashes, sorted
    first: np.ndarray  # for each distinct hash, the first row that holds it
    inverse: np.ndarray  # row -> position in `hashes`
    radius: int
    m: int
    tables: tuple  # per substring: (shift, length, order, offsets or sorted keys, masks)

    @classmethod
    def build(cls, hashes, radius: int, m: int | None = None) -> "HashIndex":
        h = np.asarray(hashes, dtype=np.uint64).ravel()
        if radius < 0 or radius >= NBITS:
            raise ValueError(f"radius must be in [0, {NBITS - 1}], got {radius}")
        uniq, first, inverse = np.unique(h, return_index=True, return_inverse=True)
        if m is None:
            m = choose_substrings(len(uniq), radius)
        tables = []
        if m > 0:
            r_sub = radius // m
            for shift, length in _substrings(m):
                keys = (uniq >> np.uint64(shift)) & np.uint64((1 << length) - 1)
                order = np.argsort(keys, kind="stable")
                if length <= _DIRECT_BITS:
                    counts = np.bincount(keys.astype(np.int64), minlength=1 << length).astype(np.int32)
                    starts = (np.cumsum(counts) - counts).astype(np.int64)
                    lookup = (starts, counts)
                else:
                    lookup = keys[order]
                tables.append((shift, length, order, lookup, _flip_masks(length, r_sub)))
        return cls(uniq, first, inverse, int(radius), int(m), tuple(tables))

    def _candidate_batches(self, q: np.ndarray):
        """Yield (query position, stored position) candidate arrays in bounded batches."""
        if self.m == 0:  # brute force over distinct hashes
            step = max(1, _CHUNK // max(len(self.hashes), 1))
            for s in range(0, len(q), step):
                qi = np.repeat(np.arange(s, min(s + step, len(q))), len(self.hashes))
                yield qi, np.tile(np.arange(len(self.hashes)), min(step, len(q) - s))
            return
        for shift, length, order, lookup, masks in self.tables:
            n_masks = len(masks)
            step = max(1, _CHUNK // (2 * n_masks))
            for s in range(0, len(q), step):
                qk = (q[s : s + step] >> np.uint64(shift)) & np.uint64((1 << length) - 1)
                probes = (qk[:, None] ^ masks[None, :]).ravel()
                if length <= _DIRECT_BITS:
                    # one gather of bucket sizes over all probes; starts only where non-empty
                    p = probes.astype(np.intp)
                    cnt = lookup[1][p]
                    nz = np.flatnonzero(cnt)
                    starts, counts = lookup[0][p[nz]], cnt[nz].astype(np.int64)
                else:
                    lo_ = np.searchsorted(lookup, probes, side="left")
                    hi_ = np.searchsorted(lookup, probes, side="right")
                    nz = np.flatnonzero(hi_ > lo_)
                    starts, counts = lo_[nz], (hi_ - lo_)[nz]
                owner = s + nz // n_masks
                yield from _expand(owner, starts, counts, order)

    def pairs_within(self, queries) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Every (query row, stored row, distance) with distance <= radius, sorted by rows."""
        q = np.asarray(queries, dtype=np.uint64).ravel()
        qu, qinv = np.unique(q, return_inverse=True)
        found_q, found_t, found_d = [], [], []
        for qi, ti in self._candidate_batches(qu):
            d = hamming(qu[qi], self.hashes[ti])
            keep = d <= self.radius
            found_q.append(qi[keep]); found_t.append(ti[keep]); found_d.append(d[keep])
        if not found_q:
            return (np.zeros(0, np.int64),) * 2 + (np.zeros(0, np.int16),)
        uq = np.concatenate(found_q); ut = np.concatenate(found_t); ud = np.concatenate(found_d)
        key = np.unique(uq.astype(np.int64) * len(self.hashes) + ut)  # one substring is enough
        uq, ut = key // max(len(self.hashes), 1), key % max(len(self.hashes), 1)
        ud = hamming(qu[uq], self.hashes[ut])
        # expand distinct hashes back to rows on both sides
        qrows = _group_rows(qinv, len(qu)); trows = _group_rows(self.inverse, len(self.hashes))
        out_q, out_t, out_d = [], [], []
        for a, b, d in zip(uq.tolist(), ut.tolist(), ud.tolist()):
            rq, rt = qrows[a], trows[b]
            out_q.append(np.repeat(rq, len(rt))); out_t.append(np.tile(rt, len(rq)))
            out_d.append(np.full(len(rq) * len(rt), d, np.int16))
        if not out_q:
            return (np.zeros(0, np.int64),) * 2 + (np.zeros(0, np.int16),)
        pq, pt, pd_ = np.concatenate(out_q), np.concatenate(out_t), np.concatenate(out_d)
        o = np.lexsort((pt, pq))
        return pq[o], pt[o], pd_[o]

    def nearest_within(self, queries) -> tuple[np.ndarray, np.ndarray]:
        """For each query: (smallest distance <= radius or -1, first stored row at it or -1)."""
        q = np.asarray(queries, dtype=np.uint64).ravel()
        qu, qinv = np.unique(q, return_inverse=True)
        best = np.full(len(qu), NBITS + 1, dtype=np.int64)
        arg = np.full(len(qu), -1, dtype=np.int64)
        for qi, ti in self._candidate_batches(qu):
            d = hamming(qu[qi], self.hashes[ti]).astype(np.int64)
            keep = d <= self.radius
            if not keep.any():
                continue
            qi, ti, d = qi[keep], ti[keep], d[keep]
            # the smallest distance per query, then the lowest stored row among ties
            rows = self.first[ti]
            o = np.lexsort((rows, d, qi))
            qi, d, rows = qi[o], d[o], rows[o]
            lead = np.r_[True, qi[1:] != qi[:-1]]
            qi, d, rows = qi[lead], d[lead], rows[lead]
            better = (d < best[qi]) | ((d == best[qi]) & (rows < arg[qi]))
            best[qi[better]] = d[better]; arg[qi[better]] = rows[better]
        dist = np.where(best <= self.radius, best, -1)
        return dist[qinv].astype(np.int16), np.where(dist >= 0, arg, -1)[qinv]


def _expand(owner, starts, counts, order):
    """Turn non-empty probe ranges [start, start+count) into (owner, stored index) pairs, batched."""
    if len(counts) == 0:
        return
    cum = np.cumsum(counts)
    lo = 0
    while lo < len(counts):
        base = cum[lo - 1] if lo else 0
        hi = int(np.searchsorted(cum, base + _CHUNK, side="right"))
        hi = max(hi, lo + 1)
        c = counts[lo:hi]
        total = int(c.sum())
        off = np.repeat(np.cumsum(c) - c, c)
        pos = np.arange(total) - off + np.repeat(starts[lo:hi], c)
        yield np.repeat(owner[lo:hi], c), order[pos]
        lo = hi


def _group_rows(inverse: np.ndarray, n: int) -> list[np.ndarray]:
    o = np.argsort(inverse, kind="stable")
    bounds = np.searchsorted(inverse[o], np.arange(n + 1))
    return [o[bounds[i] : bounds[i + 1]] for i in range(n)]


def nearest_hamming(train, test, radius: int, m: int | None = None) -> tuple[np.ndarray, np.ndarray]:
    """For each test hash: smallest Hamming distance to any train hash if <= radius, else -1;
    and the first train row at that distance (-1 when none)."""
    return HashIndex.build(train, radius, m).nearest_within(test)


def pairs_within(train, test, radius: int, m: int | None = None):
    """All (test row, train row, distance) pairs with distance <= radius."""
    return HashIndex.build(train, radius, m).pairs_within(test)


def check_near_duplicates(
    train_hash: np.ndarray,
    test_hash: np.ndarray,
    radius: int,
    train_sha=None,
    test_sha=None,
    train_ids=None,
    test_ids=None,
    test_class=None,
    pair: tuple[str, str] | None = None,
    worst_k: int = 20,
    near_fails: bool = True,
) -> CheckResult:
    """Near-duplicate and exact-duplicate images between two splits.

    Fails when any test image is an exact copy (same content hash) of a train image, or its
    perceptual hash lies within `radius` bits of a train image's; with near_fails=False (two
    splits drawn from one region, where look-alikes are expected) near-duplicates only warn.
    """
    train_hash = np.asarray(train_hash, np.uint64); test_hash = np.asarray(test_hash, np.uint64)
    n_test = len(test_hash)
    train_ids = np.arange(len(train_hash)) if train_ids is None else np.asarray(train_ids)
    test_ids = np.arange(n_test) if test_ids is None else np.asarray(test_ids)
    index = HashIndex.build(train_hash, radius)
    dist, near = index.nearest_within(test_hash)
    exact = np.zeros(n_test, dtype=bool)
    if train_sha is not None and test_sha is not None:
        exact = pd.Index(pd.unique(np.asarray(train_sha, dtype=object))).get_indexer(np.asarray(test_sha, dtype=object)) >= 0
    near_dup = dist >= 0
    n_near, n_exact = int(near_dup.sum()), int(exact.sum())
    hist = np.bincount(dist[near_dup], minlength=radius + 1)[: radius + 1] if n_near else np.zeros(radius + 1, int)
    numbers = {
        "n_test": int(n_test),
        "n_train": int(len(train_hash)),
        "radius_bits": int(radius),
        "n_near_duplicates": n_near,
        "fraction_near_duplicates": n_near / n_test if n_test else 0.0,
        "n_exact_duplicates": n_exact,
        "min_distance_bits": int(dist[near_dup].min()) if n_near else None,
        "distance_histogram": [int(v) for v in hist],
        "substrings": int(index.m),
    }
    if test_class is not None and n_test:
        cls = pd.Series(np.asarray(test_class)).astype(str)
        numbers["per_class"] = {
            str(k): {"n_test": int(len(g)), "n_near_duplicates": int(near_dup[g.index].sum()), "n_exact_duplicates": int(exact[g.index].sum())}
            for k, g in cls.groupby(cls, sort=True)
        }
    bad = near_dup | exact
    frame = pd.DataFrame({
        "test_row": np.flatnonzero(bad),
        "test_id": test_ids[bad],
        "hamming": dist[bad].astype(int),
        "exact_copy": exact[bad],
        "train_row": near[bad],
        "train_id": ids_at(train_ids, near[bad]),
    })
    frame["rank"] = np.where(frame["exact_copy"], -1, frame["hamming"])
    worst = top_rows(frame, "rank", worst_k, ascending=True).drop(columns="rank")
    verdict = FAIL if (n_exact or (n_near and near_fails)) else WARN if n_near else PASS
    detail = (f"{n_exact} exact copies and {n_near} test images within {radius} bits of a train image"
              if verdict != PASS else f"no test image within {radius} bits of any train image, no exact copies")
    return CheckResult("near_duplicates", verdict, numbers, worst, detail, pair,
                       arrays={"distance_histogram": hist})
