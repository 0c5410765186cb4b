"""Rankings kept in the store, so that on-call's ``triage rank`` reads a night's ranking instead of
working it out again.

A ranking depends only on: the store's current state (``Store.state_token``: a new name at every
commit and every rebuild), the rule set, the group configuration, the saved model, the silence
threshold and this program's version. ``ranking_key`` digests all of them; a ranking saved under
that key is the one ``rank_store`` would compute, so it is reused only while every input is the
same, and anything else (a new night, a refit, an edited rule file) simply misses and computes
afresh. The ticket states (``--tickets``) are applied after, never saved.

Layout, under ``<store>/derived/rankings/`` (derived results: deleting the folder loses nothing)::

    <key>/meta.json              scalars (model used, horizon, as of, notes) and column kinds
    <key>/<frame>.parquet        drives, groups, silent, not_reporting, flags, lost, removed

A ranking is written into a dot-folder and renamed into place, so a reader finds a whole one or
none; the newest ``KEEP`` are kept. Any trouble reading one (a half-deleted folder, a file from
another version) is a miss, never an error: the ranking is computed instead.
"""

from __future__ import annotations

import gc
import hashlib
import json
import os
import secrets
import shutil
from dataclasses import replace
from datetime import datetime
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

from triage.store.files import fsync_dir, fsync_file

RANKINGS_DIR = "rankings"
META_FILE = "meta.json"
#: Layout of a saved ranking; bump when the frames or their meaning change.
SAVED_VERSION = 1
#: Saved rankings kept (different rule sets or thresholds on the same night, and the night before).
KEEP = 4
#: The frames of a RankResult saved, in file order.
FRAMES = ("drives", "groups", "silent", "not_reporting", "flags", "lost")


def ranking_key(state_token: str, ruleset, config, silent_hours: float, model_dir: Path | None) -> str:
    """The digest naming a ranking: every input ``rank_store`` reads besides the ticket file.

    The rule set enters as each rule's text (condition, evidence template, severity, file and
    line), so an edited rule changes the key; the model as its
    folder's name and each file's size and modification time (a model folder is written whole,
    ``FleetRiskModel.save``); the program as its version and its source files' sizes and times
    (an upgrade, or an edit in a checkout, is a miss)."""
    from triage import __version__  # noqa: PLC0415  (the package itself)

    model = None
    if model_dir is not None:
        try:
            model = [model_dir.name, sorted((f.name, f.stat().st_size, f.stat().st_mtime_ns)
                                            for f in model_dir.iterdir())]
        except OSError:
            model = [model_dir.name, "unreadable"]
    parts = {
        "saved_version": SAVED_VERSION, "triage": __version__, "code": _code_stamp(), "state": state_token,
        "rules": [_rule_text(rule) for rule in getattr(ruleset, "all_rules", ())],
        "window_days": getattr(ruleset, "window_days", None), "groups": repr(config),
        "silent_hours": float(silent_hours), "model": model,
    }
    return hashlib.sha256(json.dumps(parts, sort_keys=True, default=str).encode()).hexdigest()[:40]


def _code_stamp() -> list:
    """Size and modification time of every source file of the installed package."""
    package = Path(__file__).resolve().parent.parent
    stamp = []
    for folder, _, files in os.walk(package):
        for name in sorted(files):
            if name.endswith(".py"):
                info = os.stat(os.path.join(folder, name))
                stamp.append((os.path.relpath(os.path.join(folder, name), package), info.st_size, info.st_mtime_ns))
    return sorted(stamp)


def _rule_text(rule) -> list:
    """What a rule is, as text that is the same in every process (a ``repr`` is not: the
    parsed condition holds frozensets, whose order follows the per-process string hash)."""
    return [rule.id, rule.title, str(rule.severity), str(rule.category), rule.when.text, rule.explain.text,
            rule.source, rule.enabled, str(rule.path), rule.line, rule.origin, str(rule.overrides)]


def save_ranking(home: Path, key: str, result, inputs: dict | None = None) -> None:
    """Keep ``result`` (a RankResult without ticket states) under ``home/rankings/<key>``, with
    ``inputs``: how the command line named its rule folders and options, so that the next ingest
    can rank again the same way (``last_inputs``). Best effort: a store the user cannot write to,
    a full disk or a concurrent writer of the same key leave things as they were."""
    folder = Path(home) / RANKINGS_DIR
    temp = folder / f".{key}-{secrets.token_hex(4)}.tmp"
    try:
        temp.mkdir(parents=True)
        kinds = {}
        for name in FRAMES:
            frame = getattr(result, name)
            table, kinds[name] = _to_table(frame)
            pq.write_table(table, temp / f"{name}.parquet", compression="lz4")
            fsync_file(temp / f"{name}.parquet")
        removed = pa.table({"serial": pa.array(sorted(result.removed), pa.string())})
        pq.write_table(removed, temp / "removed.parquet")
        fsync_file(temp / "removed.parquet")
        meta = {"saved_version": SAVED_VERSION, "model_used": bool(result.model_used),
                "horizon_days": result.horizon_days,
                "as_of": None if result.as_of is None else pd.Timestamp(result.as_of).isoformat(),
                "notes": list(result.notes), "kinds": kinds, "inputs": inputs}
        (temp / META_FILE).write_text(json.dumps(meta) + "\n", encoding="utf-8")
        fsync_file(temp / META_FILE)
        fsync_dir(temp)
        os.rename(temp, folder / key)
        fsync_dir(folder)
    except (OSError, ValueError, TypeError, pa.ArrowException):  # a value Arrow cannot hold: not kept
        shutil.rmtree(temp, ignore_errors=True)
        return
    _prune(folder)


