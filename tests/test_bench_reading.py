"""bench/reading.py writes the "Reading the goals" prose from the run's rows, never from an older run."""

from bench.reading import reading_the_goals

FLEET = {
    "benchmark": "Fleet throughput",
    "ratio": 4.5,
    "ratio_text": "4.5x",
    "met": False,
    "details": {
        "ours": {
            "server_start_s": 5.0,
            "flow_s": 35.0,
            "counts": {"audited": 1000, "respecify": 40},
            "flow_timings": {"stage_s": 2.0, "audit_s": 10.0, "render_s": 6.0, "publish_s": 8.5},
        },
        "peer": {"series_per_second": 6.25},
    },
}
FIT_ROWS = [
    {"benchmark": "Model fit (micro)", "size": "spec A", "ratio": 12.0, "ratio_text": "12.0x", "met": True,
     "measured": "largest log-likelihood shortfall 0.0e+00"},
    {"benchmark": "Model fit (micro)", "size": "spec B", "ratio": 7.0, "ratio_text": "7.0x", "met": False,
     "measured": "largest log-likelihood shortfall 0.0e+00"},
]  # fmt: skip


def test_numbers_come_from_the_rows():
    text = reading_the_goals([FLEET, *FIT_ROWS])
    assert "**Throughput (goal 20x): missed, 4.5x** (2.2x per core)" in text
    assert "25.0 series/s against the peer's 6.2" in text  # 1000 / (35 + 5)
    assert "the flow alone is 28.6 series/s, 4.6x the peer" in text  # 1000 / 35, over 6.25
    assert "archive writing and run page 2.5 s" in text  # publish runs from the start of render: 8.5 - 6.0
    assert "20x would need the whole fleet in 8 s" in text  # 1000 / (20 * 6.25)
    assert "1 of 2 specs meet it; met at 12.0x to 12.0x" in text
    assert "Missed: spec B at 7.0x" in text


def test_a_benchmark_left_out_is_said_to_be_unmeasured():
    text = reading_the_goals([FLEET])
    for name in ("Fit-bound ratio", "Model fits", "Command start-up", "Scale-out", "Peak memory"):
        assert f"**{name}:** not measured in this run." in text
    failed = {"benchmark": "Fleet throughput", "size": "", "measured": "failed: OSError", "met": False}
    assert "**Fleet throughput:** not measured in this run." in reading_the_goals([failed])
