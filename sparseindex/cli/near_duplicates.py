"""The ``sparseindex near-duplicates`` subcommand: label the near-duplicates in a file of codes.

Input files (never unpickled):

* ``.npy`` holding a 2-D **bool** array: one code per row, one column per bit
  (the width is the number of columns);
* ``.npy`` holding a 2-D **integer** array: one code per row, each row the
  set-bit indices of that code; ``-1`` entries are padding, so rows may hold
  fewer indices than the matrix has columns. The width is ``--bits``, or,
  without it, the largest index + 1 (overlaps, and so the labels, do not
  depend on the width; ``--bits`` only adds the range check);
* ``.npz`` written by ``scipy.sparse.save_npz``: rows are codes, stored
  entries must be 0 or 1.

``add_parser(subparsers)`` registers the subcommand; ``run(args)`` carries it
out and returns the exit status: 0, or 2 with one line on stderr for bad
input (missing file, wrong dtype or shape, indices outside the width or repeated
indices, a bad option value).
"""

from __future__ import annotations

import json
import os
import sys
import tempfile

import numpy as np

from .arguments import count, number
from ..codes import Codes
from ..near_duplicates.labelling import TqdmProgress, label_near_duplicates

__all__ = ["add_parser", "run", "load_codes", "InputError"]


class InputError(ValueError):
    """A file that cannot be read as codes; the message names the file and the fault.

    Examples
    --------
    >>> load_codes("missing.npy")
    Traceback (most recent call last):
    ...
    sparseindex.cli.near_duplicates.InputError: missing.npy: no such file
    >>> issubclass(InputError, ValueError)
    True
    """


def add_parser(subparsers):
    """Register ``label_near_duplicates`` on an argparse sub-parser collection; return it.

    Examples
    --------
    >>> import argparse
    >>> sub = argparse.ArgumentParser(prog="sparseindex").add_subparsers()
    >>> args = add_parser(sub).parse_args(["codes.npy", "--min-overlap", "32"])
    >>> args.input, args.min_overlap, args.mode, args.method, args.progress
    ('codes.npy', 32, 'first', 'auto', None)
    """
    p = subparsers.add_parser(
        "near-duplicates",
        help="label near-duplicate codes in a .npy or .npz file",
        description=(
            "Group the codes of INPUT whose full overlap (shared set bits) is at least "
            "MIN_OVERLAP, and write each code's label: the index of its group's "
            "representative. INPUT is a .npy file with a 2-D bool array (dense rows) or a "
            "2-D integer array (set-bit indices per row, -1 as padding), or a scipy.sparse "
            ".npz file. Every reported match is verified exactly."),
    )
    p.add_argument("input", metavar="INPUT", help="codes: .npy (bool rows or index matrix) or .npz (scipy.sparse)")
    p.add_argument("--min-overlap", type=count, required=True, dest="min_overlap",
                   help="shared set bits that make two codes duplicates")
    p.add_argument("--mode", choices=("first", "components"), default="first",
                   help="first: join the earlier representative of greatest overlap (default); "
                        "components: connected components of the match relation")
    p.add_argument("--method", choices=("auto", "banding", "index"), default="auto",
                   help="auto (default): exact index when cheap, else banded min-wise hashing")
    p.add_argument("--recall", type=number, default=0.99,
                   help="banding: least chance of finding the hardest matching pair (default 0.99)")
    p.add_argument("--seed", type=count, default=None, help="seed of the min-hash functions (default: fresh)")
    p.add_argument("--bits", type=count, default=None,
                   help="code width for an index matrix (default: largest index + 1)")
    p.add_argument("--out", default=None, help="write the labels (int64) to this .npy file")
    p.add_argument("--json", action="store_true", help="print the summary as JSON")
    shown = p.add_mutually_exclusive_group()
    shown.add_argument("--progress", dest="progress", action="store_const", const=True, default=None,
                       help="always draw progress bars on stderr (default: only on a terminal)")
    shown.add_argument("--no-progress", dest="progress", action="store_const", const=False,
                       help="never draw progress bars")
    p.set_defaults(func=run)
    return p


def _index_matrix(path, arr, bits) -> Codes:
    arr = np.asarray(arr)
    low = np.flatnonzero(arr.reshape(-1) < -1)
    if low.size:
        r, c = divmod(int(low[0]), arr.shape[1])
        raise InputError(f"{path}: row {r}: bit index {int(arr[r, c])} is negative (-1 is the only padding value)")
    if bits is None:
        bits = max(1, int(arr.max()) + 1) if arr.size else 1
    mask = arr >= 0
    if mask.all():
        return Codes.from_indices(arr, bits)
    import scipy.sparse as sp

    indptr = np.zeros(arr.shape[0] + 1, dtype=np.int64)
    np.cumsum(mask.sum(axis=1), out=indptr[1:])
    flat = arr[mask].astype(np.int64)
    high = np.flatnonzero(flat >= bits)
    if high.size:
        p = int(high[0])
        r = int(np.searchsorted(indptr, p, side="right") - 1)
        raise InputError(f"{path}: row {r}: bit index {int(flat[p])} is out of range for bits={bits} "
                         f"(valid 0..{bits - 1})")
    matrix = sp.csr_matrix((np.ones(flat.size, dtype=np.int8), flat, indptr), shape=(arr.shape[0], bits))
    return Codes.from_scipy(matrix)


