"""``halfcycle analyze`` on an interruption inside a dip: the JSON shows both durations, and
each table judges the right one (issue 7 item 7). The recording is invented."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from agent.cli.main import main


def test_interruption_inside_a_dip_keeps_both_durations(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # Invented 230 V 50 Hz recording: 0.5 pu from 4.00 s, 0.0 pu from 4.25 s, back to 1.0 pu
    # at 4.40 s. Below the dip threshold 0.40 s; below the interruption threshold 0.15 s.
    rate, f0 = 6400.0, 50.0
    t = np.arange(int(rate * 12)) / rate
    amp = np.where((t >= 4.0) & (t < 4.25), 0.5, 1.0)
    amp = np.where((t >= 4.25) & (t < 4.40), 0.0, amp)
    v = 230 * np.sqrt(2) * amp * np.sin(2 * np.pi * f0 * t)
    path = tmp_path / "street.csv"
    with path.open("w") as fh:
        fh.write("L1\n")
        np.savetxt(fh, v[:, None], delimiter=",", fmt="%.4f")
    assert main(["analyze", str(path), "--rate", str(rate), "--nominal", "230", "--json"]) == 0
    (ev,) = json.loads(capsys.readouterr().out)["events"]
    assert ev["type"] == "interruption"
    # IEC 61000-4-30 Ed.3 cl. 5.4: durations within about one cycle (±1 cycle, from memory).
    cycle = 1 / f0
    assert ev["duration_s"] == pytest.approx(0.15, abs=cycle)
    assert ev["enclosing_duration_s"] == pytest.approx(0.40, abs=cycle)
    # IEEE 1159-2009 Table 2 (pub): the interruption's own 0.15 s -> momentary interruption.
    assert ev["ieee1159"] == "momentary interruption"
    # IEC 61000-2-8 / EN 50160 dip table (pub): row 5 > u, column 200 < t <= 500 ms on the
    # 0.40 s below the dip threshold (the own 0.15 s would give R5C1).
    assert ev["en50160_cell"] == "R5C2"
    # IEEE 1564 (from memory): reference curve 0.7 pu for 0.2-0.5 s -> Se = (1 - u) / 0.3
    # (0.5 pu for 20-200 ms on the own duration would give (1 - u) / 0.5).
    assert ev["severity"] == pytest.approx((1 - ev["level_pu"]) / 0.3, rel=1e-3)
