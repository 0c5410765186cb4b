"""The map steps of ``fit`` (and the reads of ``backtest``) as tasks an engine can run anywhere.

A task is a module-level function of one picklable item, so ``triage.engine`` can run it in
this process, in a local worker process or on a Dask worker. An item names the store by its
path (``StoreHandle``), never by an open object: the worker opens the store itself, which is
why Dask workers must see the store at the same path as the command (a shared file system).
Reads go through ``Store.read``, i.e. only through the parts the manifest records as
committed: a worker never reads a temporary or half-written part.

Each task returns a reduced result (a few rows per drive); the command merges the results in
the order of the items, exactly as the one-process run did, so both give the same bytes.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime
from pathlib import Path

import pandas as pd


@dataclass(frozen=True)
class StoreHandle:
    """A store as a task sees it: its folder and the clock of the command that opened it.

    The clock is fixed at the command's ``now`` so every worker accepts the same rows (a store
    reader leaves out rows stamped too far in the future of its clock)."""

    root: str
    now: datetime | None = None

    @classmethod
    def of(cls, store) -> "StoreHandle":
        now = store.now() if getattr(store, "now", None) is not None else None
        return cls(root=str(Path(store.root).resolve()), now=now)

    def open(self):
        from triage.store.dataset import Store  # noqa: PLC0415  (store layer, to our left)

        fixed = self.now
        return Store(self.root, now=None if fixed is None else (lambda: fixed))


@dataclass(frozen=True)
class SnapshotRead:
    """Snapshot rows with ``since <= taken_at < until`` (None: open), ``columns`` only."""

    store: "StoreHandle | object"  # a handle, or the open store itself when run in this process
    columns: tuple[str, ...]
    since: pd.Timestamp | None
    until: pd.Timestamp | None

    def read(self) -> pd.DataFrame:
        return opened(self.store).read("snapshots", columns=list(self.columns),
                                      since=None if self.since is None else self.since.to_pydatetime(),
                                      until=None if self.until is None else self.until.to_pydatetime())


def task_store(store, engine) -> "StoreHandle | object":
    """What a task item carries to name ``store``: the open store itself when the work runs in
    this process (no engine), else a ``StoreHandle`` the worker opens."""
    return store if engine is None else StoreHandle.of(store)


def opened(store):
    """The open store an item names (``task_store``)."""
    return store.open() if isinstance(store, StoreHandle) else store