def load_codes(path, bits=None) -> Codes:
    """Read a file of codes (see the module docs); InputError naming the file on any fault.

    Examples
    --------
    >>> import os, tempfile
    >>> path = os.path.join(tempfile.mkdtemp(), "codes.npy")
    >>> np.save(path, np.array([[1, 2, 3, -1], [1, 2, 3, 4], [7, 8, 9, 10]]))   # -1 pads a short row
    >>> codes = load_codes(path)
    >>> len(codes), codes.bits, codes.weights.tolist()
    (3, 11, [3, 4, 4])
    >>> load_codes(path, bits=8)
    Traceback (most recent call last):
    ...
    sparseindex.cli.near_duplicates.InputError: ...codes.npy: row 2: bit index 8 is out of range for bits=8 (valid 0..7)
    """
    if not os.path.exists(path):
        raise InputError(f"{path}: no such file")
    if os.path.isdir(path):
        raise InputError(f"{path}: is a folder, not a file of codes")
    ext = os.path.splitext(path)[1].lower()
    try:
        if ext == ".npy":
            with open(path, "rb") as f:
                if f.read(6) != b"\x93NUMPY":
                    raise InputError(f"{path}: not a .npy file (no NumPy header)")
            try:
                arr = np.load(path, mmap_mode="r", allow_pickle=False)
            except ValueError as exc:
                if "object" in str(exc).lower():
                    raise InputError(f"{path}: holds Python objects (dtype object); expected a bool or integer "
                                     "array (pickles are never loaded)") from None
                raise InputError(f"{path}: not a readable .npy array ({' '.join(str(exc).split())})") from None
            if not isinstance(arr, np.ndarray):
                raise InputError(f"{path}: holds {type(arr).__name__}, not one array")
            if arr.ndim != 2:
                raise InputError(f"{path}: expected a 2-D array (one code per row), got shape {arr.shape}")
            if arr.dtype == np.bool_:
                if bits is not None and bits != arr.shape[1]:
                    raise InputError(f"{path}: bool rows are {arr.shape[1]} bits wide, but --bits={bits}")
                return Codes.from_dense(np.asarray(arr))
            if arr.dtype.kind in "iu":
                return _index_matrix(path, arr, bits)
            raise InputError(
                f"{path}: dtype {arr.dtype} is neither bool (dense rows) nor integer (set-bit indices per row)")
        if ext == ".npz":
            import scipy.sparse as sp

            try:
                matrix = sp.load_npz(path)
            except (ValueError, KeyError, OSError) as exc:
                raise InputError(f"{path}: not a scipy.sparse .npz file ({' '.join(str(exc).split())})") from None
            if bits is not None and bits != matrix.shape[1]:
                raise InputError(f"{path}: sparse rows are {matrix.shape[1]} bits wide, but --bits={bits}")
            return Codes.from_scipy(matrix)
    except InputError:
        raise
    except (ValueError, TypeError) as exc:
        raise InputError(f"{path}: {' '.join(str(exc).split())}") from None
    except OSError as exc:
        raise InputError(f"{path}: cannot read ({exc.strerror or exc})") from None
    raise InputError(f"{path}: unknown file type {ext or '(none)'!r}; expected .npy or .npz")


def _check_out(out):
    if out is None:
        return None
    if not out.endswith(".npy"):
        raise InputError(f"--out {out}: the labels file must end in .npy")
    folder = os.path.dirname(os.path.abspath(out))
    if not os.path.isdir(folder):
        raise InputError(f"--out {out}: folder {folder} does not exist")
    if not os.access(folder, os.W_OK):
        raise InputError(f"--out {out}: folder {folder} is not writable")
    return out


def _save_labels(out, labels):
    """Write the labels beside their destination, then move them into place."""
    folder = os.path.dirname(os.path.abspath(out))
    fd, tmp = tempfile.mkstemp(prefix=".labels-", suffix=".npy", dir=folder)
    try:
        with os.fdopen(fd, "wb") as f:
            np.save(f, labels, allow_pickle=False)
        os.replace(tmp, out)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise


def run(args):
    """Carry out ``sparseindex near-duplicates``; return the exit status.

    Examples
    --------
    >>> import argparse, contextlib, io, os, tempfile
    >>> path = os.path.join(tempfile.mkdtemp(), "codes.npy")
    >>> np.save(path, np.array([[1, 2, 3, 5], [1, 2, 3, 4], [7, 8, 9, 10]]))
    >>> args = argparse.Namespace(input=path, min_overlap=3, mode="first", method="auto", recall=0.99, seed=None,
    ...                           bits=None, out=path[:-4] + ".labels.npy", json=False, progress=False)
    >>> out = io.StringIO()
    >>> with contextlib.redirect_stdout(out):
    ...     status = run(args)
    >>> status, np.load(args.out).tolist()
    (0, [0, 0, 2])
    >>> run(argparse.Namespace(**{**vars(args), "input": path + ".missing"}))
    2
    """
    show = args.progress if args.progress is not None else sys.stderr.isatty()
    bar = TqdmProgress(delay=0.0 if args.progress else 0.5) if show else None
    try:
        out = _check_out(args.out)
        codes = load_codes(args.input, args.bits)
        labels, summary = label_near_duplicates(codes, min_overlap=args.min_overlap, mode=args.mode, method=args.method,
                                 recall=args.recall, seed=args.seed, progress=bar or False, return_summary=True)
    except (InputError, ValueError, TypeError) as exc:
        message = " ".join(str(exc).split())
        print(f"sparseindex near-duplicates: {message}", file=sys.stderr)
        return 2
    finally:
        if bar is not None:
            bar.close()
    if out is not None:
        _save_labels(out, labels)
    if args.json:
        record = summary.to_dict()
        record.update(input=args.input, out=out)
        print(json.dumps(record, indent=2))
    else:
        print(f"sparseindex near-duplicates: {args.input}")
        print(str(summary))
        if out is not None:
            print(f"  labels: {out} ({labels.shape[0]:,} int64, label = index of the group's representative)")
    return 0
