"""The public interface as data: names, fields, parameters and CLI options.

``tests/test_public_api.py`` compares this with ``public_api.json``; after a
deliberate interface change, regenerate the file with
``python -m tests.public_api > tests/public_api.json`` and let the diff show
the change in review.
"""

from __future__ import annotations

import argparse
import dataclasses
import inspect
import json


def _public(obj):
    return sorted(n for n in dir(obj) if not n.startswith("_"))


def _parameters(obj):
    """Parameter names and kinds of every public callable of a class (annotations left out)."""
    out = {}
    for name in _public(obj):
        value = inspect.getattr_static(obj, name)
        func = value.__func__ if isinstance(value, (classmethod, staticmethod)) else value
        if callable(func):
            out[name] = [f"{p.kind.name}:{p.name}" for p in inspect.signature(func).parameters.values()]
    return out


def snapshot() -> dict:
    import sparseindex
    import sparseindex.cluster as cluster
    from sparseindex import model
    from sparseindex.cli import build_parser

    parser = build_parser()
    sub = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    return {
        "sparseindex": sorted(sparseindex.__all__),
        "sparseindex.model": sorted(model.__all__),
        "sparseindex.cluster": sorted(cluster.__all__),
        "Store": _parameters(sparseindex.Store),
        "Store()": [p for p in inspect.signature(sparseindex.Store).parameters],
        "ShardedStore": _parameters(cluster.ShardedStore),
        "Codes": _parameters(sparseindex.Codes),
        "Hits": _public(sparseindex.Hits),
        "BatchHits": _public(sparseindex.BatchHits),
        "Health": [f.name for f in dataclasses.fields(sparseindex.Health)],
        "Plan": [f.name for f in dataclasses.fields(sparseindex.Plan)],
        "FalseHitMeasurement": [f.name for f in dataclasses.fields(sparseindex.FalseHitMeasurement)],
        "plan()": [p for p in inspect.signature(sparseindex.plan).parameters],
        "label_near_duplicates()": [p for p in inspect.signature(sparseindex.label_near_duplicates).parameters],
        "model functions": {name: [p for p in inspect.signature(getattr(model, name)).parameters]
                            for name in sorted(model.__all__) if inspect.isfunction(getattr(model, name))},
        "cli": {name: sorted(o for a in p._actions for o in a.option_strings) for name, p in sub.choices.items()},
    }


if __name__ == "__main__":
    print(json.dumps(snapshot(), indent=1, sort_keys=True))
