"""What a store holds, in a form two stores can be compared by: every table's rows (sorted), the
quarantine records (sorted) and the manifest entries without their batch ids and commit times."""

from __future__ import annotations

import json

from triage.store.dataset import Store
from triage.store.schema import TABLES


def store_contents(store: Store) -> dict:
    tables = {}
    for name in TABLES:
        frame = store.read(name)
        tables[name] = sorted(repr(tuple(row)) for row in frame.itertuples(index=False))
    quarantine = sorted(
        (json.dumps(json.loads(line), sort_keys=True)
         for path in sorted(store.quarantine_dir.glob("*.jsonl"))
         for line in path.read_text().splitlines()),
    ) if store.quarantine_dir.is_dir() else []
    manifest = [{k: v for k, v in entry.items() if k not in ("batch", "committed_at")}
                for entry in store.manifest()]
    return {"tables": tables, "quarantine": quarantine, "manifest": manifest}
