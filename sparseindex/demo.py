"""The built-in demonstration: one invented scenario, end to end.

``sparseindex demo`` (module :mod:`sparseindex.cli.demo`) calls :func:`run`.
The scenario is invented and its data are generated on the fly from a seed:
the Quillmarsh weaving mill scans every bolt of cloth it weaves and hashes
the bolt's 40 most distinctive weave features into a 2048-bit code. Its
catalogue must

1. be sized before it is built (:func:`sparseindex.plan`, through
   :meth:`Store.for_target`);
2. take the catalogue in (``add``, with a progress bar);
3. recognise a bolt from a rescan that misses features and picks up dust, or
   from a partial scan, and keep chance matches of unknown bolts rare — the
   measured recall and false hits are printed beside the model's prediction;
4. catch bolts the scanners uploaded twice (:func:`sparseindex.near_duplicates` on the
   upload batch, :meth:`Store.find_or_add` against the catalogue);
5. say in advance when it fills up (:meth:`Store.health`, the status
   callbacks of :meth:`Store.watch`, measurements of random unknown bolts) as it
   grows past the warning level and past the model's limit;
6. be saved and served memory-mapped (:meth:`Store.save`,
   :meth:`Store.load`);
7. draw its headroom curve (a PNG, when matplotlib is installed).

The false-hit target is loose on purpose (1 in 1,000 queries) so that false
hits are common enough to be counted within a minute; the model that the
counts check is the one that extrapolates to targets such as 1e-9.
"""

from __future__ import annotations

import dataclasses
import math
import os
import sys
import tempfile
import textwrap
import time
import warnings

import numpy as np

from .near_duplicates import banding as _banding
from . import model, validation
from .codes import Codes
from .near_duplicates.labelling import TqdmProgress, label_near_duplicates, near_copies, planted_duplicates
from .errors import SaturationWarning
from .store import Store

__all__ = ["run", "DemoResult", "Recall", "Stage", "DEFAULT_SIZE"]

BITS = 2048  # width of a bolt code
WEIGHT = 40  # hashed weave features per bolt
FALSE_HIT = 1e-3  # target chance that an unknown bolt matches some catalogued bolt
NOISE = 0.25  # a rescan may miss a quarter of the features ...
RECALL = 0.999  # ... and must still be recognised this often
WARN_FRACTION = 0.8  # status "filling" from 80% of the limit
NEAR_DUPLICATE_RECALL = 0.999  # banding: least chance of finding the hardest re-upload pair
MIN_OVERLAP = 32  # two uploads of one bolt share at least 32 of its 40 features
MAX_CHANGED = 8  # a re-upload differs from the first upload in at most 8 features
QUERIES = 2_000  # rescans of each kind
UNKNOWN_QUERIES = 20_000  # unknown bolts queried against the catalogue
STAGE_QUERIES = 10_000  # unknown bolts queried at each later fill level
MEASURE_BUDGET = 2e9  # counter updates allowed per measurement (fewer measurements in a huge store)
DEFAULT_SIZE = 200_000
SIGMA3 = 0.9973  # two-sided coverage of +/- 3 standard deviations of a normal law
MIN_SIZE = 1_000
FILL_TO = 1.1  # the demo fills the store to 110% of the model's limit
STORE_FILE = "quillmarsh-bolts.sidx"
PLOT_FILE = "headroom.png"


@dataclasses.dataclass(frozen=True)
class Recall:
    """One kind of query in the recall phase: measured against the model.

    ``recalled`` of ``queries`` found their own bolt (model: ``predicted``);
    ``false_hits`` other bolts were hit in all (model: ``predicted_false_hits``,
    the expected number, with Poisson deviation ``sqrt`` of it).

    Examples
    --------
    >>> r = Recall("rescan", 30, 10, 1000, 999, 0.9995, 1, 0.8, 0.04)
    >>> r.recall, round(r.recall_sigma, 6)
    (0.999, 0.000707)
    """

    kind: str
    kept: int
    dust: int
    queries: int
    recalled: int
    predicted: float
    false_hits: int
    predicted_false_hits: float
    ms_per_query: float

    @property
    def recall(self) -> float:
        """Measured recall: the fraction of queries that found their own bolt."""
        return self.recalled / self.queries

    @property
    def recall_sigma(self) -> float:
        """Binomial standard deviation of the measured recall if the model is right."""
        return math.sqrt(self.predicted * (1.0 - self.predicted) / self.queries)


