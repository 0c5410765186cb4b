"""NVMe SMART / Health Information log page 02h, built by hand from NVMe Base Specification 2.0,
5.16.1.3 "SMART / Health Information (Log Identifier 02h)" (section number from memory)."""

import dataclasses
import struct

import numpy as np
import pytest

from triage.formats.errors import LayoutError
from triage.formats.nvme_health import (
    WARN_PMR_READ_ONLY,
    WARN_READ_ONLY,
    WARN_RELIABILITY_DEGRADED,
    WARN_SPARE_BELOW_THRESHOLD,
    WARN_TEMPERATURE,
    WARN_VOLATILE_BACKUP_FAILED,
    NvmeHealth,
    build_nvme_health,
    critical_warning_names,
    decode_nvme_health_batch,
    parse_nvme_health,
)

INT64_MAX = 2**63 - 1
BIG = 2**64 + 12_345  # a counter that needs the upper 8 bytes of its 16


def put_u128(data: bytearray, offset: int, value: int) -> None:
    struct.pack_into("<QQ", data, offset, value & (2**64 - 1), value >> 64)


def hand_built() -> bytearray:
    data = bytearray(512)
    data[0] = 0b0000_0101  # critical warning: spare below threshold + reliability degraded
    struct.pack_into("<H", data, 1, 318)  # composite temperature, kelvin
    data[3] = 7  # available spare %
    data[4] = 10  # available spare threshold %
    data[5] = 255  # percentage used may exceed 100
    put_u128(data, 32, BIG)  # data units read
    put_u128(data, 48, 98_765_432)  # data units written
    put_u128(data, 64, 1_000_001)  # host read commands
    put_u128(data, 80, 2_000_002)  # host write commands
    put_u128(data, 96, 4_321)  # controller busy time, minutes
    put_u128(data, 112, 77)  # power cycles
    put_u128(data, 128, 26_280)  # power on hours
    put_u128(data, 144, 13)  # unsafe shutdowns
    put_u128(data, 160, 2)  # media and data integrity errors
    put_u128(data, 176, 40)  # number of error information log entries
    struct.pack_into("<I", data, 192, 125)  # warning composite temperature time, minutes
    struct.pack_into("<I", data, 196, 3)  # critical composite temperature time, minutes
    return data


def test_every_field_is_read_from_its_offset():
    parsed = parse_nvme_health(bytes(hand_built()))
    assert parsed == NvmeHealth(
        critical_warning=0b101, composite_temperature_k=318, available_spare_pct=7,
        spare_threshold_pct=10, percentage_used=255, data_units_read=BIG,
        data_units_written=98_765_432, host_read_commands=1_000_001,
        host_write_commands=2_000_002, controller_busy_minutes=4_321, power_cycles=77,
        power_on_hours=26_280, unsafe_shutdowns=13, media_errors=2, error_log_entries=40,
        warning_temp_minutes=125, critical_temp_minutes=3,
    )


def test_counters_above_2_to_the_64_are_kept_exactly():
    assert parse_nvme_health(bytes(hand_built())).data_units_read == 2**64 + 12_345


def test_a_page_that_is_not_512_bytes_is_rejected():
    with pytest.raises(LayoutError) as err:
        parse_nvme_health(bytes(4096))
    assert err.value.field == "nvme_health.length"


def test_critical_warning_bits_0_to_5_follow_the_standard():
    # NVMe Base 2.0, log 02h byte 0: bit 0 spare, 1 temperature, 2 reliability, 3 read-only,
    # 4 volatile memory backup, 5 persistent memory region read-only.
    assert [WARN_SPARE_BELOW_THRESHOLD, WARN_TEMPERATURE, WARN_RELIABILITY_DEGRADED,
            WARN_READ_ONLY, WARN_VOLATILE_BACKUP_FAILED, WARN_PMR_READ_ONLY] == [
        1 << bit for bit in range(6)
    ]


def test_critical_warning_names_list_the_set_bits_in_order():
    assert critical_warning_names(0) == []
    assert critical_warning_names(0b101) == ["spare-low", "degraded"]
    assert len(critical_warning_names(0x3F)) == 6


def test_reserved_warning_bits_are_named_not_dropped():
    assert critical_warning_names(0x80) == ["reserved-bit-7"]


def test_builder_matches_the_hand_built_page():
    assert build_nvme_health(parse_nvme_health(bytes(hand_built()))) == bytes(hand_built())


def test_builder_refuses_a_value_wider_than_its_field():
    health = parse_nvme_health(bytes(hand_built()))
    with pytest.raises(ValueError, match="percentage_used"):
        build_nvme_health(dataclasses.replace(health, percentage_used=256))


def test_batch_decoder_equals_the_scalar_parser_with_saturated_counters():
    rng = np.random.default_rng(5)
    count = 300
    pages = rng.integers(0, 256, size=(count, 512), dtype=np.uint8)
    small = rng.random((count, 10)) < 0.6  # most counters small enough for int64
    for k in range(10):
        offset = 32 + 16 * k
        pages[small[:, k], offset + 7 : offset + 16] = 0
    frame = decode_nvme_health_batch(pages)
    names = [f.name for f in dataclasses.fields(NvmeHealth)]
    assert list(frame.columns) == names
    assert all(str(t) == "int64" for t in frame.dtypes)
    for i in range(count):
        expected = parse_nvme_health(pages[i].tobytes())
        for name in names:
            # The store keeps int64: 128-bit counters saturate at 2**63-1 (triage.store.schema).
            assert frame[name].iat[i] == min(getattr(expected, name), INT64_MAX), (i, name)
