"""The invented things the demo fleet is made of: Quillmere Hosting's sites and drive models.

Everything here is fiction: the operator, the sites, the model names, serial formats, firmware
names and hazards. No name belongs to a real vendor or product.
"""

from __future__ import annotations

from dataclasses import dataclass

HOURS_PER_YEAR = 8766.0  # 365.25 days

#: SMART attribute ids reported, by drive family. Ids follow SFF-8035i numbering as commonly used
#: across vendors (meanings are common practice, not fixed by the ATA standard).
HDD_ATTRIBUTES = (1, 3, 4, 5, 7, 9, 10, 12, 187, 188, 194, 196, 197, 198, 199)
OLD_HDD_ATTRIBUTES = (1, 3, 4, 5, 7, 9, 10, 12, 194, 196, 197, 198, 199)  # no 187 / 188
SSD_ATTRIBUTES = (5, 9, 12, 177, 187, 194, 199, 241)


def idema_sectors(gigabytes: int, logical_sector_size: int = 512) -> int:
    """Logical sector count of a drive of ``gigabytes`` decimal GB.

    IDEMA LBA1-03 capacity formula (from memory): 512-byte sectors
    ``97,696,368 + 1,953,504 x (GB - 50)``; 4096-byte sectors ``12,212,046 + 244,188 x (GB - 50)``.
    """
    if logical_sector_size == 512:
        return 97_696_368 + 1_953_504 * (gigabytes - 50)
    if logical_sector_size == 4096:
        return 12_212_046 + 244_188 * (gigabytes - 50)
    raise ValueError(f"no IDEMA formula for {logical_sector_size}-byte sectors")


@dataclass(frozen=True)
class Site:
    """A data centre of the invented operator."""

    name: str
    ambient_c: float  # cold-aisle temperature; drives run this much plus their own heat
    utc_offset_minutes: int  # the offset the site's collectors write in ``taken_at``
    weight: float  # share of hosts
    subsecond: bool = False  # its collector writes milliseconds in ``taken_at``


@dataclass(frozen=True)
class DriveModel:
    """An invented drive model with its invented failure behaviour.

    The hazard is Weibull in power-on hours (``shape`` k, ``scale`` eta):
    ``h(a) = (k / eta) * (a / eta) ** (k - 1)``; a firmware hazard ratio ``r`` multiplies it,
    which for a Weibull is the same as a scale of ``eta * r ** (-1 / k)`` (proportional hazards).
    """

    name: str
    bus: str  # "ata" | "nvme"
    kind: str  # "hdd" | "ssd" | "nvme"
    gigabytes: int
    logical_sector_size: int
    rotation_rpm: int  # 0 = solid state
    firmwares: tuple[str, ...]
    firmware_weights: tuple[float, ...]  # share among the drives already installed
    firmware_hazard_ratios: tuple[float, ...]
    weibull_shape: float
    weibull_scale_hours: float
    entry_age_years: tuple[float, float]  # power-on age range of drives already installed
    new_fraction: float  # share of the first population that arrives new
    host_weight: float  # share of hosts populated with this model
    serial_prefix: str
    serial_style: str  # "digits" | "base36" | "hex"
    serial_length: int  # characters after the prefix
    has_wwn: bool
    temp_offset_c: float  # self-heating above the site's ambient
    spare_pool: int = 0  # ATA: sectors/blocks behind attribute 5's normalized value
    rated_dwpd: float = 0.0  # solid state: endurance, drive writes per day over 5 years
    write_dwpd: tuple[float, float] = (0.0, 0.0)  # solid state: per-drive write load range
    smart_attributes: tuple[int, ...] = ()  # ATA: SMART attribute ids it reports, in table order
    slots_per_host: tuple[int, ...] = (12, 24, 36)
    slot_weights: tuple[float, ...] = (0.3, 0.4, 0.3)

    @property
    def sectors(self) -> int:
        return idema_sectors(self.gigabytes, self.logical_sector_size)

    @property
    def user_capacity_bytes(self) -> int:
        return self.sectors * self.logical_sector_size

    @property
    def endurance_bytes(self) -> float:
        return self.user_capacity_bytes * self.rated_dwpd * 365.0 * 5.0


def _scale_for_afr(afr: float) -> float:
    """Exponential (shape 1) scale giving an annualised failure rate ``afr``: eta = 8766 h / AFR."""
    return HOURS_PER_YEAR / afr


SITES: tuple[Site, ...] = (
    Site("ash", ambient_c=22.0, utc_offset_minutes=0, weight=0.40),
    Site("birch", ambient_c=26.0, utc_offset_minutes=60, weight=0.35, subsecond=True),
    Site("cedar", ambient_c=18.0, utc_offset_minutes=-300, weight=0.25),
)