@dataclasses.dataclass(frozen=True)
class Stage:
    """The store at one fill level: model figures and a measurement of unknown bolts.

    Examples
    --------
    >>> s = Stage("x", 80, 100.0, 20.0, 0.0008, 10_000, 7, 0.0002, 0.0016, 0.0008, "filling")
    >>> s.fill
    0.8
    """

    label: str
    items: int
    limit: float
    headroom: float
    false_hit_now: float
    queries: int
    queries_hit: int
    low: float
    high: float
    predicted_rate: float
    status: str

    @property
    def fill(self) -> float:
        """Codes stored as a fraction of the limit."""
        return self.items / self.limit


@dataclasses.dataclass(frozen=True)
class DemoResult:
    """Every figure :func:`run` printed, for programs and tests.

    Attributes
    ----------
    size, seed : int
        The request.
    plan : Plan
        The store's plan (sample size, threshold, detectors, limit, recall).
    recall : tuple of Recall
        The recall phase, one entry per kind of query.
    unknown : FalseHitMeasurement
        Random unknown bolts against the catalogue.
    uploads, planted_in_batch, found_in_batch, unplanted_merges : int
        The upload batch, its planted re-uploads of bolts in the same batch,
        how many of those :func:`label_near_duplicates` grouped with their source, and
        merges of codes that were not planted copies of each other.
    planted_catalogue, found_catalogue, unplanted_catalogue : int
        Re-uploads of catalogued bolts, how many :meth:`Store.find_or_add`
        matched to their catalogued bolt, and other matches it reported.
    transitions : tuple of (str, str, int)
        Status changes (previous, current, codes stored) the watch reported.
    stages : tuple of Stage
        The store at each fill level.
    store_path, plot_path : str or None
        Where the store and the headroom plot were written.
    seconds : dict
        Wall time of each phase and ``"total"``.

    Examples
    --------
    >>> [f.name for f in dataclasses.fields(DemoResult)][:4]
    ['size', 'seed', 'plan', 'recall']

    :func:`run` returns one (its example runs the whole scenario).
    """

    size: int
    seed: int
    plan: object
    recall: tuple
    unknown: object
    uploads: int
    planted_in_batch: int
    found_in_batch: int
    unplanted_merges: int
    planted_catalogue: int
    found_catalogue: int
    unplanted_catalogue: int
    transitions: tuple
    stages: tuple
    store_path: str | None
    plot_path: str | None
    seconds: dict


class _Out:
    """Lines to ``stream``, drawn around any progress bar on stderr."""

    def __init__(self, stream):
        self.stream = stream

    def __call__(self, text=""):
        from tqdm import tqdm

        tqdm.write(text, file=self.stream)
        self.stream.flush()


def _n(x) -> str:
    """A count with thousands separators; 'unbounded' for infinity."""
    if isinstance(x, float) and not math.isfinite(x):
        return "unbounded"
    return f"{int(round(x)):,}"


def _poisson_range(mean) -> str:
    """The central 99.73% range (the normal 3-sigma tails) of a Poisson count of this mean."""
    from scipy.stats import poisson

    low, high = poisson.interval(SIGMA3, mean)
    return f"99.7% range {int(low)}-{int(high)}"


def _bolt(i) -> str:
    return f"QM-{int(i):07d}"


def _rows(codes: Codes) -> np.ndarray:
    """The set-bit indices of codes of equal weight, one row per code."""
    return np.stack(codes.to_indices()) if len(codes) else np.zeros((0, WEIGHT), dtype=np.int64)


def _partial(rows: np.ndarray, keep: int, rng) -> np.ndarray:
    """Each row cut to ``keep`` of its bits, chosen at random (a scan of part of the bolt)."""
    order = np.argsort(rng.random(rows.shape), axis=1)[:, :keep]
    return np.sort(np.take_along_axis(rows, order, axis=1), axis=1)


def _found(hits, sources) -> np.ndarray:
    """For each query, whether its own bolt is among its hits."""
    which = np.repeat(np.arange(len(hits), dtype=np.int64), hits.counts)
    own = hits.ids == sources[which]
    return np.bincount(which[own], minlength=len(hits)) > 0


def _measure_size(store, wanted) -> int:
    """Measurements to run: ``wanted``, fewer where a query costs many counter updates."""
    per_query = WEIGHT * store.postings_count / store.bits
    return int(max(1_000, min(wanted, MEASURE_BUDGET / max(per_query, 1.0))))


