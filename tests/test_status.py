"""The live status line of `run` (io/status.py) and its hooks in the live loop (io/live.py): one line rewritten
in place on a terminal, plain lines at an interval otherwise, flags by name, counters on SIGUSR1 and at the end."""

from __future__ import annotations

import io
import os
import signal
import threading
from types import SimpleNamespace

import pytest
import serial

from fieldvane.estimator.flags import EstimateFlag, describe
from fieldvane.io.live import LiveLoop, make_decoder
from fieldvane.io.serial_link import SerialLink
from fieldvane.io.status import StatusLine, link_text, status_text
from fieldvane.io.wire import Frame, encode_frame

TIMEOUT = 15.0
RECORD = {"t": 12.345, "ux": 0.6, "uy": 0.0, "uz": 0.8, "b_nT": 20000.04, "sigma_deg": 0.0312,
          "flags": int(EstimateFlag.TRACKING | EstimateFlag.BLIND)}
COUNTERS = {"decoder": {"frames_ok": 2468, "crc_errors": 3, "seq_gaps": 7},
            "capture": {"bytes": 3 * 2**20, "bytes_lost": 0}, "link": {"connected": 1},
            "sink[est.csv]": {"dropped": 0}}


class FakeClock:
    def __init__(self):
        self.now = 0.0

    def __call__(self):
        return self.now


def test_status_text_names_direction_magnitude_sigma_flags_and_link_health():
    text = status_text(RECORD, COUNTERS)
    for part in ("t 12.35 s", "u (+0.600 +0.000 +0.800)", "|B| 20000.0 nT", "sigma 0.031 deg",
                 describe(RECORD["flags"]), "frames 2,468", "crc 3", "missing 7", "capture 3.0 MiB"):
        assert part in text, (part, text)
    assert "TRACKING|BLIND" in text and "LOST" not in text and "\n" not in text
    assert "probe 1  |" in status_text({**RECORD, "probes_used": 1}, COUNTERS)      # one probe left


def test_link_text_says_what_was_lost_dropped_or_is_down():
    c = {"decoder": {"frames_ok": 1, "crc_errors": 0, "seq_gaps": 0},
         "capture": {"bytes": 100, "bytes_lost": 4096}, "link": {"connected": 0, "bytes_dropped": 512},
         "sink[a]": {"dropped": 2}, "sink[b]": {"dropped": 3}}
    text = link_text(c)
    assert "LOST 4,096 B" in text and "loggers dropped 5" in text and "LINK DOWN" in text
    assert "not estimated live 512 B" in text
    assert "no capture" in link_text({"decoder": {"lines_ok": 4, "bad_lines": 1}})
    assert "lines 4  bad 1" in link_text({"decoder": {"lines_ok": 4, "bad_lines": 1}})


def test_status_before_any_estimate_and_with_missing_values():
    assert status_text(None, COUNTERS).startswith("waiting for the first estimate")
    assert "sigma - deg" in status_text({**RECORD, "sigma_deg": None}, COUNTERS)


def test_terminal_line_is_rewritten_in_place_and_messages_go_above_it():
    out, clock = io.StringIO(), FakeClock()
    line = StatusLine(out, tty=True, clock=clock, width=400)
    assert line.update(RECORD, COUNTERS)
    first = out.getvalue()
    assert first.startswith("\r") and "\n" not in first
    assert not line.update(RECORD, COUNTERS)                 # not due yet: nothing written
    clock.now += 1.0
    assert line.update(None, COUNTERS)                       # a shorter text pads over the longer one
    second = out.getvalue()[len(first):]
    assert second.startswith("\r") and len(second) == len(first)
    line.log("fieldvane live: link lost; reconnecting")
    tail = out.getvalue()[len(first) + len(second):]
    shown = status_text(None, COUNTERS)
    # cleared, the message on its own line, then the status line drawn again below it
    assert tail == "\r" + " " * len(shown) + "\r" + "fieldvane live: link lost; reconnecting\n" + "\r" + shown
    line.close()
    assert out.getvalue().endswith("\n")


