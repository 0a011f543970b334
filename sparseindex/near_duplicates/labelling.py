"""Near-duplicate detection over a batch of codes: :func:`label_near_duplicates`.

Two codes *match* when their full overlap (shared set bits) is at least
``min_overlap``. :func:`label_near_duplicates` labels every code with the index of its
group's representative:

* ``mode="first"`` — codes in order; a code joins the earlier
  *representative* (a code not itself merged) of greatest overlap
  ``>= min_overlap``, ties to the smaller index; with none it becomes a
  representative. Representatives never match each other, so deduping them
  again merges nothing. This is the rule an insert-only-what-is-new store
  follows.
* ``mode="components"`` — connected components of the match relation
  (union–find, Tarjan 1975); the label is the component's smallest index.

Matching pairs are found by one of two methods, both verifying every pair
exactly on the packed codes (AND + popcount), so no reported match is ever
wrong:

* ``"index"`` — exact: every distinct code is stored in a
  :class:`~sparseindex.Store` whose single detector holds all of the
  code's set bits with ``threshold=min_overlap``, so it fires exactly when
  the overlap reaches the threshold; codes are added chunk by chunk and each
  chunk queries the codes stored so far. Finds every pair (recall 1);
  costs about ``sum over bits of usage**2 / 2`` counter updates, quadratic
  in the number of codes.
* ``"banding"`` — banded min-wise hashing (Broder 1997; Leskovec, Rajaraman
  & Ullman, *Mining of Massive Datasets*, ch. 3): codes sharing all min-hashes
  of some band become candidates. A matching pair has Jaccard similarity at
  least ``m / (|A| + |B| - m)``; the bands are chosen so that the hardest
  pair the data can hold (the two heaviest codes at overlap exactly ``m``)
  is a candidate with chance at least ``recall``. Near-linear work.
* ``"auto"`` — the exact index when its predicted time is at most
  :data:`EXACT_BUDGET_SECONDS` or at most banding's; banding otherwise. The
  summary says which was picked and why.

Codes lighter than ``min_overlap`` can match nothing and stay alone;
exact copies are grouped first, so a code repeated many times costs nothing
quadratic.

Every merge rests on a pair verified exactly (AND + popcount), so a code is
never merged with one it does not match (precision 1). With banding a
matching pair can be missed with chance at most ``1 - recall`` (the
summary's ``predicted_recall``); a missed pair splits a group or, in mode
``"first"``, may give a code another representative. Cost: banding
O(set bits · bands · rows + codes · bands · log codes + candidates); index
about ``sum over bits of usage**2 / 2`` counter updates. Memory: the codes
plus ``8 · bands`` bytes per code (banding) or the postings of a store
(index).
"""

from __future__ import annotations

import time
from contextlib import contextmanager
from dataclasses import asdict, dataclass, field

import numpy as np

from . import banding as _banding
from .._numba import unionfind as _unionfind
from .._numba.config import thread_count
from .. import validation
from ..codes import Codes, as_codes, row_table
from ..store import Store

__all__ = ["label_near_duplicates", "NearDuplicateSummary", "TqdmProgress", "planted_duplicates", "EXACT_BUDGET_SECONDS"]

#: ``method="auto"`` keeps the exact index whenever it is predicted to take
#: at most this long, even if banding would be faster.
EXACT_BUDGET_SECONDS = 1.0

_MODES = ("first", "components")
_METHODS = ("auto", "banding", "index")


