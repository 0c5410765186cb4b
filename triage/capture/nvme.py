"""NVMe admin commands through the Linux admin pass-through ioctl (<linux/nvme_ioctl.h>).

The kernel takes ``struct nvme_passthru_cmd`` (``nvme_admin_cmd`` is the same struct), builds the
64-byte submission queue entry from it (NVMe Base Specification 2.0, "Common Command Format":
CDW0 opcode, NSID, data pointer, CDW10-CDW15), runs it on the controller's admin queue, and
returns the completion's Status Field as the ioctl's return value (0 = success), with Dword 0 of
the completion in ``result``.
"""

from __future__ import annotations

import ctypes
from dataclasses import dataclass

from triage.capture.sense import Outcome


def _ioc(direction: int, kind: str, number: int, size: int) -> int:
    """Linux ``_IOC`` (asm-generic/ioctl.h): dir in bits 31:30, size 29:16, type 15:8, nr 7:0."""
    return (direction << 30) | (size << 16) | (ord(kind) << 8) | number


_IOC_WRITE = 1
_IOC_READ = 2


class NvmePassthruCmd(ctypes.Structure):
    """``struct nvme_passthru_cmd`` exactly as in <linux/nvme_ioctl.h> (72 bytes, no padding)."""

    _fields_ = [
        ("opcode", ctypes.c_uint8),
        ("flags", ctypes.c_uint8),
        ("rsvd1", ctypes.c_uint16),
        ("nsid", ctypes.c_uint32),
        ("cdw2", ctypes.c_uint32),
        ("cdw3", ctypes.c_uint32),
        ("metadata", ctypes.c_uint64),
        ("addr", ctypes.c_uint64),
        ("metadata_len", ctypes.c_uint32),
        ("data_len", ctypes.c_uint32),
        ("cdw10", ctypes.c_uint32),
        ("cdw11", ctypes.c_uint32),
        ("cdw12", ctypes.c_uint32),
        ("cdw13", ctypes.c_uint32),
        ("cdw14", ctypes.c_uint32),
        ("cdw15", ctypes.c_uint32),
        ("timeout_ms", ctypes.c_uint32),
        ("result", ctypes.c_uint32),
    ]


#: ``NVME_IOCTL_ADMIN_CMD = _IOWR('N', 0x41, struct nvme_admin_cmd)`` = C0484E41h.
NVME_IOCTL_ADMIN_CMD = _ioc(_IOC_READ | _IOC_WRITE, "N", 0x41, ctypes.sizeof(NvmePassthruCmd))

# NVMe Base Specification 2.0, figure "Opcodes for Admin Commands".
ADMIN_GET_LOG_PAGE = 0x02
ADMIN_IDENTIFY = 0x06

# Identify, figure "Identify - Command Dword 10": CNS in bits 7:0, CNTID in 31:16.
CNS_IDENTIFY_CONTROLLER = 0x01
IDENTIFY_BYTES = 4096

# Get Log Page, figure "Get Log Page - Command Dword 10": LID bits 7:0, LSP bits 14:8,
# RAE bit 15, NUMDL bits 31:16 (number of dwords, 0's based; upper half NUMDU in CDW11 15:0).
LID_SMART_HEALTH = 0x02
HEALTH_LOG_BYTES = 512
RETAIN_ASYNCHRONOUS_EVENT = 1 << 15
NSID_ALL = 0xFFFFFFFF  # "all namespaces": the controller-wide SMART / Health log (§5.16.1.3)


def identify_controller_command() -> bytes:
    """Identify, CNS 01h: the 4096-byte Identify Controller data structure (NSID 0)."""
    cmd = NvmePassthruCmd()
    cmd.opcode = ADMIN_IDENTIFY
    cmd.nsid = 0
    cmd.data_len = IDENTIFY_BYTES
    cmd.cdw10 = CNS_IDENTIFY_CONTROLLER  # CNTID = 0
    return bytes(cmd)


