"""The pipeline benchmark runs end to end on the embedded default and reports what it promises.

A smoke run (``--quick``: a few items) with real workers on the filesystem
broker and SQLite, in a scratch folder; it checks the report's structure and
internal consistency, never a timing.
"""

import json
import math
import os
import subprocess
import sys

import pytest

from tests.conftest import ROOT

pytestmark = [pytest.mark.worker, pytest.mark.slow]


@pytest.fixture(scope="module")
def report(tmp_path_factory) -> dict:
    var = tmp_path_factory.mktemp("bench")
    env = {
        k: v
        for k, v in os.environ.items()
        if k not in ("DATABASE_URL", "CELERY_BROKER_URL", "EMICASE_DATABASE_NAME")
    }
    env.update(DJANGO_SETTINGS_MODULE="emicase.settings", EMICASE_VAR_DIR=str(var / "parent"))
    done = subprocess.run(
        [
            sys.executable,
            "manage.py",
            "bench_pipeline",
            "--brokers",
            "filesystem",
            "--quick",
            "--json",
            "--var-dir",
            str(var),
        ],
        cwd=ROOT,
        env=env,
        capture_output=True,
        text=True,
        timeout=300,
    )
    assert done.returncode == 0, done.stderr[-3000:]
    return json.loads(done.stdout)


def test_it_measures_latency_of_both_file_kinds_with_the_quick_counts(report):
    assert report["counts"] == {"scans": 2, "records": 1, "burst": 4, "rounds": 1}
    result = report["brokers"]["filesystem"]
    assert result["status"] == "measured"
    assert (result["broker"], result["database"]) == ("filesystem", "sqlite")
    for kind, n in (("scan", 2), ("record", 1)):
        latency = result["latency"][kind]
        assert latency["n"] == n
        assert 0 < latency["p50_s"] <= latency["p95_s"]
        stages = latency["stages_median_s"]
        assert set(stages) == {"upload", "queue_to_claim", "engine", "store_and_seen"}
        assert stages["engine"] > 0
        # The stages split each wait without gap or overlap; with one or two items a median is
        # the mean, so the stages' medians add up to the total's.
        assert math.isclose(sum(stages.values()), latency["p50_s"], abs_tol=0.002)


def test_it_reports_throughput_and_the_ratio_of_two_workers_to_one(report):
    throughput = report["brokers"]["filesystem"]["throughput"]
    assert throughput["burst"] == 4
    assert throughput["one_process_per_s"] > 0 and throughput["two_processes_per_s"] > 0
    expected = throughput["two_processes_per_s"] / throughput["one_process_per_s"]
    assert math.isclose(throughput["ratio"], expected, rel_tol=0.01)
    assert throughput["rounds"] == 1 and throughput["ratio_per_round"] == [throughput["ratio"]]
    for share in throughput["occupancy"].values():
        assert 0 < share <= 1  # time between claim and finish cannot exceed the pool's time
    for cores in throughput["cpu_cores"].values():
        if cores is not None:  # None only where /proc is missing
            assert set(cores) == {"worker", "bench", "servers", "others"}
            assert cores["worker"] > 0 and all(v >= 0 for v in cores.values())


def test_it_judges_each_target_and_says_what_it_could_not_measure(report):
    targets = {t["name"]: t for t in report["targets"]}
    redis = next(t for name, t in targets.items() if "on Redis" in name)
    assert redis["met"] is None and redis["value"] is None  # Redis was not asked for
    ratio = next(t for name, t in targets.items() if name.endswith("(filesystem)"))
    assert ratio["value"] == report["brokers"]["filesystem"]["throughput"]["ratio"]
    assert ratio["met"] is (ratio["value"] >= 1.7)
