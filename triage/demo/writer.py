"""Write a generated fleet as capture files and a removal log (docs/capture-format.md).

One gzip-compressed JSON Lines file per site per night, ``<site>-<YYYY-MM-DD>.jsonl.gz``, written
night by night so memory does not grow with the window; plus ``removals.csv`` (RFC 4180). The byte
structures come from the builders in ``triage.formats``: the static ones (IDENTIFY, thresholds)
are built once per drive or model with the builders themselves; the nightly ones (SMART READ
DATA, NVMe log 02h) are built for a whole model at once by filling the fields of a
builder-made template at the offsets ``triage.formats`` defines, then fixing the checksum by the
same rule (tests compare the result with the builders byte for byte).

Files are byte-identical for the same fleet: gzip headers carry no name and a zero mtime.
"""

from __future__ import annotations

import csv
import gzip
import io
import json
from collections import deque
from concurrent.futures import Future, ThreadPoolExecutor
from dataclasses import fields
from pathlib import Path
from typing import Callable

import numpy as np

from triage.demo.fleet import Fleet, FleetSpec, NightState, generate_fleet
from triage.demo.readings import ATTRIBUTE_FLAGS_THRESHOLDS, ata_readings, nvme_readings
from triage.formats import ata_smart, nvme_health
from triage.formats.ata_identify import build_ata_identify
from triage.formats.ata_smart import SmartAttribute, build_smart_data
from triage.formats.ata_thresholds import build_smart_thresholds
from triage.formats.nvme_identify import build_nvme_identify

REMOVALS_FILE = "removals.csv"
REMOVALS_HEADER = ("serial", "removed_at", "reason", "note")
#: Kinds of invalid line appended when ``FleetSpec.bad_lines`` > 0, in turn.
BAD_LINE_KINDS = ("bad-json", "bad-hex", "wrong-length", "checksum", "missing-field", "bad-timestamp")

#: Lines built and compressed per step: bounds memory for very large fleets.
CHUNK_ROWS = 8192

Progress = Callable[[int, int], None]


def capture_file_name(site: str, day) -> str:
    return f"{site}-{day.isoformat()}.jsonl.gz"


def write_captures(
    fleet: Fleet, out_dir: Path, *, progress: Progress | None = None, compresslevel: int = 3
) -> list[Path]:
    """Write every night's capture files and ``removals.csv`` into ``out_dir``; return the paths.

    ``progress(done, total)`` is called after each night (total = nights).
    """
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    encoder = _Encoder(fleet)
    bad_plan = _bad_line_plan(fleet.spec)
    written: list[Path] = []
    total = fleet.spec.days
    # Lines are built a chunk at a time and handed to one compressing thread (zlib releases
    # the GIL), so building and compressing overlap while memory stays at a few chunks of text
    # however large the fleet. A single worker keeps the writes in order.
    with ThreadPoolExecutor(max_workers=1) as pool:
        in_flight: deque[Future] = deque()

        def submit(fn, *args) -> None:
            in_flight.append(pool.submit(fn, *args))
            while len(in_flight) > 2:
                in_flight.popleft().result()

        for state in fleet.nights():
            site_of_row = encoder.site_of_drive[state.drive]
            for site_index, site in enumerate(fleet.spec.sites):
                rows = np.flatnonzero(site_of_row == site_index)
                if not len(rows):
                    continue
                path = out_dir / capture_file_name(site.name, state.day)
                sink = _GzipSink(path, compresslevel)
                first: list[str] = []
                for begin in range(0, len(rows), CHUNK_ROWS):
                    text = encoder.lines(_take(state, rows[begin : begin + CHUNK_ROWS]))
                    first = first or text
                    submit(sink.write, ("\n".join(text) + "\n").encode("utf-8"))
                bad = [_bad_line(kind, first) for kind in bad_plan.get((state.night, site_index), ())]
                if bad:
                    submit(sink.write, ("\n".join(bad) + "\n").encode("utf-8"))
                submit(sink.close)
                written.append(path)
            if progress is not None:
                progress(state.night + 1, total)
        while in_flight:
            in_flight.popleft().result()
    written.append(write_removals(fleet, out_dir / REMOVALS_FILE))
    return written


