"""Every payload the generator writes follows its standard's layout and checksum."""

from __future__ import annotations

import numpy as np

from triage.demo.writer import health_blocks, smart_blocks
from triage.formats.ata_identify import parse_ata_identify
from triage.formats.ata_smart import SmartAttribute, build_smart_data, parse_smart_data
from triage.formats.ata_thresholds import parse_smart_thresholds
from triage.formats.nvme_health import NvmeHealth, build_nvme_health, parse_nvme_health
from triage.formats.nvme_identify import parse_nvme_identify

PAYLOAD_BYTES = {
    "ata": {"identify": 512, "smart": 512, "thresholds": 512},
    "nvme": {"identify": 4096, "health": 512},
}


def test_every_payload_has_the_length_its_standard_defines(small_lines):
    # ACS-3 IDENTIFY DEVICE and SMART READ DATA/THRESHOLDS: one 512-byte sector each;
    # NVMe Base 2.0: Identify Controller 4096 bytes, log page 02h 512 bytes.
    for name, number, obj in small_lines:
        for field, size in PAYLOAD_BYTES[obj["bus"]].items():
            if field in obj:
                assert len(bytes.fromhex(obj[field])) == size, (name, number, field)


def test_smart_checksum_is_twos_complement_of_the_first_511_bytes(small_lines):
    # ACS-3, SMART READ DATA: byte 511 "shall contain the two's complement of the sum of the
    # first 511 bytes" -> the 512 bytes sum to 0 mod 256. Checked here by plain summing.
    checked = 0
    for _, _, obj in small_lines:
        for field in ("smart", "thresholds"):
            if field in obj:
                data = bytes.fromhex(obj[field])
                assert (sum(data[:511]) + data[511]) % 256 == 0
                assert data[511] == (256 - sum(data[:511]) % 256) % 256
                checked += 1
    assert checked > 0


def test_identify_integrity_word_sums_to_zero(small_lines):
    # ACS-3 IDENTIFY DEVICE word 255: signature A5h in bits 7:0 and a checksum in bits 15:8
    # such that all 512 bytes sum to 0 mod 256.
    for _, _, obj in small_lines:
        if obj["bus"] == "ata":
            data = bytes.fromhex(obj["identify"])
            assert data[510] == 0xA5
            assert sum(data) % 256 == 0


def test_every_payload_decodes_with_the_format_parsers(small_lines, small_truth):
    serials = set(small_truth.drives["serial"])
    for _, _, obj in small_lines:
        if obj["bus"] == "ata":
            identity = parse_ata_identify(bytes.fromhex(obj["identify"]))
            smart = parse_smart_data(bytes.fromhex(obj["smart"]))
            assert smart.attributes, "a SMART table with no attributes"
            if "thresholds" in obj:
                thresholds = parse_smart_thresholds(bytes.fromhex(obj["thresholds"]))
                assert set(thresholds) == {a.id for a in smart.attributes}
        else:
            identity = parse_nvme_identify(bytes.fromhex(obj["identify"]))
            parse_nvme_health(bytes.fromhex(obj["health"]))
        assert identity.serial in serials


def test_normalized_values_stay_in_the_sff_range_and_worst_never_exceeds_value(small_lines):
    # SFF-8035i: normalized values 1-253 (0 and 254-255 are not valid values); "worst" is the
    # lowest value seen, so it cannot be above the current value.
    for _, _, obj in small_lines:
        if obj["bus"] == "ata":
            for a in parse_smart_data(bytes.fromhex(obj["smart"])).attributes:
                assert 1 <= a.value <= 253 and 1 <= a.worst <= a.value, a


def test_vectorised_smart_sectors_equal_the_builder_byte_for_byte():
    rng = np.random.default_rng(3)
    ids = (1, 5, 9, 194, 197, 199)
    flags = (0x000F, 0x0033, 0x0032, 0x0022, 0x0012, 0x003E)
    template = np.frombuffer(
        build_smart_data(SmartAttribute(i, f, 1, 1, 0) for i, f in zip(ids, flags)), dtype=np.uint8
    )
    value = rng.integers(1, 254, (50, len(ids)))
    worst = np.minimum(value, rng.integers(1, 254, (50, len(ids))))
    raw = rng.integers(0, 1 << 48, (50, len(ids)), dtype=np.int64)
    block = smart_blocks(template, value, worst, raw)
    for row in range(50):
        expected = build_smart_data(
            SmartAttribute(i, f, int(value[row, j]), int(worst[row, j]), int(raw[row, j]))
            for j, (i, f) in enumerate(zip(ids, flags))
        )
        assert block[row].tobytes() == expected


def test_vectorised_health_pages_equal_the_builder_byte_for_byte():
    rng = np.random.default_rng(4)
    names = NvmeHealth.__dataclass_fields__
    small = {"critical_warning": 64, "available_spare_pct": 101, "spare_threshold_pct": 101,
             "percentage_used": 256, "composite_temperature_k": 65536}
    fields = {
        name: rng.integers(0, small.get(name, 1 << 31), 40, dtype=np.int64) for name in names
    }
    fields["data_units_written"] = rng.integers(0, 1 << 62, 40, dtype=np.int64)  # a wide counter
    block = health_blocks(fields)
    for row in range(40):
        expected = build_nvme_health(NvmeHealth(**{n: int(v[row]) for n, v in fields.items()}))
        assert block[row].tobytes() == expected
