"""The demo shows where its sensor is blind: probe 2's cable is pulled while the field crosses probe 1's axis,
and the summary compares the map's blind zone (probe 1 alone, gains unknown) with what the estimators flagged.
Slow (the demo streams 45 s in real time); the default suite runs the short demo in test_replay_run_commands."""

from __future__ import annotations

import re
import subprocess
import sys

import pytest


@pytest.mark.slow
def test_demo_summary_reports_the_blind_stretch(tmp_path):
    proc = subprocess.run([sys.executable, "-m", "fieldvane", "demo", "--no-plots", "-o", str(tmp_path)],
                          capture_output=True, text=True, timeout=600)
    out = proc.stdout
    assert proc.returncode == 0, out + proc.stderr
    assert "reproduces the live estimates exactly: yes" in out
    m = re.search(r"probe 2 missing .* from ([\d.]+) to ([\d.]+) s; the map .* calls ([\d.]+) s of it blind", out)
    assert m, out
    start, end, blind_s = map(float, m.groups())
    assert start == pytest.approx(26.0, abs=0.01) and end == pytest.approx(40.0, abs=0.01)
    assert 5.0 < blind_s < end - start                 # the field leaves the zone before probe 2 is back
    snap = re.search(r"gain unknown .*: BLIND on (\d+) % of the samples the map calls blind", out)
    assert snap and int(snap.group(1)) >= 95, out       # the single-sample inverse agrees with the map
    tracker = re.search(r"tracker: BLIND on .*; error RMS ([\d.]+) deg", out)
    assert tracker and float(tracker.group(1)) < 0.5, out
    assert "blind within about" in out                  # the map step names the zone around probe 1's axis
