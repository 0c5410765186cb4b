"""Which snapshot columns a rule may name, and of what kind each is.

Rules read the ``snapshots`` table (``triage.store.schema.SNAPSHOTS``); the field list is derived
from it so a column added to the store is usable in rules at once. Timestamps and provenance
columns are not rule material: time enters only through the window functions.
"""

from __future__ import annotations

from enum import Enum

import pyarrow as pa

from triage.store.schema import SNAPSHOTS


class Kind(Enum):
    NUMBER = "number"
    BOOL = "boolean"
    TEXT = "text"

    def __str__(self) -> str:
        return self.value


#: Columns that never appear in a rule: the capture time is implicit in every window, and the
#: source file name is provenance, not drive state.
_NOT_RULE_FIELDS = {"taken_at", "source_file"}


def _kind_of(arrow_type: pa.DataType) -> Kind | None:
    if pa.types.is_integer(arrow_type) or pa.types.is_floating(arrow_type):
        return Kind.NUMBER
    if pa.types.is_boolean(arrow_type):
        return Kind.BOOL
    if pa.types.is_string(arrow_type) or pa.types.is_large_string(arrow_type):
        return Kind.TEXT
    return None


#: field name -> kind, in schema order.
FIELDS: dict[str, Kind] = {
    field.name: kind
    for field in SNAPSHOTS
    if field.name not in _NOT_RULE_FIELDS and (kind := _kind_of(field.type)) is not None
}
