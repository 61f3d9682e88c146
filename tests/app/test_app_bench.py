"""The GUI stall benchmark's arithmetic (python -m app.bench; the run itself is manual)."""

import pytest

pytest.importorskip("PySide6")


def test_longest_gap_counts_the_ends_and_the_report_flags_slow_steps(qtbot):
    from app.bench import TARGET_S, _Heartbeat, format_report
    beat = _Heartbeat()
    beat.timer.stop()
    beat.beats = [1.00, 1.01, 1.02, 1.35, 1.36]
    assert beat.longest_gap(1.0, 1.40) == pytest.approx(0.33)      # 1.02 -> 1.35
    assert beat.longest_gap(1.30, 1.34) == pytest.approx(0.04)     # no beat inside
    text = format_report({"reference_s": 0.012, "reference_draw_s": 0.1, "target_s": TARGET_S,
                          "steps": [{"step": "quick", "gap_s": 0.05},
                                    {"step": "stalls", "gap_s": 0.33}]})
    lines = {ln.split()[0]: ln for ln in text.splitlines()[4:]}
    assert lines["quick"].endswith("ok") and lines["stalls"].endswith("SLOW")
    assert "3.3" in lines["stalls"]                                 # 0.33 s / 0.1 s draw
