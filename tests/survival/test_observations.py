"""The observation table: ages, events, data-quality exclusions and covariate episodes."""

from __future__ import annotations

import pandas as pd
import pytest

from tests.survival.fleetsim import simulate_fleet
from triage.survival.observations import check_by, format_capacity, observations, scan_frame, scan_store

T0 = pd.Timestamp("2026-03-01T02:00:00Z")


def nightly(serial, first_hours, nights, model="QH-HD8T-A", step=24, **columns):
    """One drive's nightly snapshots; ``columns`` are constants or per-night lists."""
    frame = pd.DataFrame({
        "serial": serial,
        "model": model,
        "firmware": "QF12",
        "bus": "ata",
        "user_capacity_bytes": 8_000_000_000_000,
        "taken_at": [T0 + pd.Timedelta(days=i) for i in range(nights)],
        "power_on_hours": [first_hours + step * i for i in range(nights)],
        "temperature_c": 38.0,
        "pending_sectors": 0.0,
        "reallocated_sectors": 0.0,
    })
    for name, value in columns.items():
        frame[name] = value
    return frame


def removal(serial, when, reason):
    return pd.DataFrame({"serial": [serial], "removed_at": [pd.Timestamp(when)], "reason": [reason]})


def build(snapshots, removals=None, **kwargs):
    removals = removals if removals is not None else removal("none", T0, "retired").iloc[:0]
    return observations(scan_frame(snapshots, removals=removals), removals, **kwargs)


def test_a_drive_enters_at_its_first_power_on_hours_and_leaves_at_its_last():
    obs = build(nightly("QHA1", 20_000, nights=10))
    drive = obs.drives.iloc[0]
    assert drive["entry_hours"] == 20_000 and drive["exit_hours"] == 20_000 + 9 * 24
    assert drive["drive_days"] == pytest.approx(9.0)
    assert not drive["event"]


def test_a_failed_drive_exits_at_its_removal_time_counted_in_power_on_hours():
    snaps = nightly("QHA1", 5_000, nights=5)
    obs = build(snaps, removal("QHA1", "2026-03-05T14:00:00Z", "failed"))
    drive = obs.drives.iloc[0]
    # last snapshot 2026-03-05 02:00 at 5,096 h, removal 12 h later
    assert drive["event"] and drive["exit_hours"] == pytest.approx(5_096 + 12)
    assert drive["drive_days"] == pytest.approx(4.5)


@pytest.mark.parametrize("count_proactive, expected", [(True, True), (False, False)])
def test_a_proactive_pull_is_censored_unless_replacements_are_the_events(count_proactive, expected):
    snaps = nightly("QHA1", 5_000, nights=5)
    obs = build(snaps, removal("QHA1", "2026-03-05T14:00:00Z", "proactive"), count_proactive=count_proactive)
    drive = obs.drives.iloc[0]
    assert bool(drive["event"]) is expected
    assert drive["replacement"] and not drive["failure"]


def test_by_default_only_a_failed_removal_is_an_event():
    snaps = pd.concat([nightly("QHA1", 5_000, nights=5), nightly("QHA2", 5_000, nights=5)])
    removals = pd.concat([removal("QHA1", "2026-03-05T14:00:00Z", "failed"),
                          removal("QHA2", "2026-03-05T14:00:00Z", "proactive")])
    obs = build(snaps, removals)
    assert obs.events == "failures"
    assert obs.drives.set_index("serial")["event"].to_dict() == {"QHA1": True, "QHA2": False}


def test_retired_drive_is_censored():
    obs = build(nightly("QHA1", 5_000, nights=5), removal("QHA1", "2026-03-06T00:00:00Z", "retired"))
    assert not obs.drives.iloc[0]["event"]


def test_power_on_hours_running_backwards_exclude_the_drive_with_the_reason():
    bad = nightly("QHB1", 9_000, nights=6)
    bad.loc[3, "power_on_hours"] = 8_000
    obs = build(pd.concat([bad, nightly("QHA1", 100, nights=6)]))
    assert obs.drives["serial"].tolist() == ["QHA1"]
    reason = obs.exclusions.set_index("serial").loc["QHB1", "reason"]
    assert "ran backwards" in reason and "9048" in reason


def test_power_on_hours_faster_than_the_wall_clock_exclude_the_drive():
    # counter in minutes, not hours: 1,440 "hours" per night
    obs = build(nightly("QHC1", 60_000, nights=4, step=1440))
    assert obs.drives.empty
    assert "jumped 1440 h in 24.0 h" in obs.exclusions.iloc[0]["reason"]


def test_a_jump_across_a_chunk_boundary_is_caught():
    snaps = nightly("QHC2", 1_000, nights=10)
    snaps.loc[5:, "power_on_hours"] += 5_000  # between night 4 and night 5
    cut = T0 + pd.Timedelta(days=5) - pd.Timedelta(hours=2)
    obs = observations(scan_frame(snaps, cut=cut), removal("x", T0, "retired").iloc[:0])
    assert obs.drives.empty and "jumped" in obs.exclusions.iloc[0]["reason"]