@dataclass(frozen=True)
class NearDuplicateSummary:
    """What :func:`label_near_duplicates` did, for reports (``str(summary)`` is a text report).

    Attributes
    ----------
    codes, bits, min_overlap, mode
        The request.
    method : str
        ``"banding"`` or ``"index"``, the method that ran.
    reason : str
        Why it ran (the automatic choice's rule and predicted times).
    groups : int
        Distinct labels.
    duplicates : int
        Codes merged into another code's group (``codes - groups``).
    largest_group : int
        Codes in the largest group.
    exact_copies : int
        Codes identical to an earlier code (and heavy enough to match it).
    light_codes : int
        Codes with fewer than ``min_overlap`` set bits: they match nothing.
    distinct_codes : int
        Distinct codes searched for matches.
    matched_pairs : int
        Distinct pairs of distinct codes verified to match.
    candidates_verified : int
        Pairs whose exact overlap was computed (banding: band collisions,
        a pair counted once per band it collides in; index: hits).
    predicted_recall : float
        Chance that the hardest possible matching pair is found: the
        S-curve at ``worst_jaccard`` for banding, 1 for the index.
    worst_jaccard : float or None
        Jaccard floor of the hardest pair (two heaviest codes at overlap
        ``min_overlap``); None when fewer than two codes can match.
    bands, rows : int or None
        Banding's bands and rows per band (None for the index).
    seed : int or None
        Seed of the min-hash functions (None for the index).
    predicted_seconds : dict
        The work model's time of each method considered.
    seconds : dict
        Measured time of each stage and ``"total"``.

    Examples
    --------
    >>> rows = [[1, 2, 3, 4], [1, 2, 3, 5], [7, 8, 9, 10], [1, 2, 3, 4]]
    >>> labels, summary = label_near_duplicates(rows, min_overlap=3, bits=16, return_summary=True)
    >>> summary.groups, summary.duplicates, summary.exact_copies, summary.method
    (2, 2, 1, 'index')
    >>> print(str(summary).splitlines()[3])
      groups: 2; duplicates: 2; largest group: 3
    """

    codes: int
    bits: int
    min_overlap: int
    mode: str
    method: str
    reason: str
    groups: int
    duplicates: int
    largest_group: int
    exact_copies: int
    light_codes: int
    distinct_codes: int
    matched_pairs: int
    candidates_verified: int
    predicted_recall: float
    worst_jaccard: float | None
    bands: int | None
    rows: int | None
    seed: int | None
    predicted_seconds: dict = field(default_factory=dict)
    seconds: dict = field(default_factory=dict)

    def to_dict(self) -> dict:
        """Plain-Python dict (JSON-serialisable).

        Examples
        --------
        >>> import json
        >>> _, summary = label_near_duplicates([[1, 2, 3], [1, 2, 4]], min_overlap=2, bits=8, return_summary=True)
        >>> d = summary.to_dict()
        >>> d["groups"], d["matched_pairs"], json.loads(json.dumps(d))["mode"]
        (1, 1, 'first')
        """
        return asdict(self)

    def __str__(self) -> str:
        lines = [
            f"{self.codes:,} code{'' if self.codes == 1 else 's'} of {self.bits:,} bits, "
            f"min overlap {self.min_overlap}, mode {self.mode}",
            f"  method: {self.method} ({self.reason})",
        ]
        if self.method == "banding" and self.worst_jaccard is None:
            lines.append(f"  bands: {self.bands} of {self.rows} rows, seed {self.seed}; no two codes can match")
        elif self.method == "banding":
            lines.append(
                f"  bands: {self.bands} of {self.rows} rows, seed {self.seed}; predicted candidate recall "
                f"{_fmt_recall(self.predicted_recall)} for the hardest pair (Jaccard {self.worst_jaccard:.4f})"
            )
        else:
            lines.append("  exact: every matching pair found (recall 1)")
        lines += [
            f"  groups: {self.groups:,}; duplicates: {self.duplicates:,}; largest group: {self.largest_group:,}",
            f"  exact copies: {self.exact_copies:,}; codes too light to match (< {self.min_overlap} set bits): "
            f"{self.light_codes:,}",
            f"  pairs: {self.candidates_verified:,} candidates verified, {self.matched_pairs:,} matched "
            f"(among {self.distinct_codes:,} distinct codes)",
            "  time: "
            + f"{self.seconds.get('total', 0.0):.3g} s ("
            + ", ".join(f"{k} {v:.3g} s" for k, v in self.seconds.items() if k != "total")
            + ")",
        ]
        return "\n".join(lines)


def _fmt_recall(p: float) -> str:
    miss = 1.0 - p
    if miss <= 0:
        return "1"
    if miss < 1e-4:
        return f"1 - {miss:.1e}"
    return f"{p:.4f}"


# ---------------------------------------------------------------------------
# validation
# ---------------------------------------------------------------------------