def test_terminal_line_is_cut_to_the_terminal_width():
    out = io.StringIO()
    StatusLine(out, tty=True, clock=FakeClock(), width=60).update(RECORD, COUNTERS)
    assert len(out.getvalue().lstrip("\r")) < 60


def test_plain_lines_at_the_interval_when_not_a_terminal():
    out, clock = io.StringIO(), FakeClock()
    line = StatusLine(out, interval_s=10.0, tty=False, clock=clock)
    for step in range(100):                                  # 0 .. 49.5 s of updates every 0.5 s
        line.update(RECORD, COUNTERS)
        clock.now += 0.5
    lines = out.getvalue().splitlines()
    assert len(lines) == 4 and all(x.startswith("status: ") for x in lines)   # at 10, 20, 30, 40 s
    assert "\r" not in out.getvalue()
    line.log("a message")
    assert out.getvalue().endswith("a message\n")


def frames(n):
    return b"".join(encode_frame(Frame(k, 5_000_000 * k, 0, 139916.0, 93348.0, (0.1, 0.2, 0.3, 0.4)))
                    for k in range(n))


def estimate(sample):
    return {"t": sample.t, "ux": 1.0, "uy": 0.0, "uz": 0.0, "b_nT": 20000.0, "bx_nT": 20000.0, "by_nT": 0.0,
            "bz_nT": 0.0, "sigma_deg": 0.1, "flags": int(EstimateFlag.TRACKING)}


@pytest.mark.skipif(not hasattr(signal, "SIGUSR1"), reason="SIGUSR1 is POSIX only")
def test_loop_calls_the_status_hook_and_shows_counters_on_sigusr1_and_at_the_end():
    port = serial.serial_for_url("loop://", timeout=0.05)
    link = SerialLink("loop://", opener=lambda: port)
    seen, reports, logs = [], [], []
    loop = LiveLoop(link, make_decoder("binary"), estimate, [], None, log=logs.append,
                    status=lambda lp: seen.append((lp.last_record, lp.counters()["decoder"]["frames_ok"])),
                    status_interval_s=0.0, counters_report=lambda lp, final: reports.append(final))
    restore = loop.install_signal_handlers()      # this test runs in the main thread, as `run` does
    result = {}
    th = threading.Thread(target=lambda: result.setdefault("summary", loop.run()))
    th.start()
    try:
        assert link.connected.wait(TIMEOUT)
        port.write(frames(50))
        assert loop.wait_for(lambda lp: lp.records == 50, TIMEOUT)
        assert loop.wait_for(lambda lp: seen and seen[-1][1] == 50, TIMEOUT)
        os.kill(os.getpid(), signal.SIGUSR1)
        assert loop.wait_for(lambda lp: reports == [False], TIMEOUT)
    finally:
        loop.stop()
        th.join(TIMEOUT)
        restore()
    assert seen[-1][0]["t"] == pytest.approx(49 * 0.005)          # the last record reached the hook
    assert reports == [False, True]                                # on demand, then once at the end
    assert not any("fieldvane live: final" in x for x in logs)     # the report replaced the one-liner
    assert not any("frames_ok=" in x for x in logs)                # and the periodic counter dump


def test_run_says_where_estimates_go_and_warns_without_out_or_capture():
    from fieldvane.io.commands.run import start_lines

    args = SimpleNamespace(input_format="binary", port="/dev/pts/9", capture=None)
    lines = start_lines(args, [], 4242)
    text = "\n".join(lines)
    assert "kill -USR1 4242" in text
    assert "no --out: the estimates are not written anywhere" in text
    assert "no --capture folder" in text
    lines = start_lines(SimpleNamespace(input_format="csv", port="p", capture="cap/"), ["csv:file:est.csv"], 1)
    assert "estimates to csv:file:est.csv" in "\n".join(lines) and "raw bytes to cap/" in "\n".join(lines)
