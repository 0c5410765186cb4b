"""Sense data decoding and what each common failure means for the capture.

Sense buffers are built by hand from SPC-4 §4.5.2 (descriptor format, table "Descriptor format
sense data"), §4.5.3 (fixed format, table "Fixed format sense data"), SAT-4 "ATA Status Return
sense data descriptor" (type 09h, length 0Ch; from memory, matching Linux libata's
ata_gen_passthru_sense) and SAT-5 tables 212/213 (ATA registers in the fixed format INFORMATION
and COMMAND-SPECIFIC INFORMATION fields).
"""

from __future__ import annotations

import pytest

from triage.capture.sense import Outcome, SenseError, classify, decode_sense


def descriptor(key, asc, ascq, descriptors=b""):
    # byte 0 response code 72h, byte 1 sense key, 2 ASC, 3 ASCQ, 7 additional length
    return bytes([0x72, key, asc, ascq, 0, 0, 0, len(descriptors)]) + descriptors


def ata_status_return(error, status, count=0x0001, lba=0, device=0x40, extend=False):
    d = bytearray(14)
    d[0], d[1] = 0x09, 0x0C
    d[2] = 0x01 if extend else 0x00
    d[3] = error
    d[4], d[5] = count >> 8, count & 0xFF  # COUNT (15:8), (7:0)
    d[6], d[7] = (lba >> 24) & 0xFF, lba & 0xFF  # LBA (31:24), (7:0)
    d[8], d[9] = (lba >> 32) & 0xFF, (lba >> 8) & 0xFF  # LBA (39:32), (15:8)
    d[10], d[11] = (lba >> 40) & 0xFF, (lba >> 16) & 0xFF  # LBA (47:40), (23:16)
    d[12], d[13] = device, status
    return bytes(d)


def fixed(key, asc, ascq, info=b"\x00\x00\x00\x00", csi=b"\x00\x00\x00\x00", valid=False):
    # byte 0 VALID (bit 7) | 70h, byte 2 sense key, 3-6 INFORMATION, 7 additional length (10), 8-11
    # COMMAND-SPECIFIC INFORMATION, 12 ASC, 13 ASCQ, 14-17 FRU / sense-key specific
    return bytes([0xF0 if valid else 0x70, 0, key]) + info + bytes([10]) + csi + bytes([asc, ascq, 0, 0, 0, 0])


def test_descriptor_sense_with_ata_err_and_abrt_is_command_aborted():
    # libata's answer to a drive aborting SMART READ DATA: ABORTED COMMAND, ASC/ASCQ 00h/00h,
    # ATA status 51h (DRDY, DSC, ERR) and error 04h (ABRT)
    sense = decode_sense(descriptor(0x0B, 0x00, 0x00, ata_status_return(error=0x04, status=0x51)))
    assert (sense.sense_key, sense.asc, sense.ascq) == (0x0B, 0x00, 0x00)
    assert sense.ata.error == 0x04 and sense.ata.status == 0x51 and sense.ata.aborted
    assert classify(sense) is Outcome.ABORTED


def test_ata_abrt_aborts_even_under_a_different_sense_key():
    # some translation layers report the ATA abort as ILLEGAL REQUEST without ASC 20h / 24h
    sense = decode_sense(descriptor(0x05, 0x00, 0x00, ata_status_return(error=0x04, status=0x51)))
    assert classify(sense) is Outcome.ABORTED


def test_ata_status_return_reassembles_the_48_bit_lba_and_count():
    raw = ata_status_return(error=0, status=0x50, count=0x1234, lba=0x0A0B0C0D0E0F, extend=True)
    ata = decode_sense(descriptor(0x01, 0x00, 0x1D, raw)).ata
    assert ata.lba == 0x0A0B0C0D0E0F and ata.count == 0x1234 and ata.extend


@pytest.mark.parametrize("asc", [0x20, 0x24])
def test_illegal_request_invalid_opcode_or_field_is_not_supported(asc):
    # SPC-4 Annex D: 20h/00h INVALID COMMAND OPERATION CODE, 24h/00h INVALID FIELD IN CDB
    assert classify(decode_sense(fixed(0x05, asc, 0x00))) is Outcome.NOT_SUPPORTED


def test_fixed_format_carries_ata_error_and_status_in_the_information_field():
    # SAT-5 table 212: INFORMATION byte 0 ERROR (sense byte 3), byte 1 STATUS (sense byte 4),
    # byte 2 DEVICE, byte 3 COUNT(7:0); table 213: byte 8 flags (80h EXTEND), 9-11 LBA 7:0..23:16
    sense = decode_sense(fixed(0x0B, 0x00, 0x00, info=bytes([0x04, 0x51, 0x40, 0x01]),
                               csi=bytes([0x80, 0x03, 0x02, 0x01]), valid=True))
    assert (sense.ata.error, sense.ata.status, sense.ata.device, sense.ata.count) == (0x04, 0x51, 0x40, 1)
    assert sense.ata.lba == 0x010203 and sense.ata.extend
    assert classify(sense) is Outcome.ABORTED


def test_fixed_format_without_valid_information_has_no_ata_registers():
    # SPC-4 §4.5.3: VALID = 0 means the INFORMATION field is not defined
    assert decode_sense(fixed(0x05, 0x24, 0x00, info=bytes([0x04, 0x51, 0, 0]))).ata is None


def test_recovered_error_with_pass_through_information_is_success():
    # ASC/ASCQ 00h/1Dh ATA PASS THROUGH INFORMATION AVAILABLE, status without ERR
    sense = decode_sense(descriptor(0x01, 0x00, 0x1D, ata_status_return(error=0, status=0x50)))
    assert classify(sense) is Outcome.OK


def test_deferred_error_response_codes_are_decoded_too():
    assert decode_sense(bytes([0x71]) + fixed(0x02, 0x04, 0x00)[1:]).deferred
    assert decode_sense(bytes([0x73]) + descriptor(0x02, 0x04, 0x00)[1:]).descriptor_format


def test_not_ready_medium_and_hardware_errors_are_told_apart():
    assert classify(decode_sense(fixed(0x02, 0x04, 0x00))) is Outcome.NOT_READY
    assert classify(decode_sense(fixed(0x03, 0x11, 0x00))) is Outcome.MEDIUM_ERROR
    assert classify(decode_sense(fixed(0x04, 0x44, 0x00))) is Outcome.HARDWARE_ERROR


def test_unit_attention_is_retried():
    # SPC-4: a command answered with UNIT ATTENTION was not executed
    assert classify(decode_sense(fixed(0x06, 0x29, 0x00))) is Outcome.RETRY


def test_description_names_key_code_and_ata_registers():
    sense = decode_sense(descriptor(0x0B, 0x00, 0x00, ata_status_return(error=0x04, status=0x51)))
    assert sense.describe() == (
        "sense key Bh ABORTED COMMAND, ASC/ASCQ 00h/00h NO ADDITIONAL SENSE INFORMATION; "
        "ATA status 51h (ERR), error 04h (ABRT)"
    )


@pytest.mark.parametrize("raw", [b"", b"\x70", b"\x00" * 18, b"\x7f" + b"\x00" * 17])
def test_malformed_sense_is_refused(raw):
    with pytest.raises(SenseError):
        decode_sense(raw)