def _warm_up(folder) -> None:
    """Compile (or load from numba's cache) the kernels the demo calls, on small stores.

    The store gets more than one postings block (65,536 detectors each), so
    the block merges and the parallel single query are compiled here too.
    Banded min-hashing is left out: ``label_near_duplicates`` picks it only for upload
    batches large enough to pay for it (its kernels then compile in step 4).
    """
    codes = Codes.random(70_000, 256, 12, seed=5)
    store = Store(256, threshold=4, sample_size=8, seed=5)
    store.add(codes[:40_000])
    store.add(codes[40_000:69_000])
    store.query(codes[0])
    store.query_many(codes[:50])
    store.find_or_add(codes[68_900:], min_overlap=9)
    store.watch(false_hit=0.5)
    store.health()
    store.measure_false_hits(100, seed=1)
    label_near_duplicates(codes[:1_000], min_overlap=9, method="index", mode="components")
    path = os.path.join(folder, ".warm-up.sidx")
    store.save(path)
    Store.load(path, mmap=True).query_many(codes[:5])
    os.unlink(path)


def _bar(progress, total, desc):
    from tqdm import tqdm

    return tqdm(total=total, desc=desc, unit=" bolts", unit_scale=True, disable=not progress, leave=False,
                file=sys.stderr, dynamic_ncols=True)


def run(size=DEFAULT_SIZE, *, seed=1, out=None, progress=None, stream=None, plot=True) -> DemoResult:
    """Run the demonstration scenario and print its report; return every figure.

    Parameters
    ----------
    size : int
        Bolts in the catalogue the store is planned for (>= 1,000). The
        demo then adds about ``size / 8`` uploads and fills the store to
        110% of the limit the plan gives it.
    seed : int
        Seeds every random choice: the same seed prints the same figures
        (times aside).
    out : str or None
        Folder for the saved store and the plot; created if missing. None:
        a new temporary folder.
    progress : bool or None
        Draw progress bars on stderr; None draws them when stderr is a
        terminal.
    stream : file or None
        Where the report goes (default ``sys.stdout``).
    plot : bool
        Write the headroom plot when matplotlib is installed.

    Returns
    -------
    DemoResult

    Notes
    -----
    The first run after installing also compiles the kernels (phase 0 of
    the report says how long that took); the report times every phase.

    Examples
    --------
    >>> import io, tempfile
    >>> report = io.StringIO()
    >>> result = run(2_000, seed=3, out=tempfile.mkdtemp(), progress=False, stream=report, plot=False)
    >>> result.found_in_batch == result.planted_in_batch, [s.status for s in result.stages][-1]
    (True, 'saturated')
    >>> "not proof of identity" in report.getvalue()
    True
    """
    size = validation.integer("size", size, minimum=MIN_SIZE, what="demo")
    seed = validation.integer("seed", seed, minimum=0, maximum=validation.SEED_LIMIT - 1, what="demo")
    sc = _Scene(size, seed, sys.stderr.isatty() if progress is None else progress,
                _Out(stream if stream is not None else sys.stdout),
                out if out is not None else tempfile.mkdtemp(prefix="sparseindex-demo-"))
    os.makedirs(sc.folder, exist_ok=True)
    _introduce(sc)
    for name, phase in (("kernels", _phase_kernels), ("plan", _phase_plan), ("build", _phase_build),
                        ("recall", _phase_recall), ("near-duplicates", _phase_uploads), ("health", _phase_fill),
                        ("save", _phase_save)):
        t0 = time.perf_counter()
        phase(sc)
        sc.seconds[name] = time.perf_counter() - t0
    _phase_plot(sc, plot)
    return _conclude(sc)


class _Scene:
    """What the phases of one demo run share: the request, the printer, random streams, the store and results."""

    def __init__(self, size, seed, progress, say, folder):
        self.size, self.seed, self.progress, self.say, self.folder = size, seed, progress, say, folder
        self.streams = np.random.SeedSequence(seed).spawn(8)
        self.rng = np.random.default_rng(self.streams[0])
        self.seconds = {}
        self.t_start = time.perf_counter()
        self.transitions = []
        self.curve = []  # (codes stored, false hit per query now, headroom) after every batch added
        self.stages = []
        self.store = self.plan = self.catalogue = None

    def code_seed(self, k) -> int:
        return int(np.random.default_rng(self.streams[k]).integers(2**63))