def test_small_clock_skew_between_captures_is_tolerated():
    snaps = nightly("QHA1", 1_000, nights=4)
    snaps.loc[2, "power_on_hours"] += 1  # whole-hour counter read a little late
    assert build(snaps).exclusions.empty


def test_a_drive_seen_again_after_a_failure_keeps_the_failure_and_re_enters_at_its_age_then():
    before = nightly("QHD1", 1_000, nights=5)  # 03-01 .. 03-05 02:00, 1,000 .. 1,096 h
    back = nightly("QHD1", 1_120, nights=5)  # back from repair on 03-11 at 1,120 h
    back["taken_at"] = back["taken_at"] + pd.Timedelta(days=10)
    obs = build(pd.concat([before, back]), removal("QHD1", "2026-03-05T14:00:00Z", "failed"))
    assert obs.exclusions.empty and obs.returns == 1
    periods = obs.drives[["entry_hours", "exit_hours", "drive_days", "event", "returned"]]
    assert periods.to_numpy().tolist() == [[1_000, 1_096 + 12, 4.5, True, False],
                                           [1_120, 1_120 + 4 * 24, 4.0, False, True]]
    # the gap is nobody's risk time: no episode covers (1,108, 1,120]
    assert obs.episodes[["start_hours", "stop_hours", "event"]].to_numpy().tolist() == [
        [1_000, 1_108, True], [1_120, 1_216, False]]


def test_a_drive_captured_every_night_through_its_removal_re_enters_the_night_after():
    # the log says failed on 03-03 00:00; the 03-03 02:00 capture is within the 24 h
    # tolerance (a log written at the start of the day), the 03-04 capture is the drive back
    obs = build(nightly("QHD1", 1_000, nights=10), removal("QHD1", "2026-03-03T00:00:00Z", "failed"))
    assert obs.drives[["entry_hours", "exit_hours", "event"]].to_numpy().tolist() == [
        [1_000, 1_048, True], [1_072, 1_216, False]]


def test_a_later_retired_record_does_not_erase_the_failure_and_the_pull_counts_once():
    removals = pd.concat([removal("QHD1", "2026-03-05T14:00:00Z", "failed"),
                          removal("QHD1", "2026-03-20T09:00:00Z", "retired")])
    obs = build(nightly("QHD1", 1_000, nights=5), removals)
    assert len(obs.drives) == 1
    drive = obs.drives.iloc[0]
    assert drive["removal_reason"] == "failed" and drive["event"] and drive["exit_hours"] == 1_096 + 12


def test_a_drive_retired_after_coming_back_keeps_both_removals():
    before = nightly("QHD1", 1_000, nights=5)
    back = nightly("QHD1", 1_120, nights=5)
    back["taken_at"] = back["taken_at"] + pd.Timedelta(days=10)
    removals = pd.concat([removal("QHD1", "2026-03-05T14:00:00Z", "failed"),
                          removal("QHD1", "2026-03-16T02:00:00Z", "retired")])
    obs = build(pd.concat([before, back]), removals)
    assert obs.drives["removal_reason"].tolist() == ["failed", "retired"]
    assert obs.drives["failure"].tolist() == [True, False]
    assert obs.drives["exit_hours"].tolist() == [1_108, 1_216 + 24]


def test_a_removal_before_the_first_snapshot_excludes_the_drive_with_the_reason():
    obs = build(nightly("QHD1", 1_000, nights=5), removal("QHD1", "2026-02-20T00:00:00Z", "failed"))
    assert obs.drives.empty
    assert "comes before the drive's first snapshot" in obs.exclusions.iloc[0]["reason"]


def firmware_update(serial="QHF1", first_hours=3_000, nights=20, update_night=10):
    return nightly(serial, first_hours, nights=nights,
                   firmware=["QF12"] * update_night + ["QF14"] * (nights - update_night))


def test_a_firmware_update_splits_exposure_at_the_first_capture_showing_it():
    obs = build(firmware_update(), removal("QHF1", "2026-03-20T14:00:00Z", "failed"), by=("model", "firmware"))
    periods = obs.drives[["cohort", "entry_hours", "exit_hours", "drive_days", "event", "period"]]
    assert periods.to_numpy().tolist() == [
        ["QH-HD8T-A / QF12", 3_000, 3_240, 10.0, False, 0],
        ["QH-HD8T-A / QF14", 3_240, 3_000 + 19 * 24 + 12, 9.5, True, 1]]
    assert obs.episodes["cohort"].tolist() == ["QH-HD8T-A / QF12", "QH-HD8T-A / QF14"]
    assert obs.episodes["event"].tolist() == [False, True]


