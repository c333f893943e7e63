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


def _candidates(near: np.ndarray, exact_src: np.ndarray, extra) -> tuple[np.ndarray, np.ndarray]:
    """Distinct (test, train) position pairs: hash-nearest within the radius, pixel-identical
    copies, and any extra pairs a judge asked for."""
    t = [np.flatnonzero(near >= 0), np.flatnonzero(exact_src >= 0)]
    r = [near[near >= 0], exact_src[exact_src >= 0]]
    if extra is not None and len(extra[0]):
        t.append(np.asarray(extra[0], np.int64)); r.append(np.asarray(extra[1], np.int64))
    t = np.concatenate(t).astype(np.int64); r = np.concatenate(r).astype(np.int64)
    width = int(r.max()) + 1 if len(r) else 1
    key = np.unique(t * width + r)
    return key // width, key % width


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
    judge=None,
    extra_pairs=None,
) -> CheckResult:
    """Copies of train images in the test split, told apart from look-alikes.

    Candidates are each test image's nearest train image by perceptual hash when within
    `radius` bits, pixel-identical pairs (equal content hashes) and `extra_pairs` (test, train
    positions). `judge(test_pos, train_pos)` decides which candidates are leaks and returns
    {"leak": bool array, optional "ambiguous": bool array, and evidence arrays shown beside
    each pair}; its attributes `method` and `numbers` are reported. Without a judge every
    candidate is a leak (a fixed radius). A leak fails (with near_fails=False only a
    pixel-identical one does, other leaks warn); pixel-identical images the judge explains,
    and ambiguous pairs, warn.
    """
    train_hash = np.asarray(train_hash, np.uint64); test_hash = np.asarray(test_hash, np.uint64)
    n_test = len(test_hash)
    train_ids = np.arange(len(train_hash)) if train_ids is None else np.asarray(train_ids)
    test_ids = np.arange(n_test) if test_ids is None else np.asarray(test_ids)
    index = HashIndex.build(train_hash, radius)
    dist, near = index.nearest_within(test_hash)
    exact_src = _exact_sources(train_sha, test_sha, n_test, len(train_hash))
    exact = exact_src >= 0
    near_dup = dist >= 0
    n_near = int(near_dup.sum())
    hist = np.bincount(dist[near_dup], minlength=radius + 1)[: radius + 1] if n_near else np.zeros(radius + 1, int)

    ct, cr = _candidates(near, exact_src, extra_pairs)
    verdicts, leak, ambiguous = _judged(judge, ct, cr)
    pair_exact = exact_src[ct] == cr if len(ct) else np.zeros(0, bool)
    is_leak_t, leak_exact, amb_t = (_any_per_test(n_test, ct, m) for m in (leak, leak & pair_exact, ambiguous & ~leak))
    design_exact = exact & ~is_leak_t & ~amb_t
    candidate_t = np.zeros(n_test, bool); candidate_t[ct] = True
    n_leak = int(is_leak_t.sum())
    numbers = {
        "method": "radius" if judge is None else getattr(judge, "method", "judge"),
        "n_test": int(n_test),
        "n_train": int(len(train_hash)),
        "radius_bits": int(radius),
        "n_near_duplicates": n_near,
        "fraction_near_duplicates": n_near / n_test if n_test else 0.0,
        "n_exact_duplicates": int(exact.sum()),
        "n_candidates": int(len(ct)),
        "n_leaks": n_leak,
        "n_lookalikes": int((candidate_t & ~is_leak_t & ~amb_t).sum()),
        "n_identical_by_design": int(design_exact.sum()),
        "n_ambiguous": int((amb_t & ~is_leak_t).sum()),
        "min_distance_bits": int(dist[near_dup].min()) if n_near else None,
        "distance_histogram": [int(v) for v in hist],
        "substrings": int(index.m),
        **(getattr(judge, "numbers", None) or {}),
    }
    if test_class is not None and n_test:
        numbers["per_class"] = _per_class(test_class, near_dup, exact, is_leak_t)
    frame = _pair_frame(ct, cr, test_ids, train_ids, test_hash, train_hash, pair_exact, leak, verdicts)
    worst = _most_telling(frame, worst_k)
    n_leak_exact = int(leak_exact.sum())
    verdict = _verdict(n_leak_exact, n_leak, near_fails, bool(design_exact.any() or amb_t.any()))
    detail = _detail(numbers, n_leak, n_leak_exact, worst, radius)
    return CheckResult("near_duplicates", verdict, numbers, worst, detail, pair,
                       arrays={"distance_histogram": hist})


def _pair_frame(ct, cr, test_ids, train_ids, test_hash, train_hash, pair_exact, leak, verdicts) -> pd.DataFrame:
    """Every candidate pair with its hash distance, verdict and the judge's evidence."""
    frame = pd.DataFrame({
        "test_row": ct,
        "test_id": test_ids[ct] if len(ct) else np.zeros(0, object),
        "hamming": hamming(test_hash[ct], train_hash[cr]).astype(int) if len(ct) else np.zeros(0, int),
        "exact_copy": pair_exact,
        "leak": leak,
        "train_row": cr,
        "train_id": ids_at(train_ids, cr),
    })
    for k, v in (verdicts or {}).items():
        if k not in ("leak", "ambiguous") and len(np.asarray(v)) == len(ct):
            frame[k] = np.asarray(v)
    return frame


