"""Slow, obviously correct reference implementations (plain Python sets).

Every fast path in the library is compared with these. Nothing here imports
the library's kernels.
"""

from __future__ import annotations

import numpy as np


def overlap(a: set, b: set) -> int:
    return len(a & b)


class NaiveStore:
    """The store's contract, written with sets.

    A code with id ``i`` is a hit for query ``q`` when some detector sample
    ``S`` of it has ``len(S & q) >= threshold``; with no samples given
    (``sample_size=None``, one detector) the sample is the whole code.
    """

    def __init__(self, threshold: int):
        self.threshold = threshold
        self.codes: dict[int, set] = {}
        self.samples: dict[int, list[set]] = {}
        self.next_id = 0

    def add(self, codes, samples=None) -> list[int]:
        ids = []
        for k, code in enumerate(codes):
            i = self.next_id
            self.next_id += 1
            self.codes[i] = set(int(x) for x in code)
            self.samples[i] = [set(s) for s in samples[k]] if samples is not None else [self.codes[i]]
            ids.append(i)
        return ids

    def remove(self, ids) -> None:
        for i in ids:
            del self.codes[i]
            del self.samples[i]

    def query(self, q, min_overlap=0) -> list[tuple[int, int]]:
        q = set(int(x) for x in q)
        hits = []
        for i, code in self.codes.items():
            if any(len(s & q) >= self.threshold for s in self.samples[i]):
                ov = len(code & q)
                if ov >= min_overlap:
                    hits.append((i, ov))
        hits.sort(key=lambda h: (-h[1], h[0]))
        return hits

    def nearest(self, q, k) -> list[tuple[int, int]]:
        q = set(int(x) for x in q)
        scored = sorted(((i, len(c & q)) for i, c in self.codes.items()), key=lambda h: (-h[1], h[0]))
        return scored[:k]


def random_code(rng: np.random.Generator, bits: int, weight: int) -> list[int]:
    return sorted(rng.choice(bits, size=weight, replace=False).tolist())


def noisy_copy(rng: np.random.Generator, code, bits: int, lose: int) -> list[int]:
    """Drop ``lose`` of the code's bits and add as many bits from outside it."""
    code = list(code)
    keep = rng.choice(len(code), size=len(code) - lose, replace=False)
    kept = {code[i] for i in keep}
    outside = np.setdiff1d(np.arange(bits), np.asarray(code))
    extra = rng.choice(outside, size=lose, replace=False)
    return sorted(kept | set(extra.tolist()))


def hits_as_pairs(hits) -> list[tuple[int, int]]:
    return list(zip(hits.ids.tolist(), hits.overlaps.tolist()))


def naive_find_or_add(stored: dict, batch, min_overlap: int, next_id: int):
    """The find_or_add rule, one code at a time, with sets.

    ``stored`` maps id -> set of bits (live codes only). Returns ``(ids,
    is_new)`` and leaves ``stored`` holding the additions.
    """
    ids, is_new = [], []
    for code in batch:
        code = set(int(x) for x in code)
        best = None
        for i, other in stored.items():
            ov = len(code & other)
            if ov >= min_overlap and (best is None or (-ov, i) < (-best[1], best[0])):
                best = (i, ov)
        if best is None:
            stored[next_id] = code
            ids.append(next_id)
            is_new.append(True)
            next_id += 1
        else:
            ids.append(best[0])
            is_new.append(False)
    return ids, is_new