def write_removals(fleet: Fleet, path: Path) -> Path:
    """The removal log: RFC 4180 (CRLF line ends, quotes where needed), times in site offset."""
    offsets = {s.name: s.utc_offset_minutes for s in fleet.spec.sites}
    buffer = io.StringIO(newline="")
    writer = csv.writer(buffer, lineterminator="\r\n", quoting=csv.QUOTE_MINIMAL)
    writer.writerow(REMOVALS_HEADER)
    for row in fleet.removals.itertuples(index=False):
        writer.writerow([row.serial, _local_text(row.removed_at, offsets[row.site]), row.reason, row.note])
    path.write_bytes(buffer.getvalue().encode("utf-8"))
    return path


def write_sample(out_dir: Path, *, seed: int = 14) -> list[Path]:
    """The small sample under ``sample_data/``: about 150 drives over 30 nights."""
    spec = FleetSpec(seed=seed, n_drives=150, days=30)
    return write_captures(generate_fleet(spec), out_dir)


def _local_text(moment, offset_minutes: int) -> str:
    local = moment.tz_convert(None) + np.timedelta64(offset_minutes, "m")
    return local.strftime("%Y-%m-%dT%H:%M:%S") + _offset_suffix(offset_minutes)


def _offset_suffix(offset_minutes: int) -> str:
    if offset_minutes == 0:
        return "Z"
    sign = "+" if offset_minutes > 0 else "-"
    hours, minutes = divmod(abs(offset_minutes), 60)
    return f"{sign}{hours:02d}:{minutes:02d}"


class _GzipSink:
    """A gzip file written under a temporary name and renamed when closed (no half files).

    The header carries no file name and a zero mtime, so the bytes depend on the data only.
    """

    def __init__(self, path: Path, compresslevel: int) -> None:
        self.path = path
        self.tmp = path.with_name(path.name + ".part")
        self.raw = None
        self.gz = None
        self.compresslevel = compresslevel

    def write(self, data: bytes) -> None:
        if self.gz is None:
            self.raw = open(self.tmp, "wb")
            self.gz = gzip.GzipFile(filename="", mode="wb", fileobj=self.raw, mtime=0,
                                    compresslevel=self.compresslevel)
        self.gz.write(data)

    def close(self) -> None:
        self.gz.close()
        self.raw.close()
        self.tmp.replace(self.path)


def _take(state: NightState, rows: np.ndarray) -> NightState:
    """The same night restricted to some of its rows."""
    parts = {f.name: getattr(state, f.name) for f in fields(NightState)}
    for name, value in parts.items():
        if isinstance(value, np.ndarray):
            parts[name] = value[rows]
    return NightState(**parts)


def _hex_rows(block: np.ndarray) -> list[str]:
    """Each row of a uint8 block as lowercase hex (one conversion for the whole block)."""
    if not len(block):
        return []
    width = 2 * block.shape[1]
    text = np.ascontiguousarray(block).tobytes().hex()
    return [text[i : i + width] for i in range(0, len(text), width)]


