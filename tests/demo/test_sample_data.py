"""The committed sample under sample_data/ is the generator's output and ingests cleanly."""

from __future__ import annotations

from pathlib import Path

from triage.demo import write_sample
from triage.ingest import ingest_paths
from triage.store.dataset import Store

SAMPLE = Path(__file__).resolve().parents[2] / "sample_data"


def _data_files(folder: Path) -> dict[str, bytes]:
    return {p.name: p.read_bytes() for p in sorted(folder.iterdir()) if p.suffix in (".gz", ".csv")}


def test_committed_sample_is_byte_identical_to_write_sample(tmp_path):
    write_sample(tmp_path)
    assert _data_files(SAMPLE) == _data_files(tmp_path)


def test_sample_ingests_without_a_rejected_line(tmp_path):
    report = ingest_paths(Store(tmp_path / "store"), [SAMPLE])
    assert report.rejected == []
    assert report.stored["snapshots"] > 0 and report.stored["removals"] > 0