def test_without_firmware_in_by_an_update_does_not_split_the_drive():
    obs = build(firmware_update(), removal("QHF1", "2026-03-20T14:00:00Z", "failed"), by=("model",))
    assert obs.drives[["entry_hours", "exit_hours", "event"]].to_numpy().tolist() == [[3_000, 3_468, True]]


def test_a_capture_missing_the_firmware_string_is_not_an_update():
    snaps = nightly("QHF2", 3_000, nights=6)
    snaps["firmware"] = snaps["firmware"].astype(object)
    snaps.loc[3, "firmware"] = None
    obs = build(snaps, by=("model", "firmware"))
    assert obs.drives["cohort"].tolist() == ["QH-HD8T-A / QF12"]


def test_a_firmware_update_inside_a_chunked_scan_splits_at_the_same_capture():
    snaps = firmware_update(nights=20, update_night=12)
    removals = removal("QHF1", "2026-03-20T14:00:00Z", "failed")
    whole = observations(scan_frame(snaps, removals=removals), removals, by=("model", "firmware"))
    split = observations(scan_frame(snaps, cut=T0 + pd.Timedelta(days=7), removals=removals), removals,
                         by=("model", "firmware"))
    pd.testing.assert_frame_equal(whole.drives, split.drives)


def test_a_removal_logged_at_the_start_of_the_last_day_still_ends_the_drive():
    obs = build(nightly("QHA1", 1_000, nights=3), removal("QHA1", "2026-03-03T00:00:00Z", "failed"))
    drive = obs.drives.iloc[0]
    assert drive["event"] and drive["exit_hours"] == 1_048


def test_a_removal_of_a_drive_never_seen_is_reported():
    obs = build(nightly("QHA1", 1_000, nights=3), removal("QHZ9", "2026-03-03T00:00:00Z", "failed"))
    assert obs.exclusions.set_index("serial").loc["QHZ9", "reason"].startswith("removal recorded but no snapshot")


def test_unchanged_covariates_collapse_into_one_episode():
    pending = [0.0] * 10 + [3.0] * 5
    obs = build(nightly("QHA1", 2_000, nights=15, pending_sectors=pending),
                removal("QHA1", "2026-03-15T14:00:00Z", "failed"))
    episodes = obs.episodes
    assert len(episodes) == 2
    assert episodes[["start_hours", "stop_hours"]].to_numpy().tolist() == [[2_000, 2_240], [2_240, 2_336 + 12]]
    assert episodes["any_pending"].tolist() == [0.0, 1.0]
    assert episodes["event"].tolist() == [False, True]


def test_nightly_temperature_wobble_inside_one_step_does_not_split_episodes():
    obs = build(nightly("QHA1", 2_000, nights=12, temperature_c=[38.0, 39.0, 41.0, 40.0] * 3))
    assert len(obs.episodes) == 1


def test_chunked_scan_gives_the_same_observations_as_one_pass():
    snaps, removals, _ = simulate_fleet(n_drives=150, days=40, seed=3, scale_hours=20_000)
    whole = observations(scan_frame(snaps), removals)
    split = observations(scan_frame(snaps, cut=pd.Timestamp("2026-01-25T00:00:00Z")), removals)
    pd.testing.assert_frame_equal(whole.drives, split.drives)
    pd.testing.assert_frame_equal(whole.episodes, split.episodes)


def test_store_scan_reads_the_same_drives_as_the_frame(tmp_path):
    from triage.store.dataset import Store

    snaps, removals, _ = simulate_fleet(n_drives=60, days=20, seed=4, scale_hours=20_000)
    store = Store(tmp_path)
    store.append("snapshots", snaps)
    store.append("removals", removals)
    from_store = observations(scan_store(store, chunk_days=7), store.read("removals"))
    from_frame = observations(scan_frame(snaps), removals)
    columns = ["serial", "entry_hours", "exit_hours", "event", "drive_days"]
    pd.testing.assert_frame_equal(from_store.drives[columns], from_frame.drives[columns])


def test_cohort_labels_join_the_chosen_keys():
    snaps = pd.concat([nightly("QHA1", 10, nights=2), nightly("QHT1", 10, nights=2, model="Tallow 14T")])
    snaps.loc[snaps["serial"] == "QHT1", "user_capacity_bytes"] = 14_000_000_000_000
    obs = build(snaps, by=("model", "user_capacity_bytes"))
    assert sorted(obs.drives["cohort"]) == ["QH-HD8T-A / 8 TB", "Tallow 14T / 14 TB"]


def test_capacity_is_shown_in_decimal_units_as_on_labels():
    assert format_capacity(1_920_383_410_176) == "1.92 TB"
    assert format_capacity(960_197_124_096) == "960.2 GB"


def test_unknown_cohort_key_is_refused():
    with pytest.raises(ValueError, match="cohort keys must be among"):
        check_by("model,host")
    assert check_by("model, firmware") == ("model", "firmware")