class _Encoder:
    """Static per-drive pieces built once, nightly payloads built per model in one go."""

    def __init__(self, fleet: Fleet) -> None:
        self.fleet = fleet
        spec = fleet.spec
        drives = fleet.drives
        a = fleet.arrays
        self.model_of_drive = a["model"]
        self.site_of_drive = fleet.hosts["site"].to_numpy()[a["host"]]
        self.thresholds_host = fleet.hosts["thresholds"].to_numpy()[a["host"]]
        # index of each drive within its model (for the identify blocks)
        self.index_in_model = np.zeros(len(drives), dtype=np.int64)
        self.identify: list[np.ndarray] = []
        self.smart_template: dict[int, np.ndarray] = {}
        self.thresholds_hex: dict[int, str] = {}
        serials = drives["serial"].tolist()
        firmwares = drives["firmware"].tolist()
        wwns = drives["wwn"].tolist()
        for mi, m in enumerate(spec.models):
            sel = np.flatnonzero(a["model"] == mi)
            self.index_in_model[sel] = np.arange(len(sel))
            blocks = []
            for i in sel.tolist():
                if m.bus == "ata":
                    data = build_ata_identify(
                        serial=serials[i], firmware=firmwares[i], model=m.name,
                        sectors=m.sectors, logical_sector_size=m.logical_sector_size,
                        wwn=wwns[i], rotation_rpm=m.rotation_rpm,
                    )
                else:
                    data = build_nvme_identify(serial=serials[i], model=m.name,
                                               firmware=firmwares[i],
                                               total_capacity_bytes=m.user_capacity_bytes)
                blocks.append(np.frombuffer(data, dtype=np.uint8))
            size = 512 if m.bus == "ata" else 4096
            self.identify.append(np.stack(blocks) if blocks else np.zeros((0, size), np.uint8))
            if m.bus == "ata":
                ids = m.smart_attributes
                template = build_smart_data(
                    SmartAttribute(i, ATTRIBUTE_FLAGS_THRESHOLDS[i][0], 1, 1, 0) for i in ids
                )
                self.smart_template[mi] = np.frombuffer(template, dtype=np.uint8)
                self.thresholds_hex[mi] = build_smart_thresholds(
                    {i: ATTRIBUTE_FLAGS_THRESHOLDS[i][1] for i in ids}
                ).hex()
        # '{"capture": 1, "host": ..., "group": ..., "taken_at": "' per drive
        self.prefix = [
            '{"capture": 1, "host": %s, "device": %s, "slot": %s, "group": %s, "taken_at": "'
            % (json.dumps(h), json.dumps(dev), json.dumps(s), json.dumps(g))
            for h, dev, s, g in zip(drives["host"], drives["device"], drives["slot"], drives["group"])
        ]
        self.offsets = np.array([s.utc_offset_minutes for s in spec.sites])
        self.subsecond = np.array([s.subsecond for s in spec.sites])

    def timestamps(self, state: NightState) -> list[str]:
        site = self.site_of_drive[state.drive]
        offset = self.offsets[site]
        local = (state.taken_at_us + offset * 60_000_000).astype("datetime64[us]")
        out = np.empty(len(state), dtype=object)
        for s in np.unique(site):
            rows = site == s
            text = np.datetime_as_string(local[rows], unit="ms" if self.subsecond[s] else "s")
            out[rows] = np.char.add(text, _offset_suffix(int(self.offsets[s]))).astype(object)
        return out.tolist()

    def lines(self, state: NightState) -> list[str]:
        fleet = self.fleet
        n = len(state)
        stamps = self.timestamps(state)
        tails: list[str | None] = [None] * n
        for mi, m in enumerate(fleet.spec.models):
            if m.bus != "ata":
                continue
            r = ata_readings(fleet, state, mi)
            if not len(r.rows):
                continue
            drv = state.drive[r.rows]
            smart = _hex_rows(smart_blocks(self.smart_template[mi], r.value, r.worst, r.raw))
            ident = _hex_rows(self.identify[mi][self.index_in_model[drv]])
            thr = self.thresholds_hex[mi]
            with_thr = self.thresholds_host[drv]
            for k, row in enumerate(r.rows.tolist()):
                end = f'", "thresholds": "{thr}"}}' if with_thr[k] else '"}'
                tails[row] = f'", "bus": "ata", "identify": "{ident[k]}", "smart": "{smart[k]}{end}'
        rows, fields = nvme_readings(fleet, state)
        if len(rows):
            drv = state.drive[rows]
            health = _hex_rows(health_blocks(fields))
            models = self.model_of_drive[drv]
            for mi in np.unique(models):
                sub = np.flatnonzero(models == mi)
                ident = _hex_rows(self.identify[mi][self.index_in_model[drv[sub]]])
                for k, j in enumerate(sub.tolist()):
                    tails[rows[j]] = f'", "bus": "nvme", "identify": "{ident[k]}", "health": "{health[j]}"}}'
        prefix = self.prefix
        return [prefix[d] + stamps[i] + tails[i] for i, d in enumerate(state.drive.tolist())]


