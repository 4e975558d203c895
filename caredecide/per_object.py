"""Results of a costly function of one object, kept while that object lives.

One analysis reads the same :class:`caredecide.model.Model` many times (memory estimate,
compile, rules of the one-way ranges, validation); expanding and parsing a large model
each time cost more than solving it. :class:`PerObjectCache` keeps the result for the
very object it was made from:

- keyed by ``id(owner)``, never by content, so a changed copy (``dataclasses.replace``,
  ``--set`` overrides, a scenario) is a new object with its own result;
- the entry goes when the owner is garbage-collected (``weakref.finalize``), so an id
  reused by a later object never meets an old result, and the cache keeps no owner
  alive (a value must not refer to its owner);
- at most ``size`` entries (least recently used dropped first); safe across threads.

Only frozen owners belong here: a result is never recomputed for the same object.
"""

from __future__ import annotations

import threading
import weakref
from collections import OrderedDict
from collections.abc import Callable
from typing import Generic, TypeVar

V = TypeVar("V")


class PerObjectCache(Generic[V]):
    """A bounded cache of one value per live object.

    Parameters
    ----------
    size : int
        Most entries kept; the least recently used goes first.
    """

    def __init__(self, size: int) -> None:
        self._size = int(size)
        self._entries: OrderedDict[int, tuple[V, weakref.finalize]] = OrderedDict()
        self._lock = threading.Lock()
        self._dead: list[int] = []
        """Ids of collected owners whose entries could not be dropped at once (the lock
        was held: a finalizer may run inside garbage collection at any point, even in
        the middle of a look-up on its own thread); dropped before the next look-up,
        hence before their id can be met again."""

    def get(self, owner: object, make: Callable[[], V]) -> V:
        """The value kept for ``owner``, made by ``make()`` on the first call."""
        key = id(owner)
        with self._lock:
            self._drop_dead()
            entry = self._entries.get(key)
            if entry is not None:
                self._entries.move_to_end(key)
                return entry[0]
        value = make()  # outside the lock: another thread may make its own meanwhile
        with self._lock:
            self._drop_dead()
            entry = self._entries.get(key)
            if entry is not None:  # made by another thread for the same live owner
                return entry[0]
            finalizer = weakref.finalize(owner, self._forget, key)
            self._entries[key] = (value, finalizer)
            while len(self._entries) > self._size:
                _, (_, old) = self._entries.popitem(last=False)
                old.detach()
        return value

    def __len__(self) -> int:
        with self._lock:
            self._drop_dead()
            return len(self._entries)

    def clear(self) -> None:
        """Forget every entry (their finalizers too)."""
        with self._lock:
            for _, finalizer in self._entries.values():
                finalizer.detach()
            self._entries.clear()
            self._dead.clear()

    def _forget(self, key: int) -> None:
        """Drop the entry of a collected owner now, or at the next look-up."""
        if self._lock.acquire(blocking=False):
            try:
                self._entries.pop(key, None)
            finally:
                self._lock.release()
        else:
            self._dead.append(key)

    def _drop_dead(self) -> None:
        while self._dead:
            self._entries.pop(self._dead.pop(), None)