#: The shapes cover infant mortality (k < 1), random failures (k = 1) and wear-out (k > 1). The
#: fleet is troubled on purpose so that a 1,200-drive, 120-night window holds tens of failures:
#: rates at the ages present run from about 1 %/yr (NVMe) to about 4 %/yr (healthy 8 TB disks),
#: with three troubled cohorts well above that (the QA03 firmware near 14 %/yr, young 14 TB disks,
#: the oldest 4 TB disks) so that ``triage cohorts`` and ``triage compare`` can tell their stories
#: apart from chance in a 120-night window.
MODELS: tuple[DriveModel, ...] = (
    DriveModel(
        "QH-HD8T-A", "ata", "hdd", 8000, 512, 7200,
        firmwares=("QA02", "QA03", "QA05"), firmware_weights=(0.35, 0.35, 0.30),
        # QA03 is the bad firmware of the story: 6 times the hazard of its siblings, enough for
        # 'triage compare' to tell it from QA02 in the demo window (benchmarks/demo_story.py)
        firmware_hazard_ratios=(1.0, 6.0, 1.0),
        weibull_shape=1.0, weibull_scale_hours=_scale_for_afr(0.04),
        entry_age_years=(0.5, 4.0), new_fraction=0.05, host_weight=0.30,
        serial_prefix="QHA", serial_style="digits", serial_length=8, has_wwn=True,
        temp_offset_c=15.0, spare_pool=2048, smart_attributes=HDD_ATTRIBUTES,
    ),
    DriveModel(
        "Tallow 14T", "ata", "hdd", 14000, 4096, 7200,
        firmwares=("TL104", "TL107"), firmware_weights=(0.6, 0.4),
        firmware_hazard_ratios=(1.0, 1.0),
        # a bad batch with strong infant mortality: cumulative hazard (8766 / eta) ** 0.45 = 0.25
        # over the first year, most drives young, so the demo window's failures show a shape
        # range below 1 (early-life; benchmarks/demo_story.py)
        weibull_shape=0.45, weibull_scale_hours=190_900.0,
        entry_age_years=(0.05, 1.5), new_fraction=0.6, host_weight=0.25,
        serial_prefix="TLW", serial_style="base36", serial_length=7, has_wwn=True,
        temp_offset_c=16.0, spare_pool=4096, smart_attributes=HDD_ATTRIBUTES,
    ),
    DriveModel(
        "Marrow 4T", "ata", "hdd", 4000, 512, 5400,
        firmwares=("MW0S1", "MW0S4"), firmware_weights=(0.5, 0.5),
        firmware_hazard_ratios=(1.0, 1.0),
        # steep wear-out: a hazard of about 5 %/yr at three years, 12 %/yr at four, 40 %/yr at six
        # and a half; bought at 2.5 to 8 years, so the window sees a band of ages wide enough
        # for the shape range to clear 1 (benchmarks/demo_story.py)
        weibull_shape=3.5, weibull_scale_hours=62_000.0,
        entry_age_years=(2.5, 8.0), new_fraction=0.0, host_weight=0.15,
        serial_prefix="MR4-", serial_style="digits", serial_length=8, has_wwn=False,
        temp_offset_c=11.0, spare_pool=1024, smart_attributes=OLD_HDD_ATTRIBUTES,
    ),
    DriveModel(
        "Corvid NV1920", "nvme", "nvme", 1920, 512, 0,
        firmwares=("CV1.2.0", "CV1.3.1"), firmware_weights=(0.4, 0.6),
        firmware_hazard_ratios=(1.0, 1.0),
        weibull_shape=1.0, weibull_scale_hours=_scale_for_afr(0.01),
        entry_age_years=(0.2, 3.0), new_fraction=0.10, host_weight=0.14,
        serial_prefix="CVD", serial_style="digits", serial_length=9, has_wwn=False,
        temp_offset_c=20.0, rated_dwpd=1.0, write_dwpd=(0.05, 0.8),
        slots_per_host=(12, 24), slot_weights=(0.5, 0.5),
    ),
    DriveModel(
        "Corvid NV3840", "nvme", "nvme", 3840, 512, 0,
        firmwares=("CV2.0.4", "CV2.1.0"), firmware_weights=(0.5, 0.5),
        firmware_hazard_ratios=(1.0, 1.0),
        # mild wear-out: about 2 %/yr at two years
        weibull_shape=1.6, weibull_scale_hours=175_800.0,
        entry_age_years=(0.5, 3.0), new_fraction=0.10, host_weight=0.10,
        serial_prefix="CVE", serial_style="digits", serial_length=9, has_wwn=False,
        temp_offset_c=21.0, rated_dwpd=3.0, write_dwpd=(0.2, 2.0),
        slots_per_host=(12, 24), slot_weights=(0.5, 0.5),
    ),
    DriveModel(
        "Wren S960", "ata", "ssd", 960, 512, 0,
        firmwares=("WS31", "WS33"), firmware_weights=(0.5, 0.5),
        firmware_hazard_ratios=(1.0, 1.0),
        weibull_shape=1.0, weibull_scale_hours=_scale_for_afr(0.012),
        entry_age_years=(0.3, 3.0), new_fraction=0.10, host_weight=0.06,
        serial_prefix="WRN", serial_style="hex", serial_length=8, has_wwn=True,
        temp_offset_c=8.0, spare_pool=512, rated_dwpd=1.0, write_dwpd=(0.05, 0.5),
        smart_attributes=SSD_ATTRIBUTES,
        slots_per_host=(12,), slot_weights=(1.0,),
    ),
)

#: IEEE company id used in every invented WWN (NAA 5): 02A7E5 has the locally administered bit
#: set and lies in the "administratively assigned" quadrant of IEEE 802c, which is assigned to no
#: company (from memory). Invented for the demo.
WWN_COMPANY_ID = 0x02A7E5

#: Operator notes for the removal log, by reason (invented wording; some need CSV quoting).
REMOVAL_NOTES = {
    "failed": (
        "no response after bus reset",
        "dropped from the group, would not spin up",
        "I/O errors, rebuild started",
        'controller marked it "faulted"',
        "dead at morning check, swapped",
        "",
    ),
    "proactive": (
        "pending sectors rising, pulled before the rebuild window",
        "pulled on warning: errors climbing",
        "spare running low, pulled early",
    ),
    "retired": (
        "migrated to the archive tier",
        "host refresh, drive healthy",
    ),
}