def smart_blocks(template: np.ndarray, value: np.ndarray, worst: np.ndarray, raw: np.ndarray) -> np.ndarray:
    """SMART READ DATA sectors for many drives of one model at once.

    ``template`` is a builder-made sector with the model's attribute ids and flags in table order;
    column j of ``value``/``worst``/``raw`` fills slot j (SFF-8035i entry layout as defined in
    ``triage.formats.ata_smart``); byte 511 is then the two's complement of the sum of bytes
    0-510 (ACS-3 SMART READ DATA checksum).
    """
    n = value.shape[0]
    block = np.tile(template, (n, 1))
    raw_bytes = np.ascontiguousarray(raw.astype("<u8")).view(np.uint8).reshape(n, -1, 8)
    for j in range(value.shape[1]):
        start = ata_smart.TABLE_OFFSET + j * ata_smart.ENTRY_SIZE
        block[:, start + ata_smart.ENTRY_VALUE] = value[:, j]
        block[:, start + ata_smart.ENTRY_WORST] = worst[:, j]
        raw_at = start + ata_smart.ENTRY_RAW
        block[:, raw_at : raw_at + ata_smart.ENTRY_RAW_SIZE] = raw_bytes[:, j, : ata_smart.ENTRY_RAW_SIZE]
    total = block[:, : ata_smart.CHECKSUM_OFFSET].sum(axis=1, dtype=np.int64)
    block[:, ata_smart.CHECKSUM_OFFSET] = (-total) % 256
    return block


def health_blocks(fields: dict[str, np.ndarray]) -> np.ndarray:
    """NVMe log 02h pages for many drives at once, at the offsets of ``nvme_health.FIELDS``."""
    n = len(next(iter(fields.values())))
    block = np.zeros((n, nvme_health.HEALTH_LENGTH), dtype=np.uint8)
    for name, offset, size in nvme_health.FIELDS:
        values = np.asarray(fields[name], dtype=np.int64)
        if (values < 0).any() or (size < 8 and (values >= 1 << (8 * size)).any()):
            raise ValueError(f"{name} does not fit its {size}-byte field")
        little = np.ascontiguousarray(values.astype("<u8")).view(np.uint8).reshape(n, 8)
        block[:, offset : offset + min(size, 8)] = little[:, : min(size, 8)]
    return block


def _bad_line_plan(spec: FleetSpec) -> dict[tuple[int, int], list[str]]:
    """Which invalid lines go into which (night, site) file: spread over the window."""
    plan: dict[tuple[int, int], list[str]] = {}
    for j in range(spec.bad_lines):
        night = (j * 7 + spec.days // 2) % spec.days
        site = j % len(spec.sites)
        plan.setdefault((night, site), []).append(BAD_LINE_KINDS[j % len(BAD_LINE_KINDS)])
    return plan


def _bad_line(kind: str, good: list[str]) -> str:
    """An invalid line of ``kind`` made from a good line of the same file."""
    line = good[0]
    obj = json.loads(line)
    payload = "smart" if obj["bus"] == "ata" else "health"
    if kind == "bad-json":
        return line[: len(line) // 2]
    if kind == "bad-hex":
        obj[payload] = "zz" + obj[payload][2:]
    elif kind == "wrong-length":
        obj["identify"] = obj["identify"][:-2]
    elif kind == "checksum":
        ata = [json.loads(g) for g in good if '"bus": "ata"' in g]
        if not ata:  # NVMe structures have no checksum: fall back to broken JSON
            return line[: len(line) // 2]
        obj = ata[0]
        data = bytearray.fromhex(obj["smart"])
        data[ata_smart.TABLE_OFFSET + ata_smart.ENTRY_VALUE] ^= 0x01  # checksum byte left alone
        obj["smart"] = data.hex()
    elif kind == "missing-field":
        del obj["host"]
    elif kind == "bad-timestamp":
        obj["taken_at"] = obj["taken_at"][:19]  # no offset: not RFC 3339
    return json.dumps(obj)
