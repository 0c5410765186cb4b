"""SMART READ THRESHOLDS, built by hand from SFF-8035i rev 2.0 "Attribute thresholds data
structure" (section 3.9 from memory): bytes 0-1 revision, 30 entries of 12 bytes (id, threshold,
10 reserved) from byte 2, byte 511 checksum."""

import numpy as np
import pytest

from triage.formats.ata_thresholds import (
    build_smart_thresholds,
    decode_thresholds_batch,
    parse_smart_thresholds,
    parse_smart_thresholds_revision,
)
from triage.formats.errors import LayoutError


def hand_built() -> bytearray:
    sector = bytearray(512)
    sector[0:2] = (16).to_bytes(2, "little")
    sector[2], sector[3] = 5, 36  # slot 0: id 5, threshold 36
    sector[14], sector[15] = 0, 99  # slot 1: empty (id 0) although a threshold byte is set
    sector[26], sector[27] = 9, 0  # slot 2: id 9, threshold 0 (never trips)
    sector[350], sector[351] = 197, 10  # slot 29, the last one
    sector[511] = (-sum(sector[:511])) % 256
    return sector


def test_thresholds_are_read_per_id_and_empty_slots_skipped():
    assert parse_smart_thresholds(bytes(hand_built())) == {5: 36, 9: 0, 197: 10}


def test_revision_is_bytes_0_1():
    assert parse_smart_thresholds_revision(bytes(hand_built())) == 16


def test_one_flipped_byte_is_rejected_by_the_checksum():
    sector = hand_built()
    sector[3] ^= 0x80
    with pytest.raises(LayoutError) as err:
        parse_smart_thresholds(bytes(sector))
    assert err.value.field == "thresholds.checksum"


def test_builder_round_trips_and_keeps_slot_order():
    thresholds = {1: 6, 3: 0, 5: 36, 10: 97, 197: 0}
    sector = build_smart_thresholds(thresholds, revision=2)
    assert sector[0:2] == b"\x02\x00" and sector[2:4] == bytes([1, 6]) and sector[14] == 3
    assert sum(sector) % 256 == 0
    assert parse_smart_thresholds(sector) == thresholds


def test_batch_decoder_equals_the_scalar_parser_on_random_sectors():
    rng = np.random.default_rng(11)
    count = 250
    sectors = rng.integers(0, 256, size=(count, 512), dtype=np.uint8)
    sectors[:, 2:362].reshape(count, 30, 12)[rng.random((count, 30)) < 0.4, 0] = 0
    sectors[:, 511] = (-sectors[:, :511].sum(axis=1, dtype=np.int64)) % 256
    sectors[17, 511] ^= 0xFF  # one row with a bad checksum
    header, thresholds = decode_thresholds_batch(sectors)
    assert list(header.index[~header["checksum_ok"]]) == [17]
    for i in range(count):
        if i == 17:
            with pytest.raises(LayoutError):
                parse_smart_thresholds(sectors[i].tobytes())
            continue
        mine = thresholds[thresholds["row"] == i]
        assert dict(zip(mine["attribute_id"], mine["threshold"])) == parse_smart_thresholds(
            sectors[i].tobytes()
        )
        assert header["revision"][i] == parse_smart_thresholds_revision(sectors[i].tobytes())
