"""``triage export --openmetrics``: checked with a strict reader written from the OpenMetrics 1.0
specification (tests/views/omparse.py)."""

from __future__ import annotations

import json
import os

import pytest
from scipy.stats import chi2
from typer.testing import CliRunner

from tests.views import omparse
from tests.views.conftest import HOSTILE, QUIET_HOST
from triage.cli import app
from triage.exitcodes import Exit
from triage.report.openmetrics import escape_label_value
from triage.report.safe import printable

runner = CliRunner()


def run(*args):
    return runner.invoke(app, [*args])


@pytest.fixture(scope="module")
def exposition(fleet, tmp_path_factory):
    path = tmp_path_factory.mktemp("om") / "fleet.om"
    result = run("export", "--openmetrics", str(path), "--store", str(fleet["root"]))
    assert result.exit_code == Exit.OK, result.output
    text = path.read_text(encoding="utf-8")
    # the reader raises on anything the OpenMetrics 1.0 text format does not allow
    families = {f.name: f for f in omparse.parse(text)}
    return text, families


def test_the_file_parses_ends_in_eof_and_has_every_family_as_a_gauge(exposition):
    text, families = exposition
    assert text.endswith("# EOF\n")
    for name in ("triage_drive_failure_probability", "triage_drive_flagged", "triage_cohort_afr_ratio",
                 "triage_cohort_afr_ratio_low", "triage_cohort_afr_ratio_high", "triage_cohort_arr_ratio",
                 "triage_cohort_arr_ratio_low", "triage_cohort_arr_ratio_high", "triage_group_loss_probability",
                 "triage_newest_capture_timestamp_seconds"):
        assert families[name].type == "gauge", name


def test_failure_probabilities_are_the_ranked_lists(exposition, fleet):
    _, families = exposition
    ranked = json.loads(run("rank", "--top", "10000", "--format", "json", "--store", str(fleet["root"])).stdout)["drives"]
    by_serial = {s.labels["serial"]: s for s in families["triage_drive_failure_probability"].samples}
    assert len(by_serial) == len(ranked)
    for row in ranked:
        sample = by_serial[row["serial"]]
        assert sample.value == pytest.approx(row["p_fail"])
        assert sample.labels["slot"] == row["slot"] and sample.labels["group"] == row["group"]


def test_hostile_label_values_round_trip_through_the_parser(exposition, fleet):
    # OpenMetrics 1.0 "Escaping": \\ \" \n in label values; other controls we show as \xNN text
    _, families = exposition
    by_serial = {s.labels["serial"]: s for s in families["triage_drive_failure_probability"].samples}
    sample = by_serial[fleet["hostile_serial"]]
    assert sample.labels["model"] == printable(HOSTILE, keep="\n")
    assert "\n" in sample.labels["model"] and '"' in sample.labels["model"]
    assert "\x1b" not in sample.labels["model"]


def test_escape_label_value_follows_the_spec():
    assert escape_label_value('a"b\\c\nd') == 'a\\"b\\\\c\\nd'


def test_cohort_afr_is_failures_per_drive_year_with_exact_poisson_limits(exposition, fleet):
    _, families = exposition
    cohorts = json.loads(run("cohorts", "--format", "json", "--store", str(fleet["root"])).stdout)
    value = {s.labels["cohort"]: s.value for s in families["triage_cohort_afr_ratio"].samples}
    low = {s.labels["cohort"]: s.value for s in families["triage_cohort_afr_ratio_low"].samples}
    high = {s.labels["cohort"]: s.value for s in families["triage_cohort_afr_ratio_high"].samples}
    for row in cohorts:
        years = row["drive_days"] / 365.0
        k = row["failures"]
        label = printable(row["cohort"], keep="\n")  # the hostile model is a cohort too
        assert value[label] == pytest.approx(k / years)
        # Garwood (1936) exact limits: chi2(alpha/2; 2k)/2 and chi2(1-alpha/2; 2k+2)/2 events
        expected_low = chi2.ppf(0.025, 2 * k) / 2 / years if k else 0.0
        assert low[label] == pytest.approx(expected_low, abs=1e-12)
        assert high[label] == pytest.approx(chi2.ppf(0.975, 2 * k + 2) / 2 / years)


def test_a_flagged_drive_has_one_sample_per_severity_and_category(exposition):
    _, families = exposition
    samples = families["triage_drive_flagged"].samples
    keys = [(s.labels["serial"], s.labels["severity"], s.labels["category"]) for s in samples]
    assert samples and len(keys) == len(set(keys)) and all(s.value == 1.0 for s in samples)


def test_the_host_not_reporting_and_the_newest_capture_time_are_there(exposition, fleet):
    _, families = exposition
    silent = {(s.labels["scope"], s.labels["name"]): s.value for s in families["triage_not_reporting_seconds"].samples}
    assert silent[("host", QUIET_HOST)] > 36 * 3600  # silent for three nights
    assert any(scope == "drive" and name.startswith(fleet["lost_serial"]) for scope, name in silent)
    newest = families["triage_newest_capture_timestamp_seconds"].samples[0].value
    assert newest == pytest.approx(fleet["snapshots"]["taken_at"].max().timestamp())


def test_the_write_replaces_the_old_file_whole_and_leaves_no_temporary(fleet, tmp_path):
    path = tmp_path / "fleet.om"
    path.write_text("old\n")
    assert run("export", "--openmetrics", str(path), "--store", str(fleet["root"])).exit_code == Exit.OK
    assert path.read_text().startswith("# TYPE") and os.listdir(tmp_path) == ["fleet.om"]


def test_a_missing_folder_is_an_error_and_nothing_is_created(fleet, tmp_path):
    path = tmp_path / "no" / "fleet.om"
    result = run("export", "--openmetrics", str(path), "--store", str(fleet["root"]))
    assert result.exit_code == Exit.USAGE and not path.parent.exists()


def test_the_degraded_group_is_marked(exposition, fleet):
    _, families = exposition
    degraded = {s.labels["group"]: s.value for s in families["triage_group_degraded"].samples}
    assert degraded[fleet["degraded_group"]] == 1.0
    assert set(degraded.values()) == {0.0, 1.0}  # a gauge per group, healthy ones at 0


@pytest.mark.parametrize("bad", [
    "a 1\n",  # no '# EOF' (OpenMetrics 1.0: the exposition MUST end with it)
    "# TYPE a gauge\na{x=\"1\",x=\"2\"} 1\n# EOF\n",  # a label repeated
    "# TYPE a gauge\na{x=\"line\nbreak\"} 1\n# EOF\n",  # a raw line feed in a label value
    "# TYPE a gauge\nb 1\n# EOF\n",  # a sample outside its family
    "# TYPE a gauge\na 1\n\n# EOF\n",  # an empty line
    "# TYPE a gauge\na 1\n# EOF\na 2\n",  # text after '# EOF'
])
def test_the_reader_refuses_what_the_specification_does_not_allow(bad):
    # the check above means something only if the reader is strict: each of these breaks the ABNF
    with pytest.raises(omparse.OpenMetricsError):
        omparse.parse(bad)
