"""Capture -> ingest reproduces the demo generator's ground truth exactly.

The fake kernel answers every drive of a small demo fleet with the sectors the demo generator
(``triage.demo``) wrote for its first night; ``triage capture`` runs once per host; the files it
writes go through the real ``triage ingest``; the stored snapshots must equal
``ground_truth(fleet).snapshots`` column for column. The ground truth is computed by the generator
from its own simulation state, not by decoding bytes, so it checks the whole path:
allow-listed commands -> SG_IO / NVMe structures -> capture file -> ingest decoders.
"""

from __future__ import annotations

import gzip
import json
from collections import defaultdict

import pandas as pd
import pytest

from tests.capture.fakekernel import FakeDrive, FakeKernel
from triage.capture.deviceio import DeviceIO
from triage.capture.devices import Target
from triage.capture.groupmap import parse_group_map
from triage.capture.run import capture_host

demo = pytest.importorskip("triage.demo", reason="the demo generator (triage.demo) is not installed")
ingest = pytest.importorskip("triage.ingest", reason="the ingest layer (triage.ingest) is not installed")
from triage.store.dataset import Store  # noqa: E402

# A fleet small enough for a second of work that still has SATA hosts, an NVMe host and a host
# whose drives lack SMART READ THRESHOLDS (FleetSpec.hosts_without_thresholds).
SPEC = demo.FleetSpec(seed=2, n_drives=40, days=1)


@pytest.fixture(scope="module")
def night(tmp_path_factory):
    fleet = demo.generate_fleet(SPEC)
    truth = demo.ground_truth(fleet).snapshots
    files = demo.write_captures(fleet, tmp_path_factory.mktemp("demo"))
    lines = []
    for path in files:
        if path.name.endswith(".jsonl.gz"):
            with gzip.open(path, "rt") as fh:
                lines += [json.loads(text) for text in fh]
    return truth, lines


def group_map_text(truth: pd.DataFrame) -> str:
    """Slots and groups from the ground truth; every other ATA drive keyed by its WWN."""
    rows = []
    for index, row in enumerate(truth.itertuples(index=False)):
        key = f"wwn:{row.wwn}" if row.wwn and index % 2 else row.serial
        rows.append(f"{key},{row.slot or ''},{row.group or ''}")
    return "key,slot,group\n" + "\n".join(rows) + "\n"


def capture_every_host(night, out_dir):
    truth, lines = night
    by_host = defaultdict(list)
    for line in lines:
        by_host[line["host"]].append(line)
    taken_at = {(r.host, r.device): r.taken_at.to_pydatetime() for r in truth.itertuples(index=False)}
    group_map = parse_group_map(group_map_text(truth))
    results = []
    for host, host_lines in sorted(by_host.items()):
        drives = {
            line["device"]: FakeDrive(line["bus"], {k: bytes.fromhex(line[k]) for k in
                                                     ("identify", "smart", "thresholds", "health") if k in line})
            for line in host_lines
        }
        kernel = FakeKernel(drives)
        opened = []
        io = DeviceIO(opener=lambda path, flags: (opened.append(path), kernel.open(path, flags))[1],
                      ioctl=kernel.ioctl, closer=kernel.close)
        first = (host, host_lines[0]["device"])
        # the clock reads the generator's capture time of the drive being read
        clock = lambda host=host, opened=opened, first=first: taken_at[(host, opened[-1]) if opened else first]
        targets = [Target(line["device"], line["bus"]) for line in host_lines]
        results.append(capture_host(targets, out_dir, group_map, io=io, hostname=host, now=clock,
                                    geteuid=lambda: 0))
    return results


def test_the_demo_night_covers_both_buses_and_a_drive_without_thresholds(night):
    _, lines = night
    assert {line["bus"] for line in lines} == {"ata", "nvme"}
    assert any(line["bus"] == "ata" and "thresholds" not in line for line in lines)


def test_capture_then_ingest_stores_exactly_the_generator_ground_truth(night, tmp_path):
    truth, _ = night
    out = tmp_path / "captures"
    out.mkdir()
    results = capture_every_host(night, out)
    assert all(r.failures == [] for r in results)

    store = Store(tmp_path / "store")
    report = ingest.ingest_paths(store, [out])
    assert report.rejected == []

    stored = store.read("snapshots").drop(columns=["source_file"])
    expected = truth[list(stored.columns)]
    # the store hands back nullable booleans as object (None); compare in the truth's dtypes
    stored = stored.astype(expected.dtypes.to_dict())
    key = ["serial", "taken_at"]
    stored = stored.sort_values(key).reset_index(drop=True)
    expected = expected.sort_values(key).reset_index(drop=True)
    pd.testing.assert_frame_equal(stored, expected)


def test_capture_lines_carry_the_same_payload_bytes_the_generator_wrote(night, tmp_path):
    _, lines = night
    results = capture_every_host(night, tmp_path)
    captured = {}
    for result in results:
        with gzip.open(result.path, "rt") as fh:
            for text in fh:
                line = json.loads(text)
                captured[(line["host"], line["device"])] = line
    for line in lines:
        ours = captured[(line["host"], line["device"])]
        for payload in ("identify", "smart", "thresholds", "health"):
            assert ours.get(payload) == line.get(payload), (line["device"], payload)
