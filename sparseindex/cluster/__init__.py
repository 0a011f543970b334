"""A sharded store on a Dask ``distributed`` cluster (optional extra).

:class:`ShardedStore` spreads one logical store over ``shards`` real
:class:`~sparseindex.Store` objects, each living on a cluster worker as a
Dask *actor* (:class:`ShardHost`). It answers every question a ``Store``
answers, with the same meaning and the same result types, merged across
shards; the answers do not depend on how many shards there are.

Why it is exact
---------------
* Ids are global: the store hands out ``0, 1, 2, ...`` and code ``i``
  lives on shard ``i % shards`` (:func:`shard_of`), added there with
  ``Store.add(codes, ids=global_ids)``. A code's detector samples depend
  only on the seed and its id, so every code is sampled exactly as a single
  ``Store`` of the same seed samples it, and a hit there is a hit here.
* ``query`` / ``query_many`` / ``find_matches`` take the union of the
  shards' hits, ``nearest`` merges the shards' exact top-``k`` lists, all
  ordered as :class:`~sparseindex.Hits` (overlap descending, id ascending).
* ``find_or_add`` collects every match (``Store.find_matches``, complete and
  exact) from every shard, matches the batch against itself, applies the
  greedy rule of ``Store.find_or_add`` and only then routes the new codes.

Why actors
----------
A shard is mutable state that must stay on one worker. An actor is exactly
that: its method calls go to the object in place (1–2 ms a round trip
here against 11–13 ms for a submitted task), nothing is copied between
workers, and when its worker dies the actor is gone and every call says so.
A shard held as the result of a task would look immutable to the scheduler:
a task that mutates it breaks Dask's model, and after a worker loss the
scheduler would silently recompute the result from its recipe, bringing
back an old or empty shard — a wrong answer with no error. So shards are
actors, pinned to a worker by address, and this module supervises them
itself: a lost shard raises :class:`ShardLostError` and is rebuilt from the
last save by :meth:`ShardedStore.recover` or :meth:`ShardedStore.load`.

Install with ``pip install "sparseindex[cluster]"``; importing this package
works without it, and creating a store then says what to install.

Modules: ``host`` (the worker side: :class:`ShardHost` and the id routing),
``fleet`` (the actors and their supervision), ``manifest`` (the files of a
save) and ``sharded`` (:class:`ShardedStore`, the store contract over them).
"""

from .fleet import ShardLostError
from .host import ShardHost, shard_of, share_targets
from .sharded import ShardedStore

__all__ = ["ShardedStore", "ShardHost", "ShardLostError", "shard_of", "share_targets"]
