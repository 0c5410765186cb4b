"""NVMe Identify Controller (CNS 01h), built by hand from NVMe Base Specification 2.0, 5.17.2.1
"Identify Controller data structure" (section number from memory): SN bytes 4-23, MN 24-63,
FR 64-71 (ASCII, space padded, memory order), TNVMCAP bytes 280-295 (128-bit little-endian)."""

import struct

import numpy as np
import pytest

from triage.formats.errors import LayoutError
from triage.formats.nvme_identify import (
    build_nvme_identify,
    decode_nvme_identify_batch,
    parse_nvme_identify,
)

INT64_MAX = 2**63 - 1


def hand_built(capacity: int = 1_920_383_410_176) -> bytearray:
    data = bytearray(4096)
    data[4:24] = b"CNV1920X0001".ljust(20, b" ")
    data[24:64] = b"Corvid NV1920".ljust(40, b" ")
    data[64:72] = b"CV1.0".ljust(8, b" ")
    struct.pack_into("<QQ", data, 280, capacity & (2**64 - 1), capacity >> 64)
    return data


def test_strings_are_in_memory_order_without_byte_swapping():
    parsed = parse_nvme_identify(bytes(hand_built()))
    assert parsed.serial == "CNV1920X0001"
    assert parsed.model == "Corvid NV1920"
    assert parsed.firmware == "CV1.0"


def test_total_capacity_is_128_bit_little_endian():
    value = 2**64 + 5  # needs the upper 8 bytes
    assert parse_nvme_identify(bytes(hand_built(value))).total_capacity_bytes == value


def test_non_printable_firmware_bytes_come_out_escaped():
    data = hand_built()
    data[64:72] = b"C\x07\x1b]\x80\\  "
    assert parse_nvme_identify(bytes(data)).firmware == "C\\x07\\x1b]\\x80\\\\"


def test_a_structure_that_is_not_4096_bytes_is_rejected():
    with pytest.raises(LayoutError) as err:
        parse_nvme_identify(bytes(512))
    assert err.value.field == "nvme_identify.length"


def test_builder_places_fields_where_the_standard_puts_them_and_invents_no_vendor():
    data = build_nvme_identify(serial="CNV1920X0001", model="Corvid NV1920", firmware="CV1.0",
                               total_capacity_bytes=2**64 + 5)
    by_hand = hand_built(2**64 + 5)
    assert data[4:72] == by_hand[4:72]  # SN, MN, FR
    assert data[280:296] == by_hand[280:296]  # TNVMCAP
    assert struct.unpack_from("<HH", data, 0) == (0, 0)  # VID / SSVID: no real vendor
    assert struct.unpack_from("<I", data, 80)[0] == 0x00020000  # VER 2.0.0


def test_builder_round_trips_through_the_parser():
    parsed = parse_nvme_identify(build_nvme_identify(
        serial="QN4400721", model="Corvid NV3840", firmware="CV2.1b",
        total_capacity_bytes=3_840_755_982_336,
    ))
    assert (parsed.serial, parsed.model, parsed.firmware, parsed.total_capacity_bytes) == (
        "QN4400721", "Corvid NV3840", "CV2.1b", 3_840_755_982_336
    )


def test_batch_decoder_equals_the_scalar_parser_and_saturates_capacity():
    rng = np.random.default_rng(3)
    count = 200
    rows = rng.integers(0, 256, size=(count, 4096), dtype=np.uint8)
    alphabet = np.frombuffer(b"CNV0123456789 -.", dtype=np.uint8)
    plain = rng.random(count) < 0.6  # ordinary space-padded strings in most rows
    for i in np.flatnonzero(plain):
        rows[i, 4:72] = rng.choice(alphabet, size=68)
        rows[i, 4 + int(rng.integers(0, 20)) : 24] = 0x20
    small = rng.random(count) < 0.5
    rows[small, 287:296] = 0  # capacity below 2**56: fits int64
    frame = decode_nvme_identify_batch(rows)
    assert len(frame) == count
    for i in range(count):
        expected = parse_nvme_identify(rows[i].tobytes())
        row = frame.iloc[i]
        assert (row["serial"], row["model"], row["firmware"]) == (
            expected.serial, expected.model, expected.firmware
        )
        # Store columns are int64: 128-bit values saturate at 2**63-1 (triage.store.schema).
        assert row["total_capacity_bytes"] == min(expected.total_capacity_bytes, INT64_MAX)
    assert (frame["total_capacity_bytes"] == INT64_MAX).any()
    assert (frame["total_capacity_bytes"] < INT64_MAX).any()
