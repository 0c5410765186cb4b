"""A stand-in for the kernel below ``DeviceIO``: open / ioctl / close on invented drives.

It replaces exactly the three system calls. Everything above them (the ``sg_io_hdr`` and
``nvme_passthru_cmd`` structures, the allow-list, sense decoding) runs for real. To stay an
independent check it never uses the project's ctypes structures: it reads and writes the request
with ``struct`` format strings transcribed from the C declarations in <scsi/sg.h> and
<linux/nvme_ioctl.h> (``@`` = native sizes and C alignment), and it decodes the CDB the way a
SCSI / ATA translation layer would per SAT-4 ("ATA PASS-THROUGH (16) command" table).
"""

from __future__ import annotations

import ctypes
import errno
import struct
from dataclasses import dataclass, field

# <scsi/sg.h> struct sg_io_hdr, input part: interface_id, dxfer_direction, cmd_len, mx_sb_len,
# iovec_count, dxfer_len, dxferp, cmdp, sbp, timeout, flags, pack_id, usr_ptr
SG_IN = "@iiBBHIPPPIIiP"
# output part: status, masked_status, msg_status, sb_len_wr, host_status, driver_status, resid,
# duration, info
SG_OUT = "@BBBBHHiII"
SG_OUT_OFFSET = struct.calcsize(SG_IN)
SG_IO = 0x2285  # <scsi/sg.h>

# <linux/nvme_ioctl.h> struct nvme_passthru_cmd: all fields naturally aligned, 72 bytes.
NVME_CMD = "=BBHIIIQQIIIIIIIIII"
NVME_RESULT_OFFSET = struct.calcsize(NVME_CMD) - 4
# _IOWR('N', 0x41, 72): (3 << 30) | (72 << 16) | ('N' << 8) | 0x41, asm-generic/ioctl.h
NVME_IOCTL_ADMIN_CMD = (3 << 30) | (72 << 16) | (ord("N") << 8) | 0x41

CHECK_CONDITION = 0x02
DRIVER_SENSE = 0x08


def descriptor_sense(sense_key: int, asc: int, ascq: int, ata_error: int = 0, ata_status: int = 0x50) -> bytes:
    """Descriptor format sense (SPC-4 §4.5.2, response code 72h) with an ATA Status Return
    descriptor (SAT-4, type 09h, additional length 0Ch): ERROR at byte 3, STATUS at byte 13."""
    ata = bytearray(14)
    ata[0], ata[1] = 0x09, 0x0C
    ata[3] = ata_error
    ata[12] = 0x40  # DEVICE
    ata[13] = ata_status
    return bytes([0x72, sense_key, asc, ascq, 0, 0, 0, len(ata)]) + bytes(ata)


def fixed_sense(sense_key: int, asc: int, ascq: int, ata_error: int = 0, ata_status: int = 0) -> bytes:
    """Fixed format sense (SPC-4 §4.5.3, response code 70h, 18 bytes); ATA ERROR / STATUS in
    INFORMATION bytes 3 and 4 (SAT-5 table 212)."""
    sense = bytearray(18)
    sense[0] = 0xF0 if (ata_error or ata_status) else 0x70  # VALID: the INFORMATION field is set
    sense[2] = sense_key
    sense[3] = ata_error
    sense[4] = ata_status
    sense[7] = 10  # additional sense length: bytes 8-17
    sense[12], sense[13] = asc, ascq
    return bytes(sense)


# Ready-made answers for the failure cases (SPC-4 sense keys, SAT-4 ATA status return).
ABORTED_BY_DRIVE = descriptor_sense(0x0B, 0x00, 0x00, ata_error=0x04, ata_status=0x51)  # ERR + ABRT
INVALID_OPCODE = fixed_sense(0x05, 0x20, 0x00)  # ILLEGAL REQUEST, INVALID COMMAND OPERATION CODE
UNIT_ATTENTION_RESET = fixed_sense(0x06, 0x29, 0x00)  # POWER ON, RESET, OR BUS DEVICE RESET


@dataclass
class FakeDrive:
    """An invented drive: its payload sectors and, per command, what goes wrong instead."""

    bus: str  # "ata" | "nvme"
    payloads: dict[str, bytes]  # ata: identify, smart, thresholds; nvme: identify, health
    # command key -> bytes (sense to return), int (NVMe status to return), an OSError instance
    # (raised from ioctl), or a list of those consumed one per call, then normal answers.
    faults: dict[str, object] = field(default_factory=dict)


@dataclass
class Sent:
    path: str
    request: int
    command: bytes  # the CDB, or the 72-byte NVMe command as the kernel saw it


