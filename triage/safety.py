"""The one sanitiser for text that leaves triage: terminal lines, CSV cells, HTML pages.

Every string shown or exported may have come from a drive's firmware, a capture line written by
a host we do not control, a removal log, or a file name: host, slot and group as much as serial
and model. Nothing from there may reach a terminal raw (an OSC sequence retitles the window, a
CSI sequence rewrites earlier lines), run as a spreadsheet formula, or swell a table until every
other row is cut. This module sits at the bottom of the layer stack so the risk layer's ticket
writer, the report layer and the CLI all call the same functions.

* ``visible`` replaces every control character (C0 00h-1Fh, DEL 7Fh, C1 80h-9Fh) by ``\\xNN``
  and every invisible format character (Unicode category Cf: bidirectional overrides, zero-width
  joiners, byte order marks) and line/paragraph separator by ``\\uNNNN``, then cuts a value longer
  than ``limit`` characters, ending it with ``CUT_MARK``. A backslash is kept as it is, so text
  that ingest already escaped (serial numbers) is not escaped twice.
* ``cell`` is ``visible`` plus formula neutralising for CSV: a value whose first character could
  start a formula once a spreadsheet trims or folds it -- ``= + - @``, their full-width and small
  forms (NFKC-equivalent), a TAB, CR, LF or any other white space or control -- gets a leading
  single quote, as the OWASP "CSV Injection" page advises
  (https://owasp.org/www-community/attacks/CSV_Injection); ``uncell`` undoes it for our own files.
* ``html_text`` is ``visible`` plus HTML escaping (``& < > " '``).

The limits are ours (common practice, no source): identifiers (host, slot, group, serial,
model, firmware) are cut at ``NAME_LIMIT`` so a wide table keeps its layout; free text
(evidence, actions, messages with file names) at ``TEXT_LIMIT``.
"""

from __future__ import annotations

import html
import math
import unicodedata

#: Characters of an identifier (host, slot, group, serial, model) shown before it is cut.
NAME_LIMIT = 64
#: Characters of free text (evidence, actions, error lines) shown before it is cut.
TEXT_LIMIT = 400
#: Ends a value that was cut: says how many characters were left out.
CUT_MARK = "...[+{hidden} chars]"

#: First characters that can start a formula (after NFKC folding of full-width and small forms).
FORMULA_STARTS = frozenset("=+-@")


def _escape_char(ch: str) -> str:
    code = ord(ch)
    if code < 0x20 or 0x7F <= code <= 0x9F:
        return f"\\x{code:02x}"
    if unicodedata.category(ch) in ("Cf", "Zl", "Zp", "Co", "Cs", "Cn"):
        return f"\\u{code:04x}" if code <= 0xFFFF else f"\\U{code:08x}"
    return ch


def _text_of(value: object) -> str:
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return ""
    return value if isinstance(value, str) else str(value)


def visible(value: object, limit: int | None = TEXT_LIMIT, keep: str = "") -> str:
    """``value`` as printable text: control and invisible characters escaped, cut at ``limit``.

    Characters in ``keep`` pass through (a format with its own escape for them, e.g. line feed).
    """
    text = _text_of(value)
    if not (text.isascii() and text.isprintable()):
        text = "".join(ch if ch in keep else _escape_char(ch) for ch in text)
    if limit is not None and len(text) > limit:
        # the marker counts in the limit (fewer hidden characters never need more digits)
        keep = max(limit - len(CUT_MARK.format(hidden=len(text))), 1)
        text = text[:keep] + CUT_MARK.format(hidden=len(text) - keep)
    return text


def name(value: object) -> str:
    """An identifier (host, slot, group, serial, model, firmware, cohort) for display."""
    return visible(value, NAME_LIMIT)


def starts_formula(text: str) -> bool:
    """True when a spreadsheet could read ``text`` as a formula (see module docstring)."""
    if not text:
        return False
    first = text[0]
    return (first.isspace() or not first.isprintable()
            or unicodedata.normalize("NFKC", first)[:1] in FORMULA_STARTS)


def cell(value: object, limit: int | None = TEXT_LIMIT) -> str:
    """A CSV cell safe to open in a spreadsheet: ``visible``, then a leading ' before a formula."""
    text = visible(value, limit)
    return "'" + text if starts_formula(text) else text


def uncell(text: str) -> str:
    """Undo ``cell``'s leading quote when reading one of our own exports back."""
    if len(text) >= 2 and text[0] == "'" and starts_formula(text[1:]):
        return text[1:]
    return text


def html_text(value: object, limit: int | None = TEXT_LIMIT) -> str:
    """Text for an HTML page: ``visible``, then ``& < > " '`` escaped."""
    return html.escape(visible(value, limit), quote=True)
