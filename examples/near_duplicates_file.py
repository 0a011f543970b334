"""Drop re-sent near-copies from a file of codes.

The scenario (invented): the Tamsel Reach weather buoys report every squall
as an event fingerprint, a 1024-bit code with 24 set bits (one per hashed
(sensor, time slot) cell that fired). The shore gateway retries an upload
when a link drops, and a retry may be re-read with a few cells changed, so
the day's file holds near-copies. Two reports of one squall share at least
20 of their 24 cells; reports of different squalls almost never share more
than a handful.

The script reads a ``.npy`` file of codes — a 2-D integer array with one
row of set-bit indices per code (``-1`` pads short rows), or a 2-D bool
array with one column per bit — groups the near-copies with
``sparseindex.near_duplicates``, and writes the codes it keeps (one per group, in
file order) and every code's label (the row of its group's first report).
Without an input file it first writes a sample day of 20,000 reports with
planted retries, and then checks what it found against what was planted.

Run::

    python examples/near_duplicates_file.py                          # sample data in a temporary folder
    python examples/near_duplicates_file.py squalls.npy --out kept.npy --labels labels.npy
    python examples/near_duplicates_file.py --reports 2000            # a smaller sample day
"""

from __future__ import annotations

import argparse
import os
import tempfile

import numpy as np

from sparseindex import Codes, label_near_duplicates
from sparseindex.near_duplicates import planted_duplicates

BITS = 1024  # cells a buoy fingerprint can mark
WEIGHT = 24  # cells per squall report
MIN_OVERLAP = 20  # shared cells that make two reports one squall


def read_codes(path: str) -> Codes:
    """Codes from a .npy file of index rows (-1 padding) or bool rows; pickles are refused."""
    arr = np.load(path, allow_pickle=False)
    if arr.ndim != 2:
        raise SystemExit(f"{path}: expected a 2-D array (one code per row), got shape {arr.shape}")
    if arr.dtype == np.bool_:
        return Codes.from_dense(arr)
    if arr.dtype.kind not in "iu":
        raise SystemExit(f"{path}: dtype {arr.dtype} is neither bool rows nor integer index rows")
    return Codes.from_indices([row[row >= 0] for row in arr], bits=BITS)


def write_sample(path: str, reports: int, seed: int):
    """A sample day: reports with 10% planted retries (0 to 4 cells changed); returns who copies whom."""
    codes, source, changed = planted_duplicates(reports, BITS, WEIGHT, fraction=0.1, max_changed=4, seed=seed)
    np.save(path, np.stack(codes.to_indices()).astype(np.int32), allow_pickle=False)
    return source


def main(argv=None) -> None:
    parser = argparse.ArgumentParser(description="Drop re-sent near-copies from a .npy file of codes.")
    parser.add_argument("input", nargs="?", help="codes: .npy index rows (-1 padding) or bool rows; "
                                                 "default: write a sample day first")
    parser.add_argument("--out", help="write the kept codes here (.npy index rows; default beside the input)")
    parser.add_argument("--labels", help="write every code's label here (.npy int64)")
    parser.add_argument("--min-overlap", type=int, default=MIN_OVERLAP,
                        help=f"shared cells that make two reports one squall (default {MIN_OVERLAP})")
    parser.add_argument("--reports", type=int, default=20_000, help="reports in the sample day (default 20,000)")
    parser.add_argument("--seed", type=int, default=5, help="seed of the sample day and the min-hashes")
    args = parser.parse_args(argv)

    source = None
    path = args.input
    if path is None:
        path = os.path.join(tempfile.mkdtemp(prefix="squalls-"), "squalls.npy")
        source = write_sample(path, args.reports, args.seed)
        print(f"wrote a sample day of {args.reports:,} buoy reports to {path}")
    codes = read_codes(path)
    print(f"read {len(codes):,} codes of {codes.bits:,} bits from {path} "
          f"({int(codes.weights.min())}..{int(codes.weights.max())} set bits)")

    labels, summary = label_near_duplicates(codes, min_overlap=args.min_overlap, mode="components", seed=args.seed,
                             return_summary=True)
    keep = np.flatnonzero(labels == np.arange(len(codes)))
    print(summary)

    out = args.out or os.path.splitext(path)[0] + ".kept.npy"
    kept = codes[keep].to_indices()
    width = max((len(r) for r in kept), default=0)
    matrix = np.full((len(kept), width), -1, dtype=np.int32)
    for i, r in enumerate(kept):
        matrix[i, : len(r)] = r
    np.save(out, matrix, allow_pickle=False)
    print(f"kept {keep.size:,} of {len(codes):,} codes (one per squall) -> {out}")
    if args.labels:
        np.save(args.labels, labels, allow_pickle=False)
        print(f"labels (row of each code's first report) -> {args.labels}")

    if source is not None:
        planted = np.flatnonzero(source >= 0)
        same = labels[planted] == labels[source[planted]]
        print(f"check against the planted retries: {int(same.sum()):,} of {planted.size:,} grouped with their "
              f"original; {keep.size - (len(codes) - planted.size):+,} groups beyond the originals")
    print("a match is probabilistic evidence, not proof: check kept and dropped codes before deleting anything "
          "that matters")


if __name__ == "__main__":
    main()