def _as_batch(codes, bits) -> Codes:
    """Any accepted batch form as Codes; the width is inferred where the form carries it."""
    import scipy.sparse as sp

    if bits is not None:
        bits = validation.width(bits, what="label_near_duplicates")
        bits = int(bits)
    if bits is None:
        if isinstance(codes, Codes):
            bits = codes.bits
        elif isinstance(codes, np.ndarray) and codes.dtype == np.bool_ and codes.ndim == 2:
            bits = codes.shape[1]
        elif sp.issparse(codes) and codes.ndim == 2:
            bits = codes.shape[1]
        elif isinstance(codes, (list, tuple)) and codes and hasattr(codes[0], "endian"):
            bits = len(codes[0])  # a list of bitarray
        else:
            raise TypeError(
                f"label_near_duplicates: cannot tell the code width of a {type(codes).__name__}; pass bits=... "
                "(index lists need it) or a Codes batch"
            )
    return as_codes(codes, bits, what="label_near_duplicates")


def _check_min_overlap(min_overlap, bits) -> int:
    validation.integer("min_overlap", min_overlap, what="label_near_duplicates")
    if min_overlap < 1:
        raise ValueError(f"label_near_duplicates: min_overlap={min_overlap} must be >= 1 (0 would merge every code)")
    if min_overlap > bits:
        raise ValueError(f"label_near_duplicates: min_overlap={min_overlap} exceeds bits={bits}: no two codes could ever match")
    return int(min_overlap)


def _check_bands(bands):
    if bands is None:
        return None
    if not isinstance(bands, (tuple, list)):
        raise TypeError(f"label_near_duplicates: bands={validation.quoted(bands)} must be a pair (bands, rows) "
                        "of positive integers")
    if len(bands) != 2:
        raise ValueError(f"label_near_duplicates: bands={validation.quoted(bands)} must be a pair (bands, rows) "
                         "of positive integers")
    b, r = bands
    for name, v in (("bands", b), ("rows", r)):
        validation.integer(name, v, minimum=1, what=f"label_near_duplicates: bands={bands!r}")
    return int(b), int(r)


def _progress_callback(progress):
    if progress is None or progress is False:
        return None, None
    if progress is True:
        bar = TqdmProgress()
        return bar, bar.close
    if callable(progress):
        return progress, None
    raise TypeError(f"label_near_duplicates: progress={progress!r} must be True, False or a callable (stage, done, total)")


class TqdmProgress:
    """A ``progress(stage, done, total)`` callback drawing one tqdm bar per stage on stderr.

    ``delay`` seconds pass before a bar is shown, so short runs print
    nothing. Call :meth:`close` at the end.

    Examples
    --------
    >>> import io
    >>> out = io.StringIO()
    >>> bar = TqdmProgress(delay=0.0, file=out)
    >>> bar("index", 5, 10); bar("index", 10, 10); bar.close()
    >>> "index" in out.getvalue()
    True
    """

    def __init__(self, delay: float = 0.5, file=None):
        self._delay = delay
        self._file = file
        self._bar = None
        self._stage = None

    def __call__(self, stage, done, total):
        if stage != self._stage:
            self.close()
            from tqdm import tqdm

            self._bar = tqdm(total=total, desc=stage, delay=self._delay, file=self._file, leave=False,
                             unit="", dynamic_ncols=True)
            self._stage = stage
        self._bar.update(done - self._bar.n)

    def close(self):
        """Close the current bar (if any); the next call starts a new one.

        Examples
        --------
        >>> bar = TqdmProgress()
        >>> bar.close()   # nothing drawn yet: nothing to close
        """
        if self._bar is not None:
            self._bar.close()
        self._bar = None
        self._stage = None


# ---------------------------------------------------------------------------
# the pieces
# ---------------------------------------------------------------------------


def _distinct(batch: Codes, min_overlap):
    """Distinct heavy-enough codes: (uid per code or -1, first index per unique, copies)."""
    n, weights = len(batch), batch.weights
    uid = np.full(n, -1, dtype=np.int64)
    heavy = np.flatnonzero(weights >= min_overlap)
    if heavy.size == 0:
        return uid, np.zeros(0, dtype=np.int64), 0
    sub = row_table(batch[heavy])
    hashes = _unionfind.row_hashes(sub)
    order = np.argsort(hashes, kind="stable")
    owner = _unionfind.exact_copy_owners(order, _banding.run_pair_counts(hashes[order]), sub)
    heads = np.flatnonzero(owner == np.arange(heavy.size))
    uid[heavy] = np.searchsorted(heads, owner)
    return uid, heavy[heads], int(heavy.size - heads.size)


