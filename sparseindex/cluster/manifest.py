"""The files of a saved sharded store: ``manifest.json`` and one store file per shard and save generation.

The manifest is written last, atomically; it names this save's shard files,
so a crash at any point leaves a directory that loads as the old save or
the new one. Reading it checks every field (it is untrusted input).
"""

from __future__ import annotations

import json
import math
import os
import re
import tempfile

from .. import validation
from ..errors import StoreFormatError
from ..model.planner import Plan
from ..store import format as _persist

__all__ = ["MANIFEST", "MANIFEST_FORMAT", "MANIFEST_FORMATS", "read_manifest", "write_manifest", "shard_file_name",
           "next_generation", "remove_quietly", "shard_file_match", "plan_from_dict", "PARAM_KEYS"]

MANIFEST = "manifest.json"
MANIFEST_KIND = "sparseindex sharded store"
MANIFEST_FORMAT = 2
#: Manifest formats this library reads: 1 spelled some keys and the shard file names differently.
MANIFEST_FORMATS = (1, 2)

#: A shard file: its shard number, the shard count and the save generation.
_SHARD_FILE = re.compile(r"^shard(\d{4,})\.total(\d{4,})\.gen(\d{6,})\.sidx$")
_SHARD_FILE_FORMAT_1 = re.compile(r"^shard-(\d{4,})-of-(\d{4,})\.g(\d{6,})\.sidx$")  # manifest format 1 only
_MANIFEST_KEYS = {"kind", "format", "written_by", "generation", "params", "plan", "shards", "routing",
                  "next_id", "items", "files"}
PARAM_KEYS = {"bits", "threshold", "sample_size", "detectors", "seed"}
_FILE_KEYS = {"shard", "file", "items", "next_id", "bytes"}


def write_manifest(directory, *, generation, params, plan, shards, next_id, items, files) -> None:
    """Write this save's manifest atomically: the moment the save takes effect."""
    manifest = {
        "kind": MANIFEST_KIND, "format": MANIFEST_FORMAT, "written_by": _persist.library_version(),
        "generation": generation, "params": params, "plan": None if plan is None else plan.to_dict(),
        "shards": shards, "routing": "id % shards", "next_id": next_id, "items": items, "files": files,
    }
    write_atomically(os.path.join(directory, MANIFEST), json.dumps(manifest, indent=1, allow_nan=False).encode("utf-8"))


def write_atomically(path: str, data: bytes) -> None:
    """Replace ``path`` by ``data``: temporary file, fsync, os.replace, directory fsync.

    The writing and syncing steps are the persistence layer's own
    (``_persist.write_all``, ``_persist.fsync_directory``).
    """
    directory, name = os.path.split(path)
    fd, tmp = tempfile.mkstemp(prefix=f".{name}.", suffix=".tmp", dir=directory)
    try:
        try:
            _persist.write_all(fd, memoryview(data))
            os.fsync(fd)
        finally:
            os.close(fd)
        os.replace(tmp, path)
        tmp = None
        _persist.fsync_directory(directory)
    finally:
        if tmp is not None:
            try:
                os.unlink(tmp)
            except OSError:
                pass


def remove_quietly(directory, names) -> None:
    for name in names:
        try:
            os.unlink(os.path.join(directory, name))
        except OSError:
            pass


def next_generation(directory: str) -> int:
    """One more than any generation in ``directory`` (manifest or shard file names)."""
    top = 0
    for name in os.listdir(directory):
        match = shard_file_match(name)
        if match:
            top = max(top, int(match.group(3)))
    try:
        with open(os.path.join(directory, MANIFEST), "rb") as f:
            generation = json.loads(f.read(1 << 20)).get("generation")
        if isinstance(generation, int) and not isinstance(generation, bool):
            top = max(top, generation)
    except (OSError, ValueError, AttributeError):
        pass
    return top + 1


def shard_file_name(shard: int, shards: int, generation: int) -> str:
    """The file name of ``shard`` of ``shards`` in save ``generation``.

    Examples
    --------
    >>> shard_file_name(1, 2, 3)
    'shard0001.total0002.gen000003.sidx'
    """
    return f"shard{shard:04d}.total{shards:04d}.gen{generation:06d}.sidx"


def shard_file_match(name: str):
    return _SHARD_FILE.match(name) or _SHARD_FILE_FORMAT_1.match(name)