def _introduce(sc) -> None:
    say = sc.say
    say(f"sparseindex demo: the Quillmarsh weaving mill (an invented scenario; data made from seed {sc.seed})")
    say()
    say(f"Every bolt of cloth the mill weaves is scanned, and the scanner hashes the bolt's {WEIGHT} most")
    say(f"distinctive weave features into a {BITS:,}-bit code ({WEIGHT} set bits, {100 * WEIGHT / BITS:.1f}% of them).")
    say("The catalogue must recognise a bolt from a rescan that misses features or picks up dust, catch")
    say("bolts the scanners uploaded twice, and warn before chance matches become too common.")
    say()


def _phase_kernels(sc) -> None:
    t0 = time.perf_counter()
    _warm_up(sc.folder)
    sc.say(f"0. Kernels ready in {time.perf_counter() - t0:.1f} s (compiled on the first run, then loaded from "
           "numba's cache)")
    sc.say()


def _phase_plan(sc) -> None:
    say, size = sc.say, sc.size

    def on_status(previous, current, h):
        sc.transitions.append((previous, current, h.items))
        say(f"   >> status {previous} -> {current} at {h.items:,} bolts ({100 * h.fill_fraction:.1f}% of the limit, "
            f"headroom {_n(h.headroom_codes)} bolts)")

    t0 = time.perf_counter()
    sc.store = Store.for_target(BITS, WEIGHT, false_hit=FALSE_HIT, capacity=size, noise=NOISE, recall=RECALL,
                                seed=sc.code_seed(1), warn_fraction=WARN_FRACTION, on_status=on_status)
    planned_in = time.perf_counter() - t0
    p = sc.plan = sc.store.plan
    lost = p.lost_bits
    say("1. Plan the store from targets (sparseindex.plan, through Store.for_target)")
    say(f"   targets: {size:,} bolts; at most {FALSE_HIT:g} false hits per query (the chance that an unknown")
    say(f"            bolt matches some catalogued bolt); recall >= {RECALL:g} when a rescan misses {lost} of the")
    say(f"            {WEIGHT} features (noise {NOISE:g})")
    say(f"   plan:    sample size {p.sample_size}, threshold {p.threshold}, detectors {p.detectors}: each bolt gets "
        f"{p.detectors} detector{'s' if p.detectors != 1 else ''} of {p.sample_size} of its")
    say(f"            features, firing when a query holds at least {p.threshold} of them "
        f"({p.postings_per_code} postings = {2 * p.postings_per_code} bytes per bolt)")
    say(f"   model:   recall {p.recall:.5f} at the planned noise; {p.false_hit_per_code:.3g} false hits per bolt "
        f"per query;")
    say(f"            limit {_n(p.limit)} bolts at the target ({p.limit / size:.2f}x the {size:,} planned)")
    say(f"   planned in {1e3 * planned_in:.0f} ms")
    say()