def smart_health_log_command() -> bytes:
    """Get Log Page, LID 02h (SMART / Health Information), 512 bytes, all namespaces.

    RAE is set: reading log 02h with RAE cleared also clears a pending SMART / health
    asynchronous event on the controller (NVMe Base 2.0, Get Log Page, "Retain Asynchronous
    Event"), which belongs to the operating system's event handling, not to a read-only capture.
    Controllers before NVMe 1.3 treat the bit as reserved.
    """
    number_of_dwords = HEALTH_LOG_BYTES // 4
    numd = number_of_dwords - 1  # 0's based
    cmd = NvmePassthruCmd()
    cmd.opcode = ADMIN_GET_LOG_PAGE
    cmd.nsid = NSID_ALL
    cmd.data_len = HEALTH_LOG_BYTES
    cmd.cdw10 = LID_SMART_HEALTH | RETAIN_ASYNCHRONOUS_EVENT | ((numd & 0xFFFF) << 16)
    cmd.cdw11 = numd >> 16  # NUMDU
    return bytes(cmd)


# NVMe Base 2.0, "Status Code Type (SCT) Values" and "Generic Command Status Values" /
# "Get Log Page - Command Specific Status Values".
SCT_GENERIC = 0x0
SCT_COMMAND_SPECIFIC = 0x1
SCT_MEDIA = 0x2
STATUS_NAMES = {
    (SCT_GENERIC, 0x01): "Invalid Command Opcode",
    (SCT_GENERIC, 0x02): "Invalid Field in Command",
    (SCT_GENERIC, 0x04): "Data Transfer Error",
    (SCT_GENERIC, 0x05): "Commands Aborted due to Power Loss Notification",
    (SCT_GENERIC, 0x06): "Internal Error",
    (SCT_GENERIC, 0x07): "Command Abort Requested",
    (SCT_GENERIC, 0x08): "Command Aborted due to SQ Deletion",
    (SCT_GENERIC, 0x0B): "Invalid Namespace or Format",
    (SCT_COMMAND_SPECIFIC, 0x09): "Invalid Log Page",
}
_NOT_SUPPORTED = {(SCT_GENERIC, 0x01), (SCT_GENERIC, 0x02), (SCT_GENERIC, 0x0B), (SCT_COMMAND_SPECIFIC, 0x09)}
_ABORTED = {(SCT_GENERIC, 0x05), (SCT_GENERIC, 0x07), (SCT_GENERIC, 0x08)}


@dataclass(frozen=True)
class NvmeStatus:
    """The completion Status Field as Linux returns it (the phase tag already shifted out):
    SC bits 7:0, SCT bits 10:8, CRD 12:11, M bit 13, DNR bit 14 (NVMe Base 2.0, "Status Field")."""

    value: int

    @property
    def code(self) -> int:
        return self.value & 0xFF

    @property
    def code_type(self) -> int:
        return (self.value >> 8) & 0x7

    @property
    def do_not_retry(self) -> bool:
        return bool(self.value & (1 << 14))

    def outcome(self) -> Outcome:
        key = (self.code_type, self.code)
        if self.value == 0:
            return Outcome.OK
        if key in _NOT_SUPPORTED:
            return Outcome.NOT_SUPPORTED
        if key in _ABORTED:
            return Outcome.ABORTED
        if self.code_type == SCT_MEDIA:
            return Outcome.MEDIUM_ERROR
        return Outcome.OTHER

    def describe(self) -> str:
        name = STATUS_NAMES.get((self.code_type, self.code), "status")
        return f"NVMe {name} (SCT {self.code_type:x}h, SC {self.code:02x}h)"


@dataclass
class NvmeRequest:
    """An admin command with the data buffer its ``addr`` points into (kept alive here)."""

    command: NvmePassthruCmd
    data: ctypes.Array


def build_admin_request(template: bytes, length: int) -> NvmeRequest:
    """Copy a 72-byte command image and point it at a fresh ``length``-byte buffer."""
    if len(template) != ctypes.sizeof(NvmePassthruCmd):
        raise ValueError(f"an NVMe admin command image is 72 bytes, not {len(template)}")
    command = NvmePassthruCmd.from_buffer_copy(template)
    if command.data_len != length:
        raise ValueError(f"command asks for {command.data_len} bytes, buffer is {length}")
    data = ctypes.create_string_buffer(length)
    command.addr = ctypes.addressof(data)
    return NvmeRequest(command, data)
