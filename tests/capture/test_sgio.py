"""The SG_IO header as <scsi/sg.h> declares it, and how one exchange's status is judged."""

from __future__ import annotations

import ctypes
import struct

import pytest

from tests.capture.fakekernel import ABORTED_BY_DRIVE, INVALID_OPCODE, UNIT_ATTENTION_RESET
from triage.capture import sgio
from triage.capture.sense import Outcome

# <scsi/sg.h> struct sg_io_hdr in declaration order, with the C type of each member.
DECLARATION = [
    ("interface_id", "i"), ("dxfer_direction", "i"), ("cmd_len", "B"), ("mx_sb_len", "B"),
    ("iovec_count", "H"), ("dxfer_len", "I"), ("dxferp", "P"), ("cmdp", "P"), ("sbp", "P"),
    ("timeout", "I"), ("flags", "I"), ("pack_id", "i"), ("usr_ptr", "P"), ("status", "B"),
    ("masked_status", "B"), ("msg_status", "B"), ("sb_len_wr", "B"), ("host_status", "H"),
    ("driver_status", "H"), ("resid", "i"), ("duration", "I"), ("info", "I"),
]


def test_header_field_offsets_follow_the_c_declaration_with_native_alignment():
    # struct's "@" mode lays members out with the platform C compiler's alignment rules, an
    # independent computation of where each member of the <scsi/sg.h> declaration lands.
    prefix = "@"
    for name, code in DECLARATION:
        expected = struct.calcsize(prefix + code) - struct.calcsize(code)
        assert getattr(sgio.SgIoHdr, name).offset == expected, name
        prefix += code
    assert ctypes.sizeof(sgio.SgIoHdr) == struct.calcsize(prefix + "0P")  # trailing padding


def test_header_is_88_bytes_on_64_bit_linux():
    if ctypes.sizeof(ctypes.c_void_p) != 8:
        pytest.skip("the 88-byte figure is for LP64 (x86-64, arm64)")
    # LP64: 3 pointers + 1 pointer after pack_id (4 bytes padding before usr_ptr) -> 88 bytes
    assert ctypes.sizeof(sgio.SgIoHdr) == 88


def test_data_in_request_fills_the_header_as_sg_h_requires():
    cdb = bytes([0x85, 0x08, 0x0E] + [0] * 11 + [0xEC, 0])
    request = sgio.build_data_in_request(cdb, 512)
    h = request.header
    assert h.interface_id == ord("S")  # <scsi/sg.h>: 'S' for SCSI generic (required)
    assert h.dxfer_direction == -3  # SG_DXFER_FROM_DEV
    assert (h.cmd_len, h.dxfer_len, h.iovec_count) == (16, 512, 0)
    assert h.mx_sb_len == len(request.sense)
    assert ctypes.string_at(h.cmdp, h.cmd_len) == cdb
    assert h.dxferp == ctypes.addressof(request.data)


def test_sg_io_request_code_is_2285h():
    assert sgio.SG_IO == 0x2285  # <scsi/sg.h>


def result(status=0, sense=b"", host=0, driver=0, resid=0):
    return sgio.SgResult(bytes(512), sense, status, host, driver, resid, 0)


def test_clean_status_without_residual_is_ok():
    assert sgio.judge(result(), 512).outcome is Outcome.OK


def test_residual_count_is_a_short_transfer():
    verdict = sgio.judge(result(resid=512), 512)
    assert verdict.outcome is Outcome.OTHER and "0 of 512 bytes" in verdict.detail


def test_host_timeout_is_reported_as_timed_out():
    assert sgio.judge(result(host=sgio.DID_TIME_OUT), 512).detail == "timed out"


def test_no_connect_names_the_host_status():
    assert "DID_NO_CONNECT" in sgio.judge(result(host=0x01), 512).detail


def test_check_condition_with_aborted_sense_is_command_aborted():
    verdict = sgio.judge(result(status=0x02, sense=ABORTED_BY_DRIVE, driver=0x08), 512)
    assert verdict.outcome is Outcome.ABORTED and "ABRT" in verdict.detail


def test_check_condition_with_invalid_opcode_is_not_supported():
    verdict = sgio.judge(result(status=0x02, sense=INVALID_OPCODE, driver=0x08), 512)
    assert verdict.outcome is Outcome.NOT_SUPPORTED


def test_unit_attention_asks_for_a_retry():
    assert sgio.judge(result(status=0x02, sense=UNIT_ATTENTION_RESET), 512).outcome is Outcome.RETRY


def test_check_condition_without_sense_is_an_error():
    assert sgio.judge(result(status=0x02), 512).outcome is Outcome.OTHER
