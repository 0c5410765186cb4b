"""An invented host for the capture tests: three SATA drives and two NVMe drives with known values.

Sectors are made by the ``triage.formats`` builders from the ground truth kept beside them, so a
test can say "what the capture wrote ingests back to exactly these numbers".
Operator, host names, models and serials are all invented (Quillmere Hosting, site "ash").
"""

from __future__ import annotations

from dataclasses import dataclass

from tests.capture.fakekernel import FakeDrive
from triage.formats import (
    NvmeHealth,
    SmartAttribute,
    build_ata_identify,
    build_nvme_health,
    build_nvme_identify,
    build_smart_data,
    build_smart_thresholds,
)

HOST = "ash-st07"


@dataclass(frozen=True)
class AtaTruth:
    device: str
    serial: str
    model: str
    firmware: str
    sectors: int
    rotation_rpm: int
    wwn: str | None
    power_on_hours: int
    temperature_c: int
    reallocated_sectors: int
    pending_sectors: int
    crc_errors: int

    def drive(self, **faults) -> FakeDrive:
        attributes = [
            SmartAttribute(id=5, flags=0x33, value=100, worst=100, raw=self.reallocated_sectors),
            SmartAttribute(id=9, flags=0x32, value=80, worst=80, raw=self.power_on_hours),
            SmartAttribute(id=194, flags=0x22, value=60, worst=45, raw=self.temperature_c),
            SmartAttribute(id=197, flags=0x32, value=100, worst=100, raw=self.pending_sectors),
            SmartAttribute(id=199, flags=0x3E, value=200, worst=200, raw=self.crc_errors),
        ]
        return FakeDrive(
            "ata",
            {
                "identify": build_ata_identify(
                    serial=self.serial, firmware=self.firmware, model=self.model,
                    sectors=self.sectors, rotation_rpm=self.rotation_rpm, wwn=self.wwn,
                ),
                "smart": build_smart_data(attributes),
                "thresholds": build_smart_thresholds({5: 10, 9: 0, 194: 0, 197: 0, 199: 0}),
            },
            dict(faults),
        )


@dataclass(frozen=True)
class NvmeTruth:
    device: str
    serial: str
    model: str
    firmware: str
    user_capacity_bytes: int
    power_on_hours: int
    temperature_k: int
    percentage_used: int
    media_errors: int

    def drive(self, **faults) -> FakeDrive:
        health = NvmeHealth(
            critical_warning=0, composite_temperature_k=self.temperature_k, available_spare_pct=100,
            spare_threshold_pct=10, percentage_used=self.percentage_used, data_units_read=5_000,
            data_units_written=7_000, host_read_commands=100, host_write_commands=200,
            controller_busy_minutes=3, power_cycles=21, power_on_hours=self.power_on_hours,
            unsafe_shutdowns=1, media_errors=self.media_errors, error_log_entries=0,
            warning_temp_minutes=0, critical_temp_minutes=0,
        )
        return FakeDrive(
            "nvme",
            {
                "identify": build_nvme_identify(
                    serial=self.serial, model=self.model, firmware=self.firmware,
                    total_capacity_bytes=self.user_capacity_bytes,
                ),
                "health": build_nvme_health(health),
            },
            dict(faults),
        )


ATA = [
    AtaTruth("/dev/sda", "QHA7K2M001", "QH-HD8T-A", "QF03", 15_628_053_168, 7200, "5000c50012ab34cd",
             31_250, 34, 0, 0, 0),
    AtaTruth("/dev/sdb", "QHA7K2M002", "QH-HD8T-A", "QF03", 15_628_053_168, 7200, None,
             31_190, 36, 24, 3, 1),
    AtaTruth("/dev/sdc", "TLW14X0093", "Tallow 14T", "TW1.2", 27_344_764_928, 7200, "5000cca0aa11bb22",
             8_400, 31, 0, 0, 7),
]
NVME = [
    NvmeTruth("/dev/nvme0", "CNV1920A0042", "Corvid NV1920", "CV2.1", 1_920_383_410_176, 12_000, 309, 4, 0),
    NvmeTruth("/dev/nvme1", "CNV1920A0043", "Corvid NV1920", "CV2.1", 1_920_383_410_176, 11_950, 311, 5, 2),
]


def drives(faults: dict[str, dict[str, object]] | None = None) -> dict[str, FakeDrive]:
    """The whole host; ``faults={"/dev/sdb": {"smart": ...}}`` plants failures."""
    faults = faults or {}
    return {t.device: t.drive(**faults.get(t.device, {})) for t in [*ATA, *NVME]}