def _phase_build(sc) -> None:
    say, size, store = sc.say, sc.size, sc.store
    say(f"2. Build the catalogue: {size:,} bolts")
    sc.catalogue = catalogue = Codes.random(size, BITS, WEIGHT, seed=sc.code_seed(2))
    t0 = time.perf_counter()
    chunk = max(1_000, -(-size // 20))
    with _bar(sc.progress, size, "adding bolts") as bar:
        for a in range(0, size, chunk):
            store.add(catalogue[a : a + chunk])
            bar.update(min(chunk, size - a))
            h = store.health()
            sc.curve.append((h.items, h.false_hit_now, h.headroom_codes))
    took = time.perf_counter() - t0
    say(f"   {size:,} bolts in {took:.2f} s ({size / took:,.0f} bolts/s); memory "
        f"{store.nbytes / 2**20:.1f} MiB ({store.nbytes / len(store):.0f} bytes per bolt)")
    say()


def _phase_recall(sc) -> None:
    say, size, store, p, rng = sc.say, sc.size, sc.store, sc.plan, sc.rng
    lost = p.lost_bits
    sc.q_count = q_count = min(QUERIES, size)
    sc.sources = sources = np.sort(rng.choice(size, size=q_count, replace=False)).astype(np.int64)
    own = _rows(sc.catalogue[sources])
    heavy = int(math.ceil(0.4 * WEIGHT))
    kinds = [
        ("rescan at the planned noise", WEIGHT - lost, lost, near_copies(own, np.full(q_count, lost), BITS, rng)),
        ("rescan, heavier noise", WEIGHT - heavy, heavy, near_copies(own, np.full(q_count, heavy), BITS, rng)),
        ("partial scan (part of the bolt)", WEIGHT - heavy, 0, _partial(own, WEIGHT - heavy, rng)),
    ]
    say(f"3. Recognise bolts from rescans ({q_count:,} queries of each kind; a hit is a catalogued bolt whose")
    say("   detector fires; 'false hits' are hits on other bolts)")
    sc.recalls = [_recall_kind(sc, *kind) for kind in kinds]
    sc.first_queries = Codes.from_indices(kinds[0][3], BITS)
    example = store.query(sc.first_queries[0])
    say(f"   e.g. the rescan of bolt {_bolt(sources[0])} hits "
        + (", ".join(f"{_bolt(i)} ({o} shared features)" for i, o in zip(example.ids[:3], example.overlaps[:3]))
           or "nothing"))
    sc.unknown = unknown = store.measure_false_hits(_measure_size(store, UNKNOWN_QUERIES), seed=sc.code_seed(3))
    say(f"   unknown bolts (never catalogued): {unknown.queries:,} random codes of {WEIGHT} features")
    say(f"     false-hit rate  {unknown.rate:.5f} per query measured ({unknown.queries_hit:,} queries hit; "
        f"95% CI {unknown.low:.5f}-{unknown.high:.5f})")
    say(f"                     model {unknown.predicted_rate:.5f}")
    expected_unknown = unknown.predicted_hits * unknown.queries
    say(f"     false hits      {unknown.hits:,} measured in all; model {expected_unknown:.2f} expected "
        f"({_poisson_range(expected_unknown)})")
    say()
    h = store.health()
    sc.stages.append(Stage("catalogue built", h.items, h.limit, h.headroom_codes, h.false_hit_now, unknown.queries,
                           unknown.queries_hit, unknown.low, unknown.high, unknown.predicted_rate, h.status))


def _recall_kind(sc, kind, kept, dust, rows) -> Recall:
    """Query one kind of rescan, print it beside the model, return the figures."""
    say, store, p, q_count = sc.say, sc.store, sc.plan, sc.q_count
    queries = Codes.from_indices(rows, BITS)
    tq = time.perf_counter()
    hits = store.query_many(queries)
    ms = 1e3 * (time.perf_counter() - tq) / q_count
    found = _found(hits, sc.sources)
    sample_size = min(p.sample_size, WEIGHT)
    predicted = float(model.recall(WEIGHT, sample_size, p.threshold, p.detectors, noise=(WEIGHT - kept) / WEIGHT))
    per_code = float(model.false_hit_per_code(BITS, WEIGHT, sample_size, p.threshold, p.detectors, kept + dust))
    expected = q_count * (len(store) - 1) * per_code
    r = Recall(kind, kept, dust, q_count, int(found.sum()), predicted, int(hits.counts.sum() - found.sum()),
               expected, ms)
    low, high = model.clopper_pearson(r.recalled, r.queries)
    what = f"{kept} of {WEIGHT} features kept" + (f", {dust} dust features added" if dust else ", nothing added")
    say(f"   {kind}: {what}")
    say(f"     recall      {r.recall:.5f} measured ({r.recalled:,} of {r.queries:,}; 95% CI "
        f"{low:.5f}-{high:.5f}); model {predicted:.5f}")
    say(f"     false hits  {r.false_hits:,} measured in {r.queries:,} queries; model {expected:.2f} expected "
        f"({_poisson_range(expected)})")
    say(f"     latency     {ms:.3f} ms per query (query_many, batches of {q_count:,})")
    return r


def _upload_batch(sc):
    """The upload queue: new scans with planted re-uploads of each other and of catalogued bolts, shuffled."""
    size, rng, catalogue = sc.size, sc.rng, sc.catalogue
    n_new = max(500, size // 8)
    n_again = max(20, size // 100)
    fresh, in_batch_src, changed = planted_duplicates(n_new, BITS, WEIGHT, fraction=0.1, max_changed=MAX_CHANGED,
                                                      seed=sc.code_seed(4))
    again_of = np.sort(rng.choice(size, size=n_again, replace=False)).astype(np.int64)
    again = Codes.from_indices(
        near_copies(_rows(catalogue[again_of]), rng.integers(0, MAX_CHANGED + 1, size=n_again), BITS, rng), BITS)
    uploads = Codes.concat([fresh, again])
    total = len(uploads)
    batch_src = np.concatenate([in_batch_src, np.full(n_again, -1, dtype=np.int64)])
    changed = np.concatenate([changed, np.zeros(n_again, dtype=np.int64)])
    catalogue_src = np.concatenate([np.full(n_new, -1, dtype=np.int64), again_of])
    order = rng.permutation(total)
    where = np.empty(total, dtype=np.int64)
    where[order] = np.arange(total)
    uploads, batch_src, changed, catalogue_src = uploads[order], batch_src[order], changed[order], catalogue_src[order]
    batch_src[batch_src >= 0] = where[batch_src[batch_src >= 0]]
    planted = batch_src >= 0
    return uploads, total, batch_src, changed, catalogue_src, planted, n_again


def _phase_uploads(sc) -> None:
    say, store = sc.say, sc.store
    uploads, total, batch_src, changed, catalogue_src, planted, n_again = _upload_batch(sc)
    progress = sc.progress
    say(f"4. Catch re-uploads: the scanners' upload queue holds {total:,} scans; the demo planted")
    say(f"   {int(planted.sum()):,} re-uploads of scans in the same queue and {n_again:,} of catalogued bolts, each")
    say(f"   differing from its first upload in 0 to {MAX_CHANGED} of its {WEIGHT} features "
        f"(a match: >= {MIN_OVERLAP} shared features)")
    bar = TqdmProgress(delay=0.0, file=sys.stderr) if progress else False
    try:
        labels, summary = label_near_duplicates(uploads, min_overlap=MIN_OVERLAP, mode="components", recall=NEAR_DUPLICATE_RECALL,
                                 seed=sc.code_seed(5), progress=bar, return_summary=True)
    finally:
        if bar:
            bar.close()
    group = np.where(planted, batch_src, np.arange(total))  # the planted truth: a copy belongs to its source
    found_in_batch = int(np.count_nonzero(labels[planted] == labels[batch_src[planted]]))
    merged = labels != np.arange(total)
    unplanted_merges = int(np.count_nonzero(merged & (group != group[labels])))
    if summary.method == "banding":
        z = WEIGHT - changed[planted]
        chance = _banding.s_curve(z / (2 * WEIGHT - z), summary.bands, summary.rows)
        how = f"banding, {summary.bands} bands of {summary.rows} rows"
    else:
        chance = np.ones(int(planted.sum()))
        how = "exact index"
    expected_found = float(np.sum(chance))
    found_sigma = float(np.sqrt(np.sum(chance * (1.0 - chance))))
    say(f"   near-duplicates ({how}; mode components): {summary.groups:,} distinct scans, {summary.duplicates:,} "
        f"re-uploads grouped in {summary.seconds['total']:.2f} s")
    say(f"     planted re-uploads found {found_in_batch:,} of {int(planted.sum()):,}; model {expected_found:,.1f} "
        f"(+/- {found_sigma:.1f}) found directly; merges not planted {unplanted_merges:,}")
    keep = np.flatnonzero(~merged)
    ids, is_new = store.find_or_add(uploads[keep], min_overlap=MIN_OVERLAP)
    upload_of_id = dict(zip(ids[is_new].tolist(), keep[is_new].tolist()))
    from_catalogue = catalogue_src[keep]
    matched = np.flatnonzero(~is_new)
    planted_catalogue = int(np.count_nonzero(from_catalogue >= 0))
    found_catalogue = in_queue = 0
    for j in matched.tolist():
        if from_catalogue[j] >= 0 and ids[j] == from_catalogue[j]:
            found_catalogue += 1
        elif ids[j] in upload_of_id and group[upload_of_id[ids[j]]] == group[keep[j]]:
            in_queue += 1
    unplanted_catalogue = int(matched.size - found_catalogue - in_queue)
    say(f"   find_or_add (exact) against the catalogue: catalogued re-uploads found {found_catalogue:,} of "
        f"{planted_catalogue:,};")
    say(f"     in-queue re-uploads the labelling had missed {in_queue:,}; matches not planted {unplanted_catalogue:,}; "
        f"{int(is_new.sum()):,} new bolts added")
    sc.uploads, sc.planted_in_batch, sc.found_in_batch = total, int(planted.sum()), found_in_batch
    sc.unplanted_merges, sc.planted_catalogue = unplanted_merges, planted_catalogue
    sc.found_catalogue, sc.unplanted_catalogue = found_catalogue, unplanted_catalogue
    say()


def _phase_fill(sc) -> None:
    say, store, stages, curve = sc.say, sc.store, sc.stages, sc.curve
    h = store.health()
    limit = h.limit
    final = int(math.floor(FILL_TO * limit)) + 1
    say(f"5. Health as the catalogue keeps growing: later seasons add bolts up to {FILL_TO:.0%} of the limit")
    say(f"   ({_n(limit)} bolts; warning level {WARN_FRACTION:.0%}). Each row queries random unknown bolts")
    say("   (store.measure_false_hits); store.watch reports every status change (>>).")
    say("   bolts stored    fill  headroom   false hits per query:                queries  status")
    say("                          [bolts]   model   measurement (95% CI)")

    def row(s):
        say(f"   {s.items:>12,}  {100 * s.fill:5.1f}%  {_n(s.headroom):>8}   {s.false_hit_now:.5f} "
            f"{s.queries_hit / s.queries:.5f} ({s.low:.5f}-{s.high:.5f})  {s.queries:>6,}  {s.status}")

    def stage(label):
        hh = store.health()
        pr = store.measure_false_hits(_measure_size(store, STAGE_QUERIES), seed=sc.code_seed(6) + len(stages))
        stages.append(Stage(label, hh.items, hh.limit, hh.headroom_codes, hh.false_hit_now, pr.queries,
                            pr.queries_hit, pr.low, pr.high, pr.predicted_rate, hh.status))
        curve.append((hh.items, hh.false_hit_now, hh.headroom_codes))
        row(stages[-1])

    row(stages[0])
    stage("uploads added")
    gen = np.random.default_rng(sc.streams[7])
    step = max(1_000, int(limit / 100))
    for mark in (0.9, 1.0, FILL_TO):
        target = min(final, int(math.floor(mark * limit)) + (1 if mark >= 1.0 else 0))
        if target <= len(store):
            continue
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always", SaturationWarning)
            with _bar(sc.progress, target - len(store), "adding bolts") as bar:
                while len(store) < target:
                    n = min(step, target - len(store))
                    store.add(Codes.random(n, BITS, WEIGHT, seed=int(gen.integers(2**63))))
                    bar.update(n)
                    hh = store.health()
                    curve.append((hh.items, hh.false_hit_now, hh.headroom_codes))
        for w in caught:
            if issubclass(w.category, SaturationWarning):
                say(textwrap.fill(f">> SaturationWarning: {w.message}", width=100, initial_indent="   ",
                                  subsequent_indent="      ", break_on_hyphens=False))
        stage(f"{mark:.0%} of the limit")
    final_health = store.health()
    say("   store.health() now:")
    for line in str(final_health).splitlines():
        say(textwrap.fill(line, width=100, initial_indent="     ", subsequent_indent="       ",
                          break_on_hyphens=False))
    sc.final_health = final_health
    say()


def _phase_save(sc) -> None:
    say, store, first_queries, q_count = sc.say, sc.store, sc.first_queries, sc.q_count
    store_path = os.path.join(sc.folder, STORE_FILE)
    ts = time.perf_counter()
    store.save(store_path)
    t_save = time.perf_counter() - ts
    ts = time.perf_counter()
    served = Store.load(store_path, mmap=True)
    t_open = time.perf_counter() - ts
    ts = time.perf_counter()
    served_hits = served.query_many(first_queries)
    t_query = time.perf_counter() - ts
    fresh_hits = store.query_many(first_queries)
    same = (np.array_equal(served_hits.ids, fresh_hits.ids) and np.array_equal(served_hits.counts, fresh_hits.counts)
            and np.array_equal(served_hits.overlaps, fresh_hits.overlaps))
    file_bytes = os.path.getsize(store_path)
    say("6. Save, then serve memory-mapped")
    say(f"   saved {len(store):,} bolts in {t_save:.2f} s ({file_bytes / 2**20:.1f} MiB, "
        f"{file_bytes / len(store):.0f} bytes per bolt; written atomically) to")
    say(f"     {store_path}")
    say(f"   Store.load(mmap=True) checked and opened it in {t_open:.2f} s (read-only: {served.read_only}); "
        f"{q_count:,} rescans in {t_query:.2f} s")
    say(f"   answers identical to the in-memory store: {'yes' if same else 'NO'}")
    sc.store_path = store_path
    say()


def _phase_plot(sc, plot) -> None:
    say = sc.say
    plot_path = None
    if plot:
        try:
            plot_path = _plot(os.path.join(sc.folder, PLOT_FILE), sc.store, sc.final_health, sc.stages, sc.curve)
        except ImportError:
            say("7. No plot: matplotlib is not installed (pip install 'sparseindex[plot]')")
        else:
            say(f"7. Headroom plot written to {plot_path}")
    else:
        say("7. No plot (not asked for)")
    say()
    sc.plot_path = plot_path


def _conclude(sc) -> DemoResult:
    say, seconds = sc.say, sc.seconds
    seconds["total"] = time.perf_counter() - sc.t_start
    say(f"Done in {seconds['total']:.1f} s wall time")
    say("  (" + ", ".join(f"{k} {v:.1f} s" for k, v in seconds.items() if k != "total") + ").")
    say("A hit is probabilistic evidence, not proof of identity: with codes that stand for people, do not")
    say("let a hit alone decide access, money or identity; check the stored code and the exact overlap")
    say("against your own rules.")
    return DemoResult(
        size=sc.size, seed=sc.seed, plan=sc.plan, recall=tuple(sc.recalls), unknown=sc.unknown, uploads=sc.uploads,
        planted_in_batch=sc.planted_in_batch, found_in_batch=sc.found_in_batch, unplanted_merges=sc.unplanted_merges,
        planted_catalogue=sc.planted_catalogue, found_catalogue=sc.found_catalogue,
        unplanted_catalogue=sc.unplanted_catalogue, transitions=tuple(sc.transitions), stages=tuple(sc.stages),
        store_path=sc.store_path, plot_path=sc.plot_path, seconds=dict(seconds),
    )


def _plot(path, store, h, stages, curve) -> str:
    """False-hit chance and headroom against bolts stored, with the measurements; return the path."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    import matplotlib.ticker

    cap = float(h.limit)
    top = max(FILL_TO * cap, max(s.items for s in stages)) * 1.02
    x = np.linspace(1, top, 400)
    fig, (ax, bx) = plt.subplots(2, 1, figsize=(7.5, 7), dpi=110, sharex=True)
    ax.plot(x, model.store_false_hit(h.per_code_uniform, x.astype(np.int64)), color="tab:blue", linewidth=2,
            label="model: chance of a false hit per query")
    ax.axhline(h.target_false_hit, color="tab:red", linestyle="--", label=f"target {h.target_false_hit:g}")
    for a in (ax, bx):
        a.axvline(h.warn_fraction * cap, color="tab:orange", linestyle=":", label=f"warning ({h.warn_fraction:.0%})")
        a.axvline(cap, color="tab:red", linestyle=":", label=f"limit {int(cap):,}")
    items = np.array([s.items for s in stages], dtype=float)
    rate = np.array([s.queries_hit / s.queries for s in stages])
    err = np.array([[r - s.low for r, s in zip(rate, stages)], [s.high - r for r, s in zip(rate, stages)]])
    ax.errorbar(items, rate, yerr=err, fmt="s", color="black", capsize=4, label="measurements of unknown bolts (95% CI)")
    ax.set_ylabel("false hits per unknown-bolt query")
    ax.set_title("Quillmarsh catalogue: headroom as it fills")
    ax.legend(fontsize=8, loc="upper left")
    ax.grid(alpha=0.3)
    pts = np.array([(c[0], c[2]) for c in curve], dtype=float)
    bx.plot(pts[:, 0], pts[:, 1], "o-", markersize=3, color="tab:green", label="headroom (health)")
    bx.set_xlabel("bolts stored")
    bx.xaxis.set_major_formatter(matplotlib.ticker.FuncFormatter(lambda v, _: f"{v:,.0f}"))
    bx.yaxis.set_major_formatter(matplotlib.ticker.FuncFormatter(lambda v, _: f"{v:,.0f}"))
    bx.set_ylabel("headroom [bolts]")
    bx.legend(fontsize=8, loc="upper right")
    bx.grid(alpha=0.3)
    fig.tight_layout()
    fig.savefig(path)
    plt.close(fig)
    return str(path)