def manifest_from_format_1(doc: dict, fail) -> dict:
    """A format-1 manifest with its keys spelled as in format 2 (the file names stay as written)."""
    doc = dict(doc)
    params_renamed = {old: new for old, new in _persist.RENAMED_KEYS.items() if new in PARAM_KEYS}
    doc["params"] = _persist.renamed_keys(doc["params"], params_renamed, lambda m: fail(f"params: {m}"))
    doc["plan"] = _persist.renamed_plan(doc["plan"], lambda m: fail(f"plan: {m}"))
    return doc


def read_manifest(path: str) -> dict:
    """The manifest at ``path``, every field checked; StoreFormatError(section="manifest") otherwise."""
    def fail(problem):
        raise StoreFormatError("manifest", problem, path)

    def whole(value, name, lo, hi=2**63 - 1):
        if isinstance(value, bool) or not isinstance(value, int) or not lo <= value <= hi:
            fail(f"{name}={value!r} must be an integer in {lo}..{hi}")
        return value

    try:
        with open(path, "rb") as f:
            raw = f.read((1 << 24) + 1)
    except FileNotFoundError:
        raise FileNotFoundError(f"no sharded store at {os.path.dirname(path)!r}: {MANIFEST} is missing") from None
    if len(raw) > 1 << 24:
        fail("larger than 16 MiB")

    try:
        doc = json.loads(raw.decode("utf-8"), object_pairs_hook=_persist.no_duplicate_keys,
                         parse_constant=_persist.reject_constant)
    except (UnicodeDecodeError, ValueError) as exc:
        fail(f"not valid JSON: {exc}")
    if not isinstance(doc, dict) or set(doc) != _MANIFEST_KEYS:
        got = sorted(doc) if isinstance(doc, dict) else type(doc).__name__
        fail(f"keys {got} must be exactly {sorted(_MANIFEST_KEYS)}")
    if doc["kind"] != MANIFEST_KIND:
        fail(f"kind={doc['kind']!r} must be {MANIFEST_KIND!r}")
    if doc["format"] not in MANIFEST_FORMATS:
        fail(f"format={doc['format']!r} is not a version this library reads ({', '.join(map(str, MANIFEST_FORMATS))})")
    if doc["format"] == 1:
        doc = manifest_from_format_1(doc, fail)
    if doc["routing"] != "id % shards":
        fail(f"routing={doc['routing']!r} must be 'id % shards'")
    shards = whole(doc["shards"], "shards", 1, 65535)
    whole(doc["generation"], "generation", 1)
    next_id = whole(doc["next_id"], "next_id", 0)
    items = whole(doc["items"], "items", 0, next_id)
    params = doc["params"]
    if not isinstance(params, dict) or set(params) != PARAM_KEYS:
        fail(f"params must hold exactly {sorted(PARAM_KEYS)}")
    for key in ("bits", "threshold", "detectors"):
        whole(params[key], f"params.{key}", 1, validation.MAX_BITS)
    if params["sample_size"] is not None:
        whole(params["sample_size"], "params.sample_size", 1, validation.MAX_BITS)
    whole(params["seed"], "params.seed", 0, 2**64 - 1)
    files = doc["files"]
    if not isinstance(files, list) or len(files) != shards:
        fail(f"files must list one entry per shard ({shards})")
    total = 0
    for k, entry in enumerate(files):
        if not isinstance(entry, dict) or set(entry) != _FILE_KEYS:
            fail(f"files[{k}] must hold exactly {sorted(_FILE_KEYS)}")
        whole(entry["shard"], f"files[{k}].shard", k, k)
        pattern = _SHARD_FILE_FORMAT_1 if doc["format"] == 1 else _SHARD_FILE
        match = pattern.match(entry["file"]) if isinstance(entry["file"], str) else None
        if not match or (int(match.group(1)), int(match.group(2)), int(match.group(3))) != (k, shards, doc["generation"]):
            fail(f"files[{k}].file={entry['file']!r} is not this save's file of shard {k}")
        total += whole(entry["items"], f"files[{k}].items", 0)
        whole(entry["next_id"], f"files[{k}].next_id", 0, next_id)
        whole(entry["bytes"], f"files[{k}].bytes", 0)
    if total != items:
        fail(f"items={items} but the shards hold {total}")
    if doc["plan"] is not None and not isinstance(doc["plan"], dict):
        fail("plan must be an object or null")
    try:
        plan_from_dict(doc["plan"])
    except (TypeError, ValueError) as exc:
        fail(f"plan: {exc}")
    return doc


def plan_from_dict(d):
    if d is None:
        return None
    fields = dict(d)
    alternatives = tuple(plan_from_dict(a) for a in fields.pop("alternatives", []))
    if fields.get("limit") is None:
        fields["limit"] = math.inf
    return Plan(**fields, alternatives=alternatives)