class FakeKernel:
    """open/ioctl/close for :class:`triage.capture.deviceio.DeviceIO`."""

    def __init__(self, drives: dict[str, FakeDrive]):
        self.drives = drives
        self.sent: list[Sent] = []
        self.open_flags: dict[str, int] = {}
        self.closed: list[str] = []
        self._fds: dict[int, str] = {}
        self._next_fd = 100

    # -- the three system calls ---------------------------------------------------------------
    def open(self, path: str, flags: int) -> int:
        if path not in self.drives:
            raise FileNotFoundError(errno.ENOENT, "No such file or directory", path)
        self.open_flags[path] = flags
        fd = self._next_fd
        self._next_fd += 1
        self._fds[fd] = path
        return fd

    def close(self, fd: int) -> None:
        self.closed.append(self._fds.pop(fd))

    def ioctl(self, fd: int, request: int, buffer, mutate: bool = True) -> int:
        path = self._fds[fd]
        drive = self.drives[path]
        raw = memoryview(buffer).cast("B")
        if request == SG_IO:
            return self._sg_io(path, drive, raw)
        if request == NVME_IOCTL_ADMIN_CMD:
            return self._nvme_admin(path, drive, raw)
        raise OSError(errno.ENOTTY, "Inappropriate ioctl for device")

    # -- SG_IO ----------------------------------------------------------------------------------
    def _sg_io(self, path: str, drive: FakeDrive, raw: memoryview) -> int:
        (interface_id, direction, cmd_len, mx_sb_len, _iovec, dxfer_len, dxferp, cmdp, sbp,
         _timeout, _flags, _pack_id, _usr) = struct.unpack_from(SG_IN, raw, 0)
        assert interface_id == ord("S") and direction == -3  # <scsi/sg.h> SG_DXFER_FROM_DEV
        cdb = ctypes.string_at(cmdp, cmd_len)
        self.sent.append(Sent(path, SG_IO, cdb))
        if drive.bus != "ata":
            raise OSError(errno.ENOTTY, "Inappropriate ioctl for device")
        key = self._ata_command(cdb)
        fault = self._fault(drive, key)
        if isinstance(fault, OSError):
            raise fault
        if isinstance(fault, bytes):
            sense = fault[:mx_sb_len]
            ctypes.memmove(sbp, sense, len(sense))
            struct.pack_into(SG_OUT, raw, SG_OUT_OFFSET, CHECK_CONDITION, CHECK_CONDITION >> 1, 0,
                             len(sense), 0, DRIVER_SENSE, dxfer_len, 1, 1)
            return 0
        data = drive.payloads.get(key) if key else None
        if data is None:  # a translation layer rejecting what it does not know (SPC-4)
            ctypes.memmove(sbp, INVALID_OPCODE, len(INVALID_OPCODE))
            struct.pack_into(SG_OUT, raw, SG_OUT_OFFSET, CHECK_CONDITION, 1, 0, len(INVALID_OPCODE),
                             0, DRIVER_SENSE, dxfer_len, 1, 1)
            return 0
        ctypes.memmove(dxferp, data, min(len(data), dxfer_len))
        struct.pack_into(SG_OUT, raw, SG_OUT_OFFSET, 0, 0, 0, 0, 0, 0, dxfer_len - len(data), 1, 0)
        return 0

    @staticmethod
    def _ata_command(cdb: bytes) -> str | None:
        """SAT-4 "ATA PASS-THROUGH (16) command": byte 14 COMMAND, byte 4 FEATURES (7:0),
        bytes 10 / 12 LBA mid / high (7:0); byte 1 PROTOCOL (bits 4:1) must be PIO data-in (4)."""
        if len(cdb) != 16 or cdb[0] != 0x85 or (cdb[1] >> 1) & 0x0F != 4 or cdb[6] != 1:
            return None
        if cdb[14] == 0xEC:
            return "identify"
        if cdb[14] == 0xB0 and cdb[10] == 0x4F and cdb[12] == 0xC2:
            return {0xD0: "smart", 0xD1: "thresholds"}.get(cdb[4])
        return None

    # -- NVMe admin -----------------------------------------------------------------------------
    def _nvme_admin(self, path: str, drive: FakeDrive, raw: memoryview) -> int:
        fields = struct.unpack_from(NVME_CMD, raw, 0)
        opcode, nsid, addr, data_len, cdw10 = fields[0], fields[3], fields[7], fields[9], fields[10]
        self.sent.append(Sent(path, NVME_IOCTL_ADMIN_CMD, bytes(raw)))
        if drive.bus != "nvme":
            raise OSError(errno.ENOTTY, "Inappropriate ioctl for device")
        key = None
        # NVMe Base 2.0: Identify (06h) with CNS (CDW10 7:0) = 01h; Get Log Page (02h) with
        # LID (CDW10 7:0) = 02h and NUMDL (CDW10 31:16) = dwords - 1.
        if opcode == 0x06 and cdw10 & 0xFF == 0x01 and data_len == 4096:
            key = "identify"
        elif opcode == 0x02 and cdw10 & 0xFF == 0x02 and (cdw10 >> 16) + 1 == data_len // 4 and nsid == 0xFFFFFFFF:
            key = "health"
        fault = self._fault(drive, key)
        if isinstance(fault, OSError):
            raise fault
        if isinstance(fault, int):
            return fault
        if key is None:
            return 0x4001  # DNR + Invalid Command Opcode (SCT 0, SC 01h)
        data = drive.payloads[key]
        ctypes.memmove(addr, data, data_len)
        struct.pack_into("=I", raw, NVME_RESULT_OFFSET, 0)
        return 0

    @staticmethod
    def _fault(drive: FakeDrive, key: str | None):
        fault = drive.faults.get(key) if key else None
        if isinstance(fault, list):
            return fault.pop(0) if fault else None
        return fault