def _index_pairs(codes_u: Codes, min_overlap, progress):
    """Every matching pair of distinct codes through the exact detector index."""
    n = len(codes_u)
    store = Store(codes_u.bits, threshold=min_overlap, sample_size=None, detectors=1, seed=0)
    chunk = int(min(1 << 15, max(1 << 10, n // 64 + 1)))
    lo_parts, hi_parts, ov_parts = [], [], []
    hits_total = 0
    for c0 in range(0, n, chunk):
        c1 = min(n, c0 + chunk)
        part = codes_u[c0:c1]
        store.add(part)
        hits = store.query_many(part, min_overlap=min_overlap)
        hits_total += hits.ids.shape[0]
        query = np.repeat(np.arange(c0, c1, dtype=np.int64), hits.counts)
        keep = hits.ids < query
        lo_parts.append(hits.ids[keep])
        hi_parts.append(query[keep])
        ov_parts.append(hits.overlaps[keep])
        if progress is not None:
            progress("index", c1, n)
    lo = np.concatenate(lo_parts) if lo_parts else np.zeros(0, dtype=np.int64)
    hi = np.concatenate(hi_parts) if hi_parts else np.zeros(0, dtype=np.int64)
    ov = np.concatenate(ov_parts) if ov_parts else np.zeros(0, dtype=np.int64)
    order = np.lexsort((hi, lo))
    return lo[order], hi[order], ov[order], hits_total


def _choose(method, recall, bands, codes_u, min_overlap, seed):
    """Which method runs, why, its band choice, the predicted seconds, the worst Jaccard."""
    u, weights_u = len(codes_u), codes_u.weights
    threads = thread_count()
    predicted = {}
    heaviest = np.sort(weights_u)[-2:] if u >= 2 else None
    worst = _banding.jaccard_floor(min_overlap, int(heaviest[0]), int(heaviest[1])) if u >= 2 else None
    if method == "index" or (method == "auto" and bands is None and (u < 2 or recall >= 1.0)):
        if u >= 2:
            predicted["index"] = _banding.index_seconds(codes_u, threads=threads)
        why = "requested" if method == "index" else (
            "fewer than two distinct codes can match" if u < 2 else "recall=1 needs the exact index")
        return "index", why, None, predicted, worst
    if bands is not None and (method == "banding" or method == "auto"):
        b, r = bands
        choice = None
        if u >= 2:
            moments = _banding.similarity_moments(codes_u, max_rows=r, seed=seed)
            cand, secs = _banding.banding_seconds(
                b, r, codes=u, set_bits=float(weights_u.sum()), moment=moments[r - 1], threads=threads
            )
            choice = _banding.BandChoice(b, r, worst, _banding.s_curve(worst, b, r), cand, secs)
            predicted["banding"] = secs
        else:
            choice = _banding.BandChoice(b, r, 0.0, 1.0, 0.0, 0.0)
        return "banding", f"bands={b}x{r} requested", choice, predicted, worst
    if u < 2:  # banding requested, nothing to pair
        return "banding", "requested", _banding.BandChoice(1, 1, 0.0, 1.0, 0.0, 0.0), predicted, worst
    if recall >= 1.0:
        raise ValueError("label_near_duplicates: recall=1 cannot be promised by banding; use method='index' or recall < 1")
    moments = _banding.similarity_moments(codes_u, seed=seed)
    choice = _banding.choose_bands(worst, recall, codes=u, set_bits=float(weights_u.sum()), moments=moments,
                                   threads=threads)
    if choice is not None:
        predicted["banding"] = choice.seconds
    if method == "banding":
        if choice is None:
            raise ValueError(
                f"label_near_duplicates: no banding within {_banding.MAX_HASHES} min-hashes per code reaches recall={recall} "
                f"at the hardest pair's Jaccard {worst:.4g} (min_overlap={min_overlap}, heaviest codes "
                f"{int(heaviest[1])} and {int(heaviest[0])} set bits); use method='index' or a lower recall"
            )
        return "banding", "requested", choice, predicted, worst
    idx = _banding.index_seconds(codes_u, threads=threads)
    predicted["index"] = idx
    if choice is None:
        return "index", (
            f"auto: no banding within {_banding.MAX_HASHES} min-hashes per code reaches recall {recall} at the "
            f"hardest pair's Jaccard {worst:.3g}"), None, predicted, worst
    if idx <= EXACT_BUDGET_SECONDS or idx <= choice.seconds:
        rule = f"within the {EXACT_BUDGET_SECONDS:g} s exact budget" if idx <= EXACT_BUDGET_SECONDS else \
            "no slower than banding"
        return "index", (
            f"auto: exact index predicted {idx:.3g} s, {rule}; banding predicted {choice.seconds:.3g} s"
        ), None, predicted, worst
    return "banding", (
        f"auto: banding predicted {choice.seconds:.3g} s against {idx:.3g} s for the exact index"
    ), choice, predicted, worst


def _labels(mode, uid, first, weights_u, lo, hi, ov):
    n = uid.shape[0]
    u = first.shape[0]
    if mode == "components":
        roots = _unionfind.component_roots(u, lo, hi)
        labels = np.arange(n, dtype=np.int64)
        heavy = uid >= 0
        labels[heavy] = first[roots[uid[heavy]]]
        return labels
    src = np.concatenate([lo, hi])
    dst = np.concatenate([hi, lo])
    both = np.concatenate([ov, ov])
    order = np.argsort(src, kind="stable")
    indptr = np.zeros(u + 1, dtype=np.int64)
    np.cumsum(np.bincount(src, minlength=u), out=indptr[1:])
    return _unionfind.greedy_first(uid, first, weights_u.astype(np.int64), indptr, dst[order], both[order])


# ---------------------------------------------------------------------------
# public entry point
# ---------------------------------------------------------------------------


def label_near_duplicates(codes, *, min_overlap, mode="first", method="auto", recall=0.99, bands=None, seed=None,
                          bits=None, progress=False, return_summary=False):
    """Label near-duplicate codes: each label is the index of its group's representative.

    Parameters
    ----------
    codes
        A :class:`~sparseindex.Codes` batch, a 2-D bool array, a
        scipy.sparse matrix, a list of ``bitarray`` or a list of index
        sequences (then ``bits`` is required).
    min_overlap : int
        Two codes match when they share at least this many set bits (>= 1).
    mode : {"first", "components"}
        ``"first"``: each code joins the earlier representative of greatest
        overlap (ties to the smaller index) or becomes one.
        ``"components"``: connected components of the match relation,
        labelled by their smallest index.
    method : {"auto", "banding", "index"}
        How matching pairs are found (see the module docs); ``"auto"``
        picks the exact index when it is predicted to take at most
        :data:`EXACT_BUDGET_SECONDS` or no longer than banding.
    recall : float
        Banding: the least chance that the hardest possible matching pair
        becomes a candidate; the bands are chosen for it (default 0.99).
        ``recall=1`` means the exact index.
    bands : (int, int) or None
        Banding: force ``bands`` bands of ``rows`` rows instead of choosing
        (with ``method="auto"`` this means banding). The summary still
        reports the predicted recall of the hardest pair for them.
    seed : int or None
        Seeds the min-hash functions (None: a fresh seed, kept in the
        summary). The index method uses no randomness.
    bits : int or None
        Code width, needed only for index lists.
    progress : bool or callable
        True draws tqdm bars on stderr; a callable is called as
        ``progress(stage, done, total)``.
    return_summary : bool
        Also return a :class:`NearDuplicateSummary`.

    Returns
    -------
    labels : ndarray of int64
        ``labels[i]`` is the representative's index; ``labels[i] == i``
        for representatives (and for codes lighter than ``min_overlap``).
    summary : NearDuplicateSummary
        Only with ``return_summary=True``.

    Notes
    -----
    Precision is 1 (every merge rests on a pair verified exactly); with
    banding a matching pair is missed with chance at most ``1 - recall``.
    Costs and memory: see the module documentation.

    Examples
    --------
    >>> import sparseindex
    >>> rows = [[1, 2, 3, 4], [1, 2, 3, 5], [7, 8, 9, 10], [1, 2, 3, 4]]
    >>> sparseindex.label_near_duplicates(rows, min_overlap=3, bits=16).tolist()
    [0, 0, 2, 0]
    >>> labels, summary = sparseindex.label_near_duplicates(rows, min_overlap=3, bits=16, mode="components",
    ...                                      return_summary=True)
    >>> summary.groups, summary.duplicates, summary.largest_group, summary.method
    (2, 2, 3, 'index')
    """
    clock = _Stopwatch()
    batch = _as_batch(codes, bits)
    request = _Request.checked(batch.bits, min_overlap, mode, method, recall, bands, seed, return_summary)
    callback, finish = _progress_callback(progress)
    try:
        labels, found = _label(batch, request, clock, callback)
    finally:
        if finish is not None:
            finish()
    return _summarised(labels, found, batch.bits, request, clock) if request.return_summary else labels


def _label(batch, request, clock, callback):
    """Labels, and what the summary reports of how they were found."""
    m = request.min_overlap
    with clock.lap("copies"):
        uid, first, copies = _distinct(batch, m)
        codes_u = batch[first]
        weights_u = codes_u.weights
    with clock.lap("choice"):
        picked, reason, choice, predicted, worst = _choose(
            request.method, request.recall, request.bands, codes_u, m, request.seed)
    with clock.lap("pairs"):
        if picked == "index":
            lo, hi, ov, checked = _index_pairs(codes_u, m, callback)
        else:
            lo, hi, ov, checked = _banding.candidate_pairs(
                codes_u, min_overlap=m, bands=choice.bands, rows=choice.rows, seed=request.seed, progress=callback)
    with clock.lap("grouping"):
        labels = _labels(request.mode, uid, first, weights_u, lo, hi, ov)
    found = dict(picked=picked, reason=reason, choice=choice, predicted=predicted, worst=worst, copies=copies,
                 light=int(np.count_nonzero(uid < 0)), distinct=int(first.shape[0]), pairs=int(lo.shape[0]),
                 checked=int(checked))
    return labels, found


def _summarised(labels, found, bits, request, clock):
    n = labels.shape[0]
    sizes = np.bincount(labels, minlength=n) if n else np.zeros(0, dtype=np.int64)
    groups = int(np.count_nonzero(sizes))
    picked, choice, worst = found["picked"], found["choice"], found["worst"]
    return labels, NearDuplicateSummary(
        codes=n, bits=bits, min_overlap=request.min_overlap, mode=request.mode, method=picked,
        reason=found["reason"], groups=groups, duplicates=n - groups, largest_group=int(sizes.max()) if n else 0,
        exact_copies=found["copies"], light_codes=found["light"], distinct_codes=found["distinct"],
        matched_pairs=found["pairs"], candidates_verified=found["checked"],
        predicted_recall=1.0 if picked == "index" else float(choice.recall),
        worst_jaccard=None if worst is None else float(worst),
        bands=None if choice is None else int(choice.bands), rows=None if choice is None else int(choice.rows),
        seed=None if picked == "index" else request.seed,
        predicted_seconds={k: float(v) for k, v in found["predicted"].items()}, seconds=clock.total(),
    )


class _Stopwatch:
    """Seconds spent in each named stage, plus the total since creation."""

    def __init__(self):
        self.start = time.perf_counter()
        self.seconds = {}

    @contextmanager
    def lap(self, name):
        t0 = time.perf_counter()
        try:
            yield
        finally:
            self.seconds[name] = time.perf_counter() - t0

    def total(self) -> dict:
        return {**{k: float(v) for k, v in self.seconds.items()}, "total": float(time.perf_counter() - self.start)}


@dataclass(frozen=True)
class _Request:
    """The checked arguments of one labelling call."""

    min_overlap: int
    mode: str
    method: str
    recall: float
    bands: "tuple | None"
    seed: int
    return_summary: bool

    @classmethod
    def checked(cls, bits, min_overlap, mode, method, recall, bands, seed, return_summary) -> "_Request":
        what = "label_near_duplicates"
        min_overlap = _check_min_overlap(min_overlap, bits)
        mode = validation.choice("mode", mode, _MODES, what=what)
        method = validation.choice("method", method, _METHODS, what=what)
        recall = validation.fraction("recall", recall, what=what)
        bands = _check_bands(bands)
        if bands is not None and method == "index":
            raise ValueError(f"{what}: bands={bands!r} goes with method='banding', not method='index'")
        return cls(min_overlap, mode, method, recall, bands, validation.seed("seed", seed, what=what),
                   validation.flag("return_summary", return_summary, what=what))


# ---------------------------------------------------------------------------
# invented test data
# ---------------------------------------------------------------------------


def planted_duplicates(count, bits, weight, *, fraction=0.1, max_changed=8, chain=0.0, seed=0):
    """Random codes with planted near-duplicates, in shuffled order (for tests, demos, benchmarks).

    ``round(fraction * count)`` of the ``count`` codes are near-duplicates:
    each copies a *source* and swaps ``k`` of its ``weight`` bits for ``k``
    bits outside it, ``k`` uniform in ``0..max_changed``, so it overlaps its
    source by ``weight - k``. Sources are the random codes; with chance
    ``chain`` a source is an earlier near-duplicate instead, making chains
    whose ends may overlap by less than any link. The rest are uniform
    random codes of ``weight`` bits (``Codes.random``). Vectorised: about a
    second per million codes.

    Returns ``(codes, source, changed)``: ``source[i]`` is the index of the
    code that code ``i`` was copied from (-1 for a random code) and
    ``changed[i]`` its ``k``.

    Examples
    --------
    >>> codes, source, changed = planted_duplicates(1000, 256, 20, fraction=0.1, max_changed=3, seed=1)
    >>> len(codes), int((source >= 0).sum()), bool(codes.weights.min() == codes.weights.max() == 20)
    (1000, 100, True)
    """
    rng = np.random.default_rng(seed)
    n_dup = int(round(fraction * count))
    n_orig = count - n_dup
    if not 0 <= max_changed <= min(weight, bits - weight):
        raise ValueError(f"max_changed={max_changed} must be in 0..min(weight, bits - weight)")
    base = Codes.random(n_orig, bits, weight, seed=int(rng.integers(2**63)))
    rows = np.zeros((count, weight), dtype=np.int64)
    if n_orig and weight:
        rows[:n_orig] = _kernels_unpack(base).reshape(n_orig, weight)
    src = np.full(count, -1, dtype=np.int64)
    changed = np.zeros(count, dtype=np.int64)
    dups = np.arange(n_orig, count)
    chained = (rng.random(n_dup) < chain) & (dups > n_orig)
    src[dups] = rng.integers(0, n_orig, size=n_dup) if n_orig else -1
    src[dups[chained]] = (n_orig + (rng.random(int(chained.sum())) * (dups[chained] - n_orig))).astype(np.int64)
    changed[dups] = rng.integers(0, max_changed + 1, size=n_dup)
    # generation g copies codes of generation g - 1 (originals are generation 0)
    generation = np.zeros(count, dtype=np.int64)
    generation[dups[~chained]] = 1
    for i in dups[chained].tolist():  # sources come earlier, so their generation is known
        generation[i] = generation[src[i]] + 1
    for g in range(1, int(generation.max(initial=0)) + 1):
        batch = np.flatnonzero(generation == g)
        rows[batch] = near_copies(rows[src[batch]], changed[batch], bits, rng)
    perm = rng.permutation(count)
    inverse = np.empty(count, dtype=np.int64)
    inverse[perm] = np.arange(count)
    rows = rows[perm]
    src = src[perm]
    src[src >= 0] = inverse[src[src >= 0]]
    return Codes.from_indices(rows, bits), src, changed[perm]


def _kernels_unpack(codes: Codes) -> np.ndarray:
    return codes.to_csr()[1]


def near_copies(sources, k, bits, rng):
    """Each row of ``sources`` with ``k[row]`` of its bits swapped for bits outside it."""
    n, weight = sources.shape
    out = sources.copy()
    todo = np.flatnonzero(k > 0)
    while todo.size:
        s = sources[todo]
        kk = k[todo]
        width = int(kk.max()) * 2 + 8
        fresh = rng.integers(0, bits, size=(todo.size, width))
        bad = (fresh[:, :, None] == s[:, None, :]).any(axis=2)
        for c in range(1, width):  # a candidate repeated earlier in its row
            bad[:, c] |= (fresh[:, :c] == fresh[:, c : c + 1]).any(axis=1)
        good = ~bad
        rank = np.cumsum(good, axis=1)
        take = good & (rank <= kk[:, None])
        done = take.sum(axis=1) == kk
        rows_done = todo[done]
        # which of the source's bits are swapped: the k of lowest random rank
        order = np.argsort(rng.random((rows_done.size, weight)), axis=1)
        swap = np.zeros((rows_done.size, weight), dtype=bool)
        np.put_along_axis(swap, order, np.arange(weight)[None, :] < kk[done][:, None], axis=1)
        replaced = s[done].copy()
        replaced[swap] = fresh[done][take[done]]
        out[rows_done] = replaced
        todo = todo[~done]
    out.sort(axis=1)
    return out
