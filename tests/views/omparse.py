"""A strict reader of the OpenMetrics 1.0 text format, for the export tests.

Written from the specification (OpenMetrics 1.0, "Text format": the ABNF of ``exposition``,
``metricfamily``, ``metric-descriptor``, ``sample``, ``labels`` and ``escaped-string``; the
"Escaping" rules for label values; the mandatory ``# EOF`` terminator), not from the exporter it
checks: it raises ``OpenMetricsError`` on anything the grammar does not allow. The package
index's parser for this format belongs to a monitoring product, which the house rules forbid
installing, hence a reader of our own written from the specification.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field

METRIC_NAME = r"[a-zA-Z_:][a-zA-Z0-9_:]*"
LABEL_NAME = r"[a-zA-Z_][a-zA-Z0-9_]*"
#: escaped-string: any character but '"', '\' and LF, or one of the escapes \\ \" \n
ESCAPED = r'(?:[^"\\\n]|\\\\|\\"|\\n)*'
NUMBER = r"(?:[+-]?(?:[0-9]+(?:\.[0-9]*)?|\.[0-9]+)(?:[eE][+-]?[0-9]+)?|[+-]?Inf|NaN)"
TYPES = ("counter", "gauge", "histogram", "gaugehistogram", "stateset", "info", "summary", "unknown")

_DESCRIPTOR = re.compile(rf"^# (TYPE|HELP|UNIT) ({METRIC_NAME}) (.*)$")
_SAMPLE = re.compile(rf"^({METRIC_NAME})(\{{.*\}})? ({NUMBER})(?: ({NUMBER}))?$")
_LABEL = re.compile(rf'({LABEL_NAME})="({ESCAPED})"')


class OpenMetricsError(ValueError):
    """The text breaks the OpenMetrics 1.0 text format (line number in the message)."""


@dataclass
class Sample:
    name: str
    labels: dict[str, str]
    value: float
    timestamp: float | None = None


@dataclass
class Family:
    name: str
    type: str = "unknown"
    help: str | None = None
    unit: str | None = None
    samples: list[Sample] = field(default_factory=list)


def unescape(text: str) -> str:
    """The spec's label-value escapes: backslash, double quote, line feed."""
    return re.sub(r'\\(\\|"|n)', lambda m: "\n" if m.group(1) == "n" else m.group(1), text)


def _labels(text: str, number: int) -> dict[str, str]:
    inner = text[1:-1]
    labels: dict[str, str] = {}
    position = 0
    while position < len(inner):
        match = _LABEL.match(inner, position)
        if not match:
            raise OpenMetricsError(f"line {number}: bad label at {inner[position:position + 30]!r}")
        name, value = match.group(1), match.group(2)
        if name in labels:
            raise OpenMetricsError(f"line {number}: label {name!r} repeated")
        labels[name] = unescape(value)
        position = match.end()
        if position < len(inner):
            if inner[position] != ",":
                raise OpenMetricsError(f"line {number}: labels must be separated by ','")
            position += 1
            if position == len(inner):
                raise OpenMetricsError(f"line {number}: a trailing ',' in labels")
    return labels


def parse(text: str) -> list[Family]:
    """Every metric family of an OpenMetrics text exposition, in order."""
    if not text.endswith("# EOF\n") and not text.endswith("# EOF"):
        raise OpenMetricsError("the exposition must end with '# EOF'")
    lines = text.split("\n")
    if lines[-1] == "":
        lines.pop()
    families: list[Family] = []
    seen: set[str] = set()
    current: Family | None = None
    for number, line in enumerate(lines, start=1):
        if line == "# EOF":
            if number != len(lines):
                raise OpenMetricsError(f"line {number}: text after '# EOF'")
            break
        if not line:
            raise OpenMetricsError(f"line {number}: empty line")
        descriptor = _DESCRIPTOR.match(line)
        if descriptor:
            kind, name, rest = descriptor.groups()
            if current is None or current.name != name:
                if name in seen:
                    raise OpenMetricsError(f"line {number}: family {name!r} appears twice")
                current = Family(name)
                families.append(current)
                seen.add(name)
            if kind == "TYPE":
                if rest not in TYPES:
                    raise OpenMetricsError(f"line {number}: unknown type {rest!r}")
                current.type = rest
            elif kind == "HELP":
                if not re.fullmatch(ESCAPED, rest):
                    raise OpenMetricsError(f"line {number}: HELP text not escaped")
                current.help = unescape(rest)
            else:
                current.unit = rest
            continue
        if line.startswith("#"):
            raise OpenMetricsError(f"line {number}: a comment that is no descriptor")
        sample = _SAMPLE.match(line)
        if not sample:
            raise OpenMetricsError(f"line {number}: not a sample: {line[:60]!r}")
        name, labels, value, timestamp = sample.groups()
        if current is None or not (name == current.name or (current.type != "gauge" and name.startswith(current.name))):
            raise OpenMetricsError(f"line {number}: sample {name!r} outside its family")
        parsed = float("nan") if value == "NaN" else float(value.replace("Inf", "inf"))
        current.samples.append(Sample(name, _labels(labels, number) if labels else {}, parsed,
                                      None if timestamp is None else float(timestamp)))
    else:
        raise OpenMetricsError("no '# EOF' line")
    return families