def load_ranking(home: Path, key: str, empty):
    """The ranking saved under ``key`` as a RankResult (``empty``: a RankResult to fill in), or
    None when there is none or it cannot be read."""
    folder = Path(home) / RANKINGS_DIR / key
    collecting = gc.isenabled()
    gc.disable()  # building 100,000s of small lists and strings would set off collection after collection
    try:
        meta = json.loads((folder / META_FILE).read_text(encoding="utf-8"))
        if meta.get("saved_version") != SAVED_VERSION:
            return None
        frames = {name: _to_frame(pq.read_table(folder / f"{name}.parquet"), meta["kinds"][name])
                  for name in FRAMES}
        removed = frozenset(pq.read_table(folder / "removed.parquet")["serial"].to_pylist())
        as_of = None if meta["as_of"] is None else datetime.fromisoformat(meta["as_of"])
        return replace(empty, model_used=meta["model_used"], horizon_days=meta["horizon_days"], as_of=as_of,
                       notes=list(meta["notes"]), removed=removed, **frames)
    except (OSError, ValueError, KeyError, TypeError, pa.ArrowException):
        return None
    finally:
        if collecting:
            gc.enable()


def last_inputs(home: Path) -> dict | None:
    """The ``inputs`` saved with the newest ranking, or None (none saved, or saved without)."""
    try:
        for entry in _newest_first(Path(home) / RANKINGS_DIR):
            inputs = json.loads((entry / META_FILE).read_text(encoding="utf-8")).get("inputs")
            if isinstance(inputs, dict):
                return inputs
    except (OSError, ValueError, AttributeError):
        return None
    return None


def _to_table(frame: pd.DataFrame) -> tuple[pa.Table, dict]:
    """``frame`` as Arrow, and what each column needs to come back as it was: ``list`` (lists of
    values), ``object`` (Python values: None, ints, strings) or the pandas dtype's name."""
    kinds, arrays = {}, []
    for column in frame.columns:
        values = frame[column]
        if values.dtype == object:
            items = values.tolist()
            kinds[column] = "list" if any(isinstance(v, list) for v in items) else "object"
            arrays.append(pa.array(items, from_pandas=True))
        else:
            kinds[column] = str(values.dtype)
            arrays.append(pa.Array.from_pandas(values))
    return pa.table(arrays, names=[str(c) for c in frame.columns]), kinds


def _to_frame(table: pa.Table, kinds: dict) -> pd.DataFrame:
    columns = {}
    for name, kind in kinds.items():
        values = table[name]
        if kind in ("list", "object"):
            if pa.types.is_string(values.type) or pa.types.is_large_string(values.type):
                columns[name] = values.to_numpy(zero_copy_only=False)  # object array of str / None
            elif pa.types.is_list(values.type):
                columns[name] = _lists(values.combine_chunks())
            elif pa.types.is_null(values.type):
                columns[name] = np.full(len(values), None, dtype=object)
            else:
                columns[name] = _objects(_python_values(values.combine_chunks()))
        else:
            columns[name] = values.to_pandas().astype(kind, copy=False)
    return pd.DataFrame(columns, columns=list(kinds))


def _objects(items: list) -> np.ndarray:
    """A 1-d object array of ``items``. The trailing None keeps numpy from reading lists of equal
    length as a second dimension."""
    return np.array([*items, None], dtype=object)[:-1]


def _python_values(array: pa.Array) -> list:
    """The values as pandas had them: times as ``pd.Timestamp`` (Arrow would give ``datetime``),
    None where null."""
    if pa.types.is_timestamp(array.type):
        valid = array.is_valid().to_numpy(zero_copy_only=False).tolist()
        return [stamp if ok else None for stamp, ok in zip(array.to_pandas().tolist(), valid)]
    return array.to_pylist()


def _lists(array: pa.ListArray) -> np.ndarray:
    """An object array of Python lists (None where null): the child values converted once and
    cut at the offsets, far quicker than a per-row conversion on 100,000 mostly empty lists."""
    flat = _python_values(array.values)
    offsets = array.offsets.to_numpy()
    rows = [[] for _ in range(len(array))]  # a list of its own for every row, most of them empty
    for i in np.flatnonzero(np.diff(offsets)).tolist():
        rows[i] = flat[offsets[i]:offsets[i + 1]]
    if array.null_count:
        for i in np.flatnonzero(array.is_null().to_numpy(zero_copy_only=False)).tolist():
            rows[i] = None
    return _objects(rows)


def _newest_first(folder: Path) -> list[Path]:
    """The saved rankings, newest written first (not the dot-folders being written)."""
    return sorted((entry for entry in folder.iterdir() if not entry.name.startswith(".")),
                  key=lambda entry: entry.stat().st_mtime_ns, reverse=True)


def _prune(folder: Path) -> None:
    """Keep the ``KEEP`` newest rankings (and any other process's dot-folder in progress)."""
    try:
        saved = _newest_first(folder)
    except OSError:
        return
    for entry in saved[KEEP:]:
        shutil.rmtree(entry, ignore_errors=True)
