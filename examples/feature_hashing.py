"""Recall edited catalogue records from their hashed features, at 2**20 bits.

The scenario (invented): Thistlecombe Seed Exchange keeps a catalogue of
seed lots sent in by growers. Each record has a crop, a variety name, a
grower's region, a harvest year and a free-text description. Growers often
send a lot in again with the record edited (a word changed, a year
corrected, the description rewritten in part), and the exchange wants to
find the record it already holds.

Each record's features (``field=value`` pairs, description words and word
pairs) are hashed into a 2**20-bit code, one bit per feature — the usual
feature-hashing step, here with ``hashlib.blake2b`` so that no extra
package is needed. A code has a couple of hundred bits set out of about a
million, so the store keeps each row as its sorted set bits (4 bytes
each) and indexes only the bits in use.

The script builds the catalogue, stores it, recalls edited copies of
stored records with ``query_many`` and ``nearest``, and prints the recall,
the false hits, the memory per stored code beside what the set bits alone
take, and the same answers from a scipy.sparse product as a cross-check.

A hit says two records share many hashed features. It is a lead for a
person to confirm, not proof that two lots are the same: do not use it on
its own to accept, reject or pay for a lot.

Run::

    python examples/feature_hashing.py             # after `pip install .`
    PYTHONPATH=. python examples/feature_hashing.py   # from a source checkout
    python examples/feature_hashing.py --records 2000 --edits 100   # smaller
"""

from __future__ import annotations

import argparse
import hashlib

import numpy as np

from sparseindex import Codes, Store

BITS = 2**20
CROPS = ["bean", "squash", "tomato", "kale", "millet", "pea", "chard", "radish", "maize", "lentil"]
REGIONS = ["north fells", "salt marsh", "upper vale", "red downs", "east moor", "lake shore"]
SYLLABLES = ["bram", "wick", "olla", "fen", "tarn", "mor", "ely", "cas", "dun", "rill", "sk", "ew"]
ENDINGS = ["", "a", "o", "en", "ie", "ly", "ish", "er", "um", "et", "is", "an", "ow", "ith"]
#: the description vocabulary: 2,016 invented grower's words (two syllables and an ending)
WORDS = [a + b + end for a in SYLLABLES for b in SYLLABLES for end in ENDINGS]


def feature_bits(record: dict, bits: int = BITS) -> np.ndarray:
    """The record's hashed features: one bit per ``field=value``, description word and word pair."""
    words = record["description"].split()
    features = [f"{k}={record[k]}" for k in ("crop", "variety", "region", "year")]
    features += [f"w={w}" for w in words] + [f"p={a}_{b}" for a, b in zip(words, words[1:])]
    out = {int.from_bytes(hashlib.blake2b(f.encode(), digest_size=8).digest(), "little") % bits
           for f in features}
    return np.array(sorted(out), dtype=np.int64)


def make_records(n: int, rng: np.random.Generator) -> list:
    records = []
    for _ in range(n):
        variety = "".join(rng.choice(SYLLABLES, size=int(rng.integers(2, 4)))).capitalize()
        records.append({
            "crop": str(rng.choice(CROPS)), "variety": variety, "region": str(rng.choice(REGIONS)),
            "year": int(rng.integers(1995, 2026)),
            "description": " ".join(rng.choice(WORDS, size=int(rng.integers(40, 90)))),
        })
    return records


def edited(record: dict, rng: np.random.Generator) -> dict:
    """A resubmission: the year may change, and a fifth of the description words are rewritten."""
    words = record["description"].split()
    for i in rng.choice(len(words), size=len(words) // 5, replace=False):
        words[i] = str(rng.choice(WORDS))
    year = record["year"] + int(rng.integers(-1, 2))
    return dict(record, year=year, description=" ".join(words))


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description="Recall edited catalogue records from hashed features (2**20 bits).")
    p.add_argument("--records", type=int, default=20_000, help="catalogue records stored (default 20,000)")
    p.add_argument("--edits", type=int, default=500, help="edited resubmissions to recall (default 500)")
    p.add_argument("--seed", type=int, default=2)
    args = p.parse_args(argv)
    rng = np.random.default_rng(args.seed)

    records = make_records(args.records, rng)
    codes = Codes.from_indices([feature_bits(r) for r in records], bits=BITS)
    weights = codes.weights
    # a hit needs a third of the lighter code's features; the lightest record has tens of features
    threshold = int(weights.min()) // 3
    store = Store(BITS, threshold=threshold, seed=args.seed)
    ids = store.add(codes)
    set_bit_bytes = 4 * int(weights.sum())  # 4-byte indices at this width
    print(f"catalogue: {args.records:,} records hashed into {BITS:,} bits, {weights.mean():.0f} set on average "
          f"({weights.min()}..{weights.max()})")
    print(f"store: rows kept as {store.row_layout} indices; {store.nbytes / len(store):,.0f} bytes per code "
          f"(the set-bit indices alone take {set_bit_bytes / len(store):,.0f}); threshold {threshold}")

    picks = rng.choice(args.records, size=min(args.edits, args.records), replace=False)
    queries = Codes.from_indices([feature_bits(edited(records[int(i)], rng)) for i in picks], bits=BITS)
    hits = store.query_many(queries)
    found = sum(int(ids[i]) in h.ids for i, h in zip(picks, hits))
    false_hits = sum(int(np.count_nonzero(h.ids != ids[i])) for i, h in zip(picks, hits))
    best = [store.nearest(q, 1).ids for q in queries.to_indices()]
    top1 = sum(b.size and int(b[0]) == int(ids[i]) for i, b in zip(picks, best))
    print(f"recall of edited records: {found / len(picks):.3f} ({found:,} of {len(picks):,}); "
          f"nearest is the original for {top1:,}")
    print(f"false hits: {false_hits:,} in all ({false_hits / len(picks):.4f} per query)")

    # cross-check: the exact overlaps from a scipy.sparse product, thresholded the same way
    S = codes.to_scipy().tocsr().astype(np.int32)
    overlaps = (S @ queries.to_scipy().T.astype(np.int32)).toarray()
    same = all(np.array_equal(np.sort(h.ids), np.flatnonzero(overlaps[:, j] >= threshold))
               for j, h in enumerate(hits))
    print(f"store and scipy.sparse agree on every query: {'yes' if same else 'NO'}")
    print("a hit is a lead for a person to confirm, not proof that two lots are the same")
    return 0 if same else 1


if __name__ == "__main__":
    raise SystemExit(main())
