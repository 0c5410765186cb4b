"""Capture on the host: read the standard health payloads from live drives into a capture file.

Read-only by construction: only the five commands in :mod:`triage.capture.commands` can reach a
drive (ATA IDENTIFY DEVICE, SMART READ DATA, SMART READ THRESHOLDS through SAT ATA PASS-THROUGH
(16); NVMe Identify Controller and Get Log Page 02h through the admin pass-through ioctl).
Operator guide: docs/capture.md. Output: the capture file contract in docs/capture-format.md.
"""

from triage.capture.commands import ALLOWED, CommandRefused, DeviceError, Failure
from triage.capture.deviceio import DeviceIO
from triage.capture.devices import Skipped, Target, enumerate_targets, targets_for
from triage.capture.groupmap import GroupMap, GroupMapError, Placement, load_group_map, parse_group_map
from triage.capture.run import (
    CaptureResult,
    DeviceFailure,
    NeedsRoot,
    OutputError,
    capture_file_name,
    capture_host,
    require_root,
    write_capture_file,
)

__all__ = [
    "ALLOWED",
    "CaptureResult",
    "CommandRefused",
    "DeviceError",
    "DeviceFailure",
    "DeviceIO",
    "Failure",
    "GroupMap",
    "GroupMapError",
    "NeedsRoot",
    "OutputError",
    "Placement",
    "Skipped",
    "Target",
    "capture_file_name",
    "capture_host",
    "enumerate_targets",
    "load_group_map",
    "parse_group_map",
    "require_root",
    "targets_for",
    "write_capture_file",
]
