"""Same spec, same bytes; another seed, another fleet."""

from __future__ import annotations

from dataclasses import replace

import pandas as pd

from triage.demo import generate_fleet, ground_truth, write_captures
from tests.demo.conftest import SMALL

TINY = replace(SMALL, n_drives=40, days=6)


def _contents(paths):
    return {p.name: p.read_bytes() for p in paths}


def test_same_seed_writes_byte_identical_files(tmp_path):
    first = _contents(write_captures(generate_fleet(TINY), tmp_path / "a"))
    second = _contents(write_captures(generate_fleet(TINY), tmp_path / "b"))
    assert first.keys() == second.keys()
    assert first == second


def test_same_seed_gives_the_same_ground_truth():
    a, b = ground_truth(generate_fleet(TINY)), ground_truth(generate_fleet(TINY))
    pd.testing.assert_frame_equal(a.snapshots, b.snapshots)
    pd.testing.assert_frame_equal(a.drives, b.drives)


def test_another_seed_writes_different_files(tmp_path):
    first = _contents(write_captures(generate_fleet(TINY), tmp_path / "a"))
    other = _contents(write_captures(generate_fleet(replace(TINY, seed=TINY.seed + 1)), tmp_path / "b"))
    assert first != other
    assert set(first) & set(other), "same dates, so mostly the same file names"
