"""Small hand-made capture lines for the ingest tests (invented drives)."""

from __future__ import annotations

import gzip
import json

import pytest

from triage.formats.ata_identify import build_ata_identify
from triage.formats.ata_smart import SmartAttribute, build_smart_data
from triage.formats.ata_thresholds import build_smart_thresholds
from triage.formats.nvme_health import NvmeHealth, build_nvme_health
from triage.formats.nvme_identify import build_nvme_identify

ATTRS = [
    SmartAttribute(id=5, flags=0x33, value=100, worst=100, raw=8),
    SmartAttribute(id=9, flags=0x32, value=90, worst=90, raw=(7 << 32) | 20_000),
    SmartAttribute(id=194, flags=0x22, value=64, worst=50, raw=(45 << 16) | 36),
    SmartAttribute(id=197, flags=0x32, value=100, worst=100, raw=3),
    SmartAttribute(id=199, flags=0x3E, value=200, worst=200, raw=12),
]
THRESHOLDS = {5: 10, 9: 0, 194: 0, 197: 0, 199: 0}


def ata_line(serial="QHA0000001", taken_at="2026-11-01T02:10:00Z", **overrides):
    obj = {
        "capture": 1, "host": "ash-st01", "device": "/dev/sda", "slot": "bay01", "group": "ash-st01-g1",
        "taken_at": taken_at, "bus": "ata",
        "identify": build_ata_identify(serial=serial, firmware="QF01", model="QH-HD8T-A",
                                       sectors=15_628_053_168, rotation_rpm=7200).hex(),
        "smart": build_smart_data(ATTRS).hex(),
        "thresholds": build_smart_thresholds(THRESHOLDS).hex(),
    }
    obj.update(overrides)
    return json.dumps({k: v for k, v in obj.items() if v is not ...})


HEALTH = NvmeHealth(critical_warning=0b100, composite_temperature_k=311, available_spare_pct=97,
                    spare_threshold_pct=10, percentage_used=12, data_units_read=1_000,
                    data_units_written=2_000_000, host_read_commands=10, host_write_commands=20,
                    controller_busy_minutes=30, power_cycles=14, power_on_hours=9_000,
                    unsafe_shutdowns=2, media_errors=1, error_log_entries=5,
                    warning_temp_minutes=0, critical_temp_minutes=0)


def nvme_line(serial="CNV0000001", taken_at="2026-11-01T03:10:00+01:00"):
    return json.dumps({
        "capture": 1, "host": "birch-st02", "device": "/dev/nvme0", "slot": None, "group": None,
        "taken_at": taken_at, "bus": "nvme",
        "identify": build_nvme_identify(serial=serial, model="Corvid NV1920", firmware="CV2.1",
                                        total_capacity_bytes=1_920_383_410_176).hex(),
        "health": build_nvme_health(HEALTH).hex(),
    })



@pytest.fixture
def write_capture(tmp_path):
    def write(name, lines, compress=True):
        path = tmp_path / name
        data = ("\n".join(lines) + "\n").encode()
        path.write_bytes(gzip.compress(data) if compress else data)
        return path
    return write