def _verdict(n_leak_exact: int, n_leak: int, near_fails: bool, warn_anyway: bool) -> str:
    """A pixel-identical leak fails; another leak fails unless near_fails is off (then warns);
    pixel-identical images by design and ambiguous pairs warn."""
    if n_leak_exact or (n_leak and near_fails):
        return FAIL
    if n_leak or warn_anyway:
        return WARN
    return PASS


def _exact_sources(train_sha, test_sha, n_test: int, n_train: int) -> np.ndarray:
    """Per test image, the first train position with the same content hash (-1: none)."""
    exact_src = np.full(n_test, -1, np.int64)
    if train_sha is not None and test_sha is not None and n_train:
        def text(v):  # as str() writes each (a missing hash is "None"), kept as Python strings
            return np.array([str(x) for x in v], dtype=object)

        tsha = text(train_sha)
        # each content's first train position, by hashing (np.unique sorted the strings: 4x slower)
        first = np.flatnonzero(~pd.Series(tsha).duplicated().to_numpy())
        pos = pd.Index(tsha[first]).get_indexer(text(test_sha))
        exact_src[pos >= 0] = first[pos[pos >= 0]]
    return exact_src


def _judged(judge, ct: np.ndarray, cr: np.ndarray):
    """The judge's verdicts on the candidate pairs (None without one), and its leak and
    ambiguous masks (every candidate a leak without a judge)."""
    verdicts = judge(ct, cr) if judge is not None and len(ct) else None
    if verdicts is None:
        return None, np.ones(len(ct), bool), np.zeros(len(ct), bool)
    return (verdicts, np.asarray(verdicts["leak"], bool),
            np.asarray(verdicts.get("ambiguous", np.zeros(len(ct), bool)), bool))


def _any_per_test(n_test: int, ct: np.ndarray, flags: np.ndarray) -> np.ndarray:
    out = np.zeros(n_test, bool)
    np.logical_or.at(out, ct, flags)
    return out


def _per_class(test_class, near_dup: np.ndarray, exact: np.ndarray, is_leak: np.ndarray) -> dict:
    cls = pd.Series(np.asarray(test_class)).astype(str)
    return {
        str(k): {"n_test": int(len(g)), "n_near_duplicates": int(near_dup[g.index].sum()),
                 "n_exact_duplicates": int(exact[g.index].sum()), "n_leaks": int(is_leak[g.index].sum())}
        for k, g in cls.groupby(cls, sort=True)
    }


def _most_telling(frame: pd.DataFrame, worst_k: int) -> pd.DataFrame:
    """One row per test image, its most telling pair: a leak before a look-alike,
    pixel-identical first, then the closest by the judge's evidence (the likely source), then
    by hash; the worst_k of them."""
    evidence = next((c for c in ("cross", "delta") if c in frame), None)
    keys = ["leak", "exact_copy"] + ([evidence] if evidence else []) + ["hamming"]
    frame = frame.sort_values(keys, ascending=[False, False] + ([True] if evidence else []) + [True],
                              kind="stable", na_position="last").drop_duplicates("test_row")
    frame["rank"] = np.where(frame["leak"], np.where(frame["exact_copy"], -2, -1), frame["hamming"])
    return top_rows(frame, "rank", worst_k, ascending=True).drop(columns="rank")


def _detail(nb: dict, n_leak: int, n_leak_exact: int, worst: pd.DataFrame, radius: int) -> str:
    method = nb["method"]
    if n_leak:
        first = worst[worst["leak"]].iloc[0]
        how = {"render": "their pixels lie closer to a train image than to their own rows' renders",
               "pixels": "closer to a train image than distinct training images lie to each other",
               "hash": "their hashes lie closer to a train image than distinct training images' do",
               }.get(method, f"within {radius} bits of a train image")
        if first.get("copier") == "train":  # the test image is its render: a training image copies it
            return (f"{n_leak} test images are copied in the training split or copy train images ({n_leak_exact} "
                    f"pixel-identical): a training image lies far closer to a test image than to its own row's "
                    f"render; e.g. {first['train_id']} (a training image) copies {first['test_id']}")
        return (f"{n_leak} test images are copies of train images ({n_leak_exact} pixel-identical): {how}; "
                f"e.g. {first['test_id']} copies {first['train_id']}")
    parts = []
    if nb["n_identical_by_design"]:
        parts.append(f"{nb['n_identical_by_design']} test images are pixel-identical to a train image though each is "
                     "its own row's render: the design draws them alike (objects off the canvas, or an axis that "
                     "changes no pixel)")
    if nb["n_ambiguous"]:
        parts.append(f"{nb['n_ambiguous']} test images look like a train image and " + (
            "cannot be judged: a row of the pair cannot be re-rendered (see row_integrity)" if method == "render" else
            "hash as close to it as distinct training images hash to each other: the hash alone cannot tell copies here"))
    if nb["n_lookalikes"]:
        why = {"render": "each is explained by its own row's parameters (look-alikes by design)",
               "pixels": "their pixels differ as much as distinct training images do (look-alikes)"}.get(method, "")
        parts.append(f"no copies; {nb['n_lookalikes']} test images hash within {radius} bits of a train image, "
                     + why)
    if parts:
        return "; ".join(parts)
    return f"no test image within {radius} bits of any train image, no pixel-identical copies"
