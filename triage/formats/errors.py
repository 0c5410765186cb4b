"""The one error every decoder in ``triage.formats`` raises for a structure that breaks its layout.

``LayoutError`` is a ``ValueError`` so callers that only care "was this input bad" can catch the
builtin; ``.field`` names the structure and field (``"smart.checksum"``, ``"identify.length"``)
so ingest can report the offending line and field in one sentence.
"""

from __future__ import annotations


class LayoutError(ValueError):
    """A byte structure does not follow its standard's layout.

    ``str(err)`` is one line: ``"<field>: <detail>"``.
    """

    def __init__(self, field: str, detail: str | None = None) -> None:
        self.field = field
        self.detail = detail if detail is not None else "does not follow the standard layout"
        super().__init__(f"{field}: {self.detail}")

    def __reduce__(self):  # keep the two-argument constructor picklable (multiprocessing ingest)
        return (type(self), (self.field, self.detail))


def require_length(data: bytes, expected: int, field: str) -> bytes:
    """``bytes(data)`` if it is exactly ``expected`` bytes long, else ``LayoutError(field)``."""
    data = bytes(data)
    if len(data) != expected:
        raise LayoutError(field, f"expected {expected} bytes, got {len(data)}")
    return data
