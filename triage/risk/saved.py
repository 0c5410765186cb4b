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

``load_view`` reads only what a report shows (the filtered top rows, the degraded groups, the
drives not reporting) straight from Arrow, and this module imports pandas only to rebuild whole
frames (``load_ranking``) or to save them: ``triage rank`` on a saved ranking never imports it.
"""

from __future__ import annotations

import gc
import hashlib
import json
import os
import secrets
import shutil
from dataclasses import replace
from datetime import datetime, timedelta, timezone
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from triage.risk.group_config import GroupConfig
from triage.risk.view import RankView, RowFilter
from triage.store.files import fsync_dir, fsync_file
from triage.store.models import latest_model_dir

if TYPE_CHECKING:
    import pandas as pd

RANKINGS_DIR = "rankings"
META_FILE = "meta.json"
#: Layout of a saved ranking; bump when the frames or their meaning change.
SAVED_VERSION = 1
#: Saved rankings kept (different rule sets or thresholds on the same night, and the night before).
KEEP = 4
#: Rows per Parquet row group: a report of the top drives decodes the first group only.
ROW_GROUP_ROWS = 4096
#: The frames of a RankResult saved, in file order.
FRAMES = ("drives", "groups", "silent", "not_reporting", "flags", "lost")


def key_of(store, state_token: str, ruleset, config: GroupConfig | None, silent_hours: float) -> str:
    """``ranking_key`` of ``store`` as it is now (its newest saved model), ``state_token`` being
    ``store.state_token()``; ``config`` None is the default group configuration."""
    return ranking_key(state_token, ruleset, config or GroupConfig(), silent_hours, latest_model_dir(store))


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


#: The installed package's folder, whose source files ``_code_stamp`` reads.
PACKAGE = Path(__file__).resolve().parent.parent


def _code_stamp(package: Path = PACKAGE) -> list:
    """Size and modification time of every source file of the package in ``package``."""
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
            pq.write_table(table, temp / f"{name}.parquet", compression="lz4", row_group_size=ROW_GROUP_ROWS)
            fsync_file(temp / f"{name}.parquet")
        removed = pa.table({"serial": pa.array(sorted(result.removed), pa.string())})
        pq.write_table(removed, temp / "removed.parquet")
        fsync_file(temp / "removed.parquet")
        meta = {"saved_version": SAVED_VERSION, "model_used": bool(result.model_used),
                "horizon_days": result.horizon_days,
                "as_of": None if result.as_of is None else result.as_of.isoformat(),
                "notes": list(result.notes), "kinds": kinds, "inputs": inputs}
        (temp / META_FILE).write_text(json.dumps(meta) + "\n", encoding="utf-8")
        fsync_file(temp / META_FILE)
        fsync_dir(temp)
        if (folder / key).exists():  # one that could not be read (hence computed again): set aside first
            aside = folder / f".{key}-{secrets.token_hex(4)}.old"
            os.rename(folder / key, aside)
            shutil.rmtree(aside, ignore_errors=True)
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
        frames = {name: _to_frame(_read(folder / f"{name}.parquet"), meta["kinds"][name])
                  for name in FRAMES}
        removed = frozenset(_read(folder / "removed.parquet")["serial"].to_pylist())
        as_of = None if meta["as_of"] is None else datetime.fromisoformat(meta["as_of"])
        return replace(empty, model_used=meta["model_used"], horizon_days=meta["horizon_days"], as_of=as_of,
                       notes=list(meta["notes"]), removed=removed, **frames)
    except (OSError, ValueError, KeyError, TypeError, pa.ArrowException):
        return None
    finally:
        if collecting:
            gc.enable()


def saved_view(store, ruleset, config: GroupConfig | None, silent_hours: float,
               shown: RowFilter = RowFilter()) -> RankView | None:
    """What the report shows (``shown``) of the ranking saved for ``store`` as it is now with
    these rules and options (``load_view``), or None when none is saved."""
    token = store.state_token()
    if token is None:
        return None
    return load_view(store.derived_dir, key_of(store, token, ruleset, config, silent_hours), shown)


def load_view(home: Path, key: str, shown: RowFilter = RowFilter()) -> RankView | None:
    """The rows a report shows (``shown``) of the ranking saved under ``key``, read from Arrow:
    the drives kept, the degraded groups and the drives not reporting (with no ticket state:
    ``state`` not-reporting, no open flag). None when there is none or it cannot be read. The
    same rows, values and order as ``view.view_of`` of the ranking ``load_ranking`` gives."""
    folder = Path(home) / RANKINGS_DIR / key
    try:
        meta = json.loads((folder / META_FILE).read_text(encoding="utf-8"))
        if meta.get("saved_version") != SAVED_VERSION:
            return None
        drives = pq.ParquetFile(folder / "drives.parquet")
        if shown.selects:  # the filter columns of every drive
            picked = drives.read(columns=["host", "group", "severity", "rules"] if shown.flagged_only else
                                 ["host", "group", "severity"])
            counts = [len(r or ()) for r in picked["rules"].to_pylist()] if shown.flagged_only else []
            kept = shown.kept(picked["host"].to_pylist(), picked["group"].to_pylist(), picked["severity"].to_pylist(),
                              counts)
        else:
            rows = drives.metadata.num_rows
            kept = range(rows if shown.top is None else min(shown.top, rows))
        groups = _read(folder / "groups.parquet")
        degraded = ([i for i, lost in enumerate(groups["degraded"].to_pylist()) if lost]
                    if "degraded" in groups.column_names else [])
        silent = [dict(row, state="not-reporting", severity=None, first_raised=None)
                  for row in _rows(_read(folder / "silent.parquet"))]
        return RankView(_rows(_rows_at(drives, kept)), silent, _rows(_read(folder / "not_reporting.parquet")),
                        _rows(_take(groups, degraded)),
                        None if meta["as_of"] is None else datetime.fromisoformat(meta["as_of"]),
                        meta["horizon_days"], bool(meta["model_used"]), list(meta["notes"]))
    except (OSError, ValueError, KeyError, TypeError, pa.ArrowException):
        return None


# Reading a view keeps clear of three pyarrow calls that import pandas (half a second):
# ``pq.read_table`` (it goes through pyarrow.dataset), ``pa.array`` (it looks for pandas objects)
# and the Python value of a time with a zone name.
def _read(path: Path) -> pa.Table:
    """One Parquet file as Arrow."""
    return pq.ParquetFile(path).read()


def _rows_at(parquet: pq.ParquetFile, positions) -> pa.Table:
    """The rows at ``positions`` of a Parquet file, decoding only the row groups that hold them."""
    sizes = np.array([parquet.metadata.row_group(i).num_rows for i in range(parquet.num_row_groups)], dtype=np.int64)
    first_row = np.concatenate([[0], np.cumsum(sizes)])  # of each group in the file
    positions = np.asarray(positions, dtype=np.int64)
    group_of = np.searchsorted(first_row, positions, side="right") - 1
    wanted = np.unique(group_of)
    table = parquet.read_row_groups(wanted.tolist()) if len(wanted) else parquet.schema_arrow.empty_table()
    start_in_table = dict(zip(wanted.tolist(), np.concatenate([[0], np.cumsum(sizes[wanted])[:-1]]).tolist()))
    return _take(table, [start_in_table[g] + p - first_row[g]
                         for p, g in zip(positions.tolist(), group_of.tolist())])


def _take(table: pa.Table, positions) -> pa.Table:
    """The rows at ``positions``; the index array is built from its buffer."""
    index = np.asarray(positions, dtype=np.int64)
    return table.take(pa.Array.from_buffers(pa.int64(), len(index), [None, pa.py_buffer(index)]))


def _rows(table: pa.Table) -> list[dict]:
    """The rows as dicts of Python values, times (alone or in lists) as UTC ``datetime``s. Arrow
    keeps a time as a count since the epoch in UTC, whatever its zone; that count is converted
    here, because Arrow's own conversion imports pandas for a zone name or nanoseconds."""
    columns = []
    for column in table.columns:
        kind = column.type
        if pa.types.is_timestamp(kind):
            columns.append([_time(v, kind.unit) for v in column.cast(pa.int64()).to_pylist()])
        elif pa.types.is_list(kind) and pa.types.is_timestamp(kind.value_type):
            unit = kind.value_type.unit
            columns.append([None if row is None else [_time(v, unit) for v in row]
                            for row in column.cast(pa.list_(pa.int64())).to_pylist()])
        else:
            columns.append(column.to_pylist())
    return [dict(zip(table.column_names, values)) for values in zip(*columns)]


_EPOCH = datetime(1970, 1, 1, tzinfo=timezone.utc)
_PER_MICROSECOND = {"s": 1_000_000, "ms": 1_000, "us": 1}


def _time(count: int | None, unit: str) -> datetime | None:
    """A count of ``unit`` since the epoch as a UTC time (to the microsecond, as the store keeps)."""
    if count is None:
        return None
    micros = count // 1_000 if unit == "ns" else count * _PER_MICROSECOND[unit]
    return _EPOCH + timedelta(microseconds=micros)


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
    import pandas as pd  # noqa: PLC0415  (whole frames only: see the module docstring)

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
