"""The live loop: link -> capture (first, in whichever thread read the bytes) -> decoder -> estimate -> sinks,
and capture replay. The loop thread itself waits on a plain posix port and reads it (see serial_link).

Every byte read goes to the capture before anything that may drop it: the capture has its own
bounded buffer and writer thread, and what it cannot store is counted, marked in the files and
reported at once. The loop thread never waits on a logger (sinks queue and drop, counted) and
never holds up a stop: Ctrl-C or SIGTERM ends the run within about a second and a half whatever
the estimator's backlog (that backlog is in the capture: a replay finishes the job); a second
Ctrl-C abandons even the capture's last writes. `frames_from_capture` and `runs_from_capture`
feed the captured bytes, in the same order and with the same link events, through the same
decoder, so a replay reproduces the live samples exactly, and their estimates exactly or, through a lock-in
filter, within rounding (the sample rate is learned from the timestamps as they arrive).
"""

from __future__ import annotations

import dataclasses
import gc
import signal
import sys
import threading
import time
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field

from fieldvane import __version__
from fieldvane.estimator.samples import Sample, SampleBlock
from fieldvane.io.capture import EVENT_DATA, EVENT_LOST, CaptureReader, CaptureWriter, capture_files
from fieldvane.io.capture_thread import DEFAULT_CAPTURE_BUFFER_BYTES, CaptureThread
from fieldvane.io.csv_lines import CsvLineDecoder
from fieldvane.io.errors import EXIT_CAPTURE_LOST, EXIT_FAILURE, EXIT_INTERRUPTED, InputError
from fieldvane.io.serial_link import SerialLink
from fieldvane.io.row_block import RowBlock
from fieldvane.io.sinks import Sink, TcpServerTransport, close_sinks, open_sink
from fieldvane.io.wire import VERSION as WIRE_VERSION
from fieldvane.io.wire import FrameDecoder

INPUT_FORMATS = ("binary", "csv")
Estimate = Callable[[Sample], "Mapping | None"]
# A batch's records: one per sample (None: no estimate), or a RowBlock of them (handed to each logger whole).
EstimateBatch = Callable[[list], "list[Mapping | None] | RowBlock"]
REPEAT_LOG_S = 10.0          # a continuing problem is logged again at most this often
# Python hands its interpreter lock between threads every 5 ms by default: the link's reader, the loop and the
# loggers' writers would wait that long for one another. While the loop runs they take turns every 0.2 ms.
LIVE_SWITCH_INTERVAL_S = 0.0002


class BinarySampleDecoder:
    """FrameDecoder that returns samples: feed(bytes) -> a SampleBlock (or Samples when probe counts mix)."""

    def __init__(self, max_encoded_len: int | None = None):
        self.frames = FrameDecoder() if max_encoded_len is None else FrameDecoder(max_encoded_len)

    def feed(self, data: bytes) -> SampleBlock | list[Sample]:
        """Return the samples of the frames completed by data (first after a seq reset: restarted)."""
        return self.frames.feed_arrays(data).samples()

    def feed_many(self, pieces) -> tuple[SampleBlock | list[Sample], list[int]]:
        """Return the samples of the frames completed by several reads, in order, and how many each completed."""
        arrays, counts = self.frames.feed_many(pieces)
        return arrays.samples(), counts

    def resync(self, lost: bool = False) -> None:
        """Start afresh at the next byte (link reopened, or bytes lost before it)."""
        self.frames.resync()

    def counters(self) -> dict[str, int]:
        """Return the frame decoder's counters."""
        return self.frames.counters()

    @property
    def last_error(self) -> None:
        """Binary frames have no per-line messages (the counters say it all)."""
        return None


def make_decoder(input_format: str, columns: Sequence[str] | None = None,
                 source: str = "<serial>"):
    """Return a pure decoder for 'binary' frames or 'csv' lines: feed(bytes) -> list[Sample]."""
    if input_format == "binary":
        return BinarySampleDecoder()
    if input_format == "csv":
        return CsvLineDecoder(columns, source=source)
    raise InputError(f"unknown input format '{input_format}' (use binary or csv)",
                     column="--input")


def feed_chunk(decoder, chunk) -> list[Sample]:
    """Return the Samples a chunk completes, handling link-open and bytes-lost events alike live and in replay."""
    if chunk.event == EVENT_DATA:
        return decoder.feed(chunk.data)
    decoder.resync(lost=chunk.event == EVENT_LOST)
    return []


_turns = {"loops": 0, "before": 0.0, "froze": False}
_turns_lock = threading.Lock()


def _live_process_settings(start: bool) -> None:
    """While any loop runs: the live switch interval, and every object alive at the start (modules, compiled
    kernels, the calibration and its table) frozen out of the cyclic garbage collector's reach -- a full
    collection scanned them all, 65-83 ms with the loop stopped (650-830 frames at 10 kHz). The first loop to
    start keeps the process's own settings and the last to end puts them back (overlapping loops do not
    restore them under one another)."""
    with _turns_lock:
        if start:
            if _turns["loops"] == 0:
                _turns["before"] = sys.getswitchinterval()
                sys.setswitchinterval(min(_turns["before"], LIVE_SWITCH_INTERVAL_S))
                _turns["froze"] = gc.get_freeze_count() == 0      # (a process that froze its own heap manages it)
                if _turns["froze"]:
                    gc.freeze()         # (no collection first: 65 ms more before the first estimate, for little)
            _turns["loops"] += 1
        else:
            _turns["loops"] -= 1
            if _turns["loops"] == 0:
                sys.setswitchinterval(_turns["before"])
                if _turns["froze"]:
                    gc.unfreeze()


def join_samples(pieces: list) -> SampleBlock | list[Sample]:
    """Return the samples of several decoder results as one: a SampleBlock when all are blocks of the same
    channels (the binary decoder's usual case), else a list of Samples."""
    if len(pieces) == 1:
        return pieces[0]
    if pieces and all(isinstance(p, SampleBlock) and p.channels == pieces[0].channels for p in pieces):
        return SampleBlock.concatenate(pieces)
    return [sample for piece in pieces for sample in piece]


def restart_times(samples) -> list[float]:
    """Return the times (s) of the samples marked `restarted` (the first after a sensor restart)."""
    if isinstance(samples, SampleBlock):
        return [] if samples.restarted is None else samples.t[samples.restarted].tolist()
    return [s.t for s in samples if s.restarted]


def _stderr(line: str) -> None:
    print(line, file=sys.stderr, flush=True)


def format_counters(counters: Mapping[str, object]) -> str:
    """Return counters as one 'key=value' line (nested dicts flattened as prefix.key)."""
    parts = []
    for k, v in counters.items():
        if isinstance(v, Mapping):
            parts += [f"{k}.{kk}={vv}" for kk, vv in v.items()]
        else:
            parts.append(f"{k}={v}")
    return " ".join(parts)


@dataclass
class LiveSummary:
    """What a live run ended with: final counters, how it stopped, what was lost or failed."""

    counters: dict
    interrupted: bool = False
    sinks_closed: bool = True
    capture_files: list[str] = field(default_factory=list)
    capture_bytes_lost: int = 0          # received bytes that are not in the capture
    capture_bytes_unconfirmed: int = 0   # bytes still being written when the run was forced to end
    failed_sinks: list[str] = field(default_factory=list)   # sinks whose file or stream broke
    forced: bool = False                 # a second Ctrl-C cut the shutdown short
    capture_failures: list[str] = field(default_factory=list)   # the capture's last writes or its close failed

    def text(self) -> str:
        """Return the final counter summary as one line."""
        return "fieldvane live: final " + format_counters(self.counters)

    def exit_code(self) -> int:
        """Return the exit code: 4 raw bytes lost or the capture not finished, 1 a logger failed or did not finish
        writing, 130 stopped by a signal, else 0."""
        if self.capture_bytes_lost or self.capture_bytes_unconfirmed or self.capture_failures:
            return EXIT_CAPTURE_LOST
        if self.failed_sinks or not (self.sinks_closed or self.forced):     # (forced: the user let them go)
            return EXIT_FAILURE
        return EXIT_INTERRUPTED if self.interrupted else 0


class _Repeat:
    """Rate limit for a continuing problem: say it at once, then at most every REPEAT_LOG_S."""

    def __init__(self):
        self.next_at: dict[str, float] = {}

    def due(self, key: str, now: float) -> bool:
        if now >= self.next_at.get(key, -1.0):
            self.next_at[key] = now + REPEAT_LOG_S
            return True
        return False


class LiveLoop:
    """One live pipeline; run() processes link chunks until stop() (or a signal) and shuts down.

    capture may be a CaptureWriter (wrapped in a CaptureThread here) or a CaptureThread; it is
    attached to the link, whose reader hands it every chunk before queueing it for this loop.
    """

    def __init__(self, link: SerialLink, decoder, estimate: Estimate, sinks: Sequence[Sink],
                 capture: CaptureWriter | CaptureThread | None = None,
                 log: Callable[[str], None] | None = _stderr,
                 log_interval_s: float = 60.0, clock: Callable[[], float] = time.monotonic,
                 sink_close_timeout_s: float = 0.7, max_logged_errors: int = 10,
                 drain_timeout_s: float = 0.5, capture_close_timeout_s: float = 30.0,
                 capture_buffer_bytes: int = DEFAULT_CAPTURE_BUFFER_BYTES,
                 estimate_batch: EstimateBatch | None = None,
                 status: Callable[["LiveLoop"], None] | None = None, status_interval_s: float = 0.25,
                 counters_report: Callable[["LiveLoop", bool], None] | None = None):
        self.link, self.decoder, self.estimate = link, decoder, estimate
        # status(loop) is called every status_interval_s from this loop's thread (it reads last_record and
        # counters()); it replaces the periodic counter line. counters_report(loop, final) shows the counters
        # on SIGUSR1 (final=False) and at the end (final=True, instead of the one-line final summary).
        self.status, self.status_interval_s, self.counters_report = status, status_interval_s, counters_report
        self._last_record: Mapping | None = None
        self._last_block: RowBlock | None = None
        # host receive time (ns) of the chunk that completed each sample handed to the current estimate
        # call, one per sample (a capture replay gives the samples the same times: runs_from_capture)
        self.sample_host_times_ns: list[int] = []
        self._counters_asked = self._counters_shown = 0   # SIGUSR1 requests (the handler only counts)
        # estimate_batch(samples) -> records, one per sample (None: no record): the whole chunk in one call
        # (the compiled filter core's way); `estimate` then serves only as the fallback for a failing batch.
        self.estimate_batch = estimate_batch
        self.sinks = list(sinks)
        if isinstance(capture, CaptureWriter):
            capture = CaptureThread(capture, capture_buffer_bytes)
        self.capture: CaptureThread | None = capture
        if capture is not None and link.capture is not capture:
            link.attach_capture(capture)
        if not link.started:
            link.share_reads()      # this loop waits on the port itself (a plain posix port): one thread per frame
        self.log = log or (lambda line: None)
        self.log_interval_s = log_interval_s
        self.sink_close_timeout_s = sink_close_timeout_s
        self.drain_timeout_s = drain_timeout_s
        self.capture_close_timeout_s = capture_close_timeout_s
        self.max_logged_errors = max_logged_errors
        self._clock = clock
        self._stop = threading.Event()
        self._progress = threading.Condition()
        self._waiting = 0                        # threads in wait_for
        self._leftover: list[Sample] = []
        self._leftover_ns: list[int] = []
        self._deadline: float | None = None     # set while draining at shutdown
        self._forced = False
        self._signals = 0
        self._repeat = _Repeat()
        self._seen: dict[str, int] = {}
        self.chunks = 0
        self.bytes = 0
        self.samples = 0
        self.records = 0
        self.restarts = 0
        self.estimate_errors = 0
        self.decoder_messages = 0
        self.not_estimated_bytes = 0     # received, left in the link queue at the stop
        self.not_estimated_samples = 0   # decoded, not estimated at the stop
        self.finished = threading.Event()

    # -- control

    def stop(self) -> None:
        """Ask run() to finish: it estimates what it can within drain_timeout_s, then shuts down."""
        self._stop.set()

    @property
    def stopping(self) -> bool:
        """Return True once a stop was asked for."""
        return self._stop.is_set()

    def counters(self) -> dict:
        """Return loop, decoder, link, capture and per-sink counters (sink counters by name)."""
        c: dict = {"chunks": self.chunks, "bytes": self.bytes, "samples": self.samples,
                   "records": self.records, "restarts": self.restarts,
                   "estimate_errors": self.estimate_errors,
                   "not_estimated_bytes": self.not_estimated_bytes,
                   "not_estimated_samples": self.not_estimated_samples}
        c["decoder"] = self.decoder.counters()
        c["link"] = self.link.counters()
        if self.capture is not None:
            c["capture"] = self.capture.counters()
        for s in self.sinks:
            c[f"sink[{s.name}]"] = s.counters()
        return c

    def wait_for(self, predicate: Callable[["LiveLoop"], bool], timeout: float) -> bool:
        """Return True once predicate(loop) holds after some chunk was processed (else on timeout)."""
        with self._progress:
            self._waiting += 1
            try:
                return self._progress.wait_for(lambda: predicate(self) or self.finished.is_set(),
                                               timeout) and predicate(self)
            finally:
                self._waiting -= 1

    def _notify_progress(self) -> None:
        """Wake the threads in wait_for (none: nothing to do, the live path's usual case)."""
        if self._waiting:
            with self._progress:
                self._progress.notify_all()

    # -- the loop

    def run(self) -> LiveSummary:
        """Process chunks until stop(); then shut down within ~1.5 s and return the summary."""
        _live_process_settings(True)
        try:
            return self._run()
        finally:
            _live_process_settings(False)

    def _run(self) -> LiveSummary:
        interrupted = False
        next_log = self._clock() + self.log_interval_s
        next_check = next_status = 0.0
        if self.capture is not None:
            self.capture.start()
        if not self.link.started:
            self.link.start()
        try:
            while not self._stop.is_set():
                if self.estimate_batch is not None:
                    # Everything that arrived meanwhile in one go: a loop that falls behind catches up in larger
                    # batches instead of paying the per-call cost for every chunk.
                    chunks = self.link.take(timeout=0.1)
                    if chunks:
                        self._process_many(chunks)
                else:
                    for chunk in self.link.take(timeout=0.1, limit=1):
                        self._process(chunk)
                now = self._clock()
                if now >= next_check:
                    self._check_health(now)
                    next_check = now + 0.1
                    self._notify_progress()
                if self.status is not None:
                    if now >= next_status:
                        self.status(self)
                        next_status = now + self.status_interval_s
                elif now >= next_log:
                    self.log("fieldvane live: " + format_counters(self.counters()))
                    next_log = now + self.log_interval_s
                if self._counters_asked != self._counters_shown:
                    self._counters_shown = self._counters_asked
                    if self.counters_report is not None:
                        self.counters_report(self, False)
                    else:
                        self.log("fieldvane live: " + format_counters(self.counters()))
        except KeyboardInterrupt:
            interrupted = True
            self._forced = self._signals > 1
        finally:
            summary = self._shutdown(interrupted)
        return summary

    def _process(self, chunk) -> None:
        if chunk.event == EVENT_DATA:
            self.chunks += 1
            self.bytes += len(chunk.data)
        samples = feed_chunk(self.decoder, chunk)
        self._estimate_all(samples, [chunk.host_time_ns] * len(samples))
        self._notify_progress()

    def _process_many(self, chunks) -> None:
        pieces = []
        host_ns: list[int] = []
        many = getattr(self.decoder, "feed_many", None)
        run: list = []              # data chunks in a row: decoded in one call where the decoder can
        for chunk in chunks:
            if chunk.event == EVENT_DATA:
                self.chunks += 1
                self.bytes += len(chunk.data)
                if many is not None:
                    run.append(chunk)
                    continue
            elif run:
                self._decode_run(many, run, pieces, host_ns)
                run = []
            got = feed_chunk(self.decoder, chunk)
            if len(got):
                pieces.append(got)
                host_ns.extend([chunk.host_time_ns] * len(got))
        if run:
            self._decode_run(many, run, pieces, host_ns)
        self._estimate_all(join_samples(pieces), host_ns)
        self._notify_progress()

    @staticmethod
    def _decode_run(many, run: list, pieces: list, host_ns: list[int]) -> None:
        """Decode data chunks in one call; append their samples, and each sample's chunk's receive time."""
        got, counts = many([chunk.data for chunk in run])
        if len(got):
            pieces.append(got)
            for chunk, count in zip(run, counts):
                if count:
                    host_ns.extend([chunk.host_time_ns] * count)

    def _must_pause(self) -> bool:
        if self._deadline is None:
            return self._stop.is_set()
        return self._forced or self._clock() >= self._deadline

    def _estimate_all(self, samples: list[Sample], host_ns: list[int] | None = None) -> None:
        host_ns = [0] * len(samples) if host_ns is None else host_ns
        if self.estimate_batch is not None:
            self._estimate_batches(samples, host_ns)
            return
        for i, sample in enumerate(samples):
            if self._paused_at(samples, host_ns, i):
                return
            self.sample_host_times_ns = host_ns[i:i + 1]
            self.samples += 1
            if sample.restarted:
                self._note_restart(sample.t)
            try:
                record = self.estimate(sample)
            except Exception as exc:          # one bad sample must not end a days-long run
                self.estimate_errors += 1
                if self.estimate_errors <= self.max_logged_errors:
                    self.log(f"fieldvane live: estimate failed at t={sample.t!r}: {exc!r}")
                continue
            self._deliver(record)

    def _estimate_batches(self, samples: list[Sample], host_ns: list[int], size: int = 512) -> None:
        """Estimate samples a batch at a time (the pause is checked between batches)."""
        for start in range(0, len(samples), size):
            if self._paused_at(samples, host_ns, start):
                return
            whole = start == 0 and len(samples) <= size         # the usual batch: no copy of it
            batch = samples if whole else samples[start:start + size]
            self.sample_host_times_ns = host_ns if whole else host_ns[start:start + size]
            self.samples += len(batch)
            for t in restart_times(batch):
                self._note_restart(t)
            try:
                records = self.estimate_batch(batch)
            except Exception as exc:          # a bad batch must not end a days-long run
                self.estimate_errors += len(batch)
                if self.estimate_errors <= self.max_logged_errors * len(batch):
                    self.log(f"fieldvane live: estimate failed at t={batch[0].t!r}..{batch[-1].t!r}: {exc!r}")
                continue
            if isinstance(records, RowBlock):
                self._deliver_block(records)
            else:
                for record in records:
                    self._deliver(record)

    def _paused_at(self, samples: list[Sample], host_ns: list[int], i: int) -> bool:
        """Return True (samples[i:] kept for later) when the loop must pause before sample i."""
        if not self._must_pause():
            return False
        self._leftover.extend(samples[i:])
        self._leftover_ns.extend(host_ns[i:])
        return True

    def _note_restart(self, t: float) -> None:
        """Count and log a sensor restart at sensor time t (s) (the decoder marks the first sample after a sequence reset)."""
        self.restarts += 1
        self.log(f"fieldvane live: the sensor restarted (sequence reset) at t={t!r}; tracking starts afresh")

    def _deliver(self, record) -> None:
        """Count an estimate record and hand it to every sink (None: the sample gave no estimate)."""
        if record is None:
            return
        self.records += 1
        self._last_record, self._last_block = record, None
        for sink in self.sinks:
            sink.emit(record)

    def _deliver_block(self, block: RowBlock) -> None:
        """Count a batch's estimate records and hand the whole block to every sink (one queue entry each)."""
        if not len(block):
            return
        self.records += len(block)
        self._last_block = block
        for sink in self.sinks:
            sink.emit_block(block)

    @property
    def last_record(self) -> Mapping | None:
        """Return the latest estimate record handed to the sinks (a dict), None before the first."""
        if self._last_block is not None:
            return self._last_block[-1]
        return self._last_record

    # -- reporting problems at once (from this thread only)

    def _grew(self, key: str, value: int) -> int:
        """Return how much a counter grew since the last look."""
        before = self._seen.get(key, 0)
        self._seen[key] = value
        return value - before

    def _check_health(self, now: float) -> None:
        link = self.link
        if self._grew("link.disconnects", link.disconnects):
            self.log(f"fieldvane live: link lost ({link.last_error}); reconnecting")
        if self._grew("link.opens", link.opens):
            self.log(f"fieldvane live: link open: {link.url}")
        if self._grew("link.bytes_dropped", link.queue.bytes_dropped) and \
                self._repeat.due("estimator", now):
            self.log(f"fieldvane live: the estimator cannot keep up: {link.queue.bytes_dropped} bytes "
                     "received but not estimated live so far (they are in the capture; replay "
                     "finishes the job)")
        cap = self.capture
        if cap is not None:
            events = cap.events()
            for kind, message in events:
                if kind == "resumed":
                    if self._repeat.due("capture:resumed", now):
                        self.log(f"fieldvane live: {message}; {cap.bytes_lost} raw bytes lost so far")
                elif self._repeat.due("capture:" + kind, now):
                    self.log(f"fieldvane live: CAPTURE PROBLEM: {message} ({cap.bytes_lost} "
                             "raw bytes lost so far)")
            if events:
                self._repeat.due("capture", now)
            if self._grew("capture.lost", cap.bytes_lost) and self._repeat.due("capture", now):
                self.log(f"fieldvane live: CAPTURE PROBLEM: {cap.bytes_lost} raw bytes lost so far "
                         f"({cap.counters()['write_errors']} failed writes)")
        for s in self.sinks:
            errors = self._grew(f"sink.{s.name}.write_errors", s.write_errors)
            if errors and self._repeat.due(f"sink:{s.name}", now):
                self.log(f"fieldvane live: logger {s.name}: write failed ({s.last_error}); "
                         f"{s.write_errors} lines lost so far")
            if self._grew(f"sink.{s.name}.dropped", s.dropped) and self._repeat.due(f"slow:{s.name}", now):
                self.log(f"fieldvane live: logger {s.name} is slow: {s.dropped} records dropped so far")
        message = getattr(self.decoder, "last_error", None)
        if message and message != self._seen.get("decoder.message_text"):
            self._seen["decoder.message_text"] = message
            self.decoder_messages += 1
            if self.decoder_messages <= self.max_logged_errors:
                self.log(f"fieldvane live: input: {message}")

    # -- shutdown

    def _phase(self, step: Callable[[], None]) -> None:
        """Run one shutdown step; a (second) Ctrl-C during it forces the rest to be quick."""
        try:
            step()
        except KeyboardInterrupt:
            self._forced = True

    def _shutdown(self, interrupted: bool) -> LiveSummary:
        self._deadline = self._clock() + self.drain_timeout_s
        self._phase(lambda: self.link.stop(0.5))
        self._phase(self._drain)
        unconfirmed = 0
        files: list[str] = []
        capture_failures: list[str] = []
        if self.capture is not None:
            unconfirmed = self._close_capture()
            files = [str(p) for p in self.capture.writer.files]
            # (the events of the last writes and of the close: the loop no longer looks at them)
            capture_failures = [message for kind, message in self.capture.events() if kind == "failed"]
        self._phase(lambda: close_sinks(self.sinks, 0.0 if self._forced else self.sink_close_timeout_s))
        closed = all(s.join(0.0) for s in self.sinks)      # (asked after: a Ctrl-C may have cut the close short)
        if not closed:
            self.log("fieldvane live: some loggers did not finish writing in time")
        lost = self.capture.bytes_lost if self.capture is not None else 0
        failed = [s.name for s in self.sinks if s.failed]
        summary = LiveSummary(self.counters(), interrupted or self._signals > 0, closed, files,
                              lost, unconfirmed, failed, self._forced, capture_failures)
        if self.counters_report is not None:
            self.counters_report(self, True)
        else:
            self.log(summary.text())
        if self.not_estimated_bytes or self.not_estimated_samples:
            self.log(f"fieldvane live: stopped with {self.not_estimated_samples} samples and "
                     f"{self.not_estimated_bytes} bytes not estimated live; they are in the capture "
                     "(replay it to finish the job)")
        for message in capture_failures:
            self.log(f"fieldvane live: CAPTURE PROBLEM: {message}")
        if lost or unconfirmed:
            extra = f", {unconfirmed} more may be incomplete" if unconfirmed else ""
            self.log(f"fieldvane live: RAW BYTES LOST: {lost} of {self.capture.bytes_in} received "
                     f"bytes are not in the capture{extra}")
        for name in failed:
            sink = next(s for s in self.sinks if s.name == name)
            self.log(f"fieldvane live: logger {name} FAILED ({sink.last_error}): {sink.write_errors} "
                     "lines not written")
        self.finished.set()
        self._notify_progress()
        return summary

    def _drain(self) -> None:
        """Estimate what arrived before the stop until the drain deadline; count the rest."""
        leftover, self._leftover = self._leftover, []
        leftover_ns, self._leftover_ns = self._leftover_ns, []
        self._estimate_all(leftover, leftover_ns)
        while not self._must_pause():
            chunk = self.link.get(timeout=0)
            if chunk is None:
                break
            self._process(chunk)
        self.not_estimated_samples += len(self._leftover)
        self._leftover, self._leftover_ns = [], []
        _chunks, n = self.link.queue.clear()
        self.not_estimated_bytes += n

    def _close_capture(self) -> int:
        """Let the capture write its buffer (Ctrl-C again abandons it); return bytes of uncertain fate."""
        cap = self.capture
        done = False

        def _wait():
            nonlocal done
            if self._forced:
                return
            done = cap.close(0.5)
            if not done:
                self.log(f"fieldvane live: writing the last {cap.buffered_bytes} bytes of the capture "
                         "(Ctrl-C again to abandon them)")
                done = cap.close(self.capture_close_timeout_s)
        self._phase(_wait)
        if done:
            return 0
        in_flight = cap.abandon()
        if cap.join(0.2):
            return 0
        return in_flight

    _signalled = False   # kept for callers that looked at it

    def install_signal_handlers(self) -> Callable[[], None]:
        """Make SIGINT/SIGTERM (and SIGHUP unless ignored) stop the loop cleanly (a second one forces); return a restorer."""
        if threading.current_thread() is not threading.main_thread():
            return lambda: None
        old = {}

        def _handler(signum, frame):
            self._signals += 1
            self._signalled = True
            self._stop.set()
            if self._signals > 1:
                self._forced = True
                if getattr(self.link, "consumer_reading", False):
                    self.link.interrupt_deferred = True     # raised as soon as the bytes read are handed on
                    return
                raise KeyboardInterrupt

        for sig in (signal.SIGINT, signal.SIGTERM):
            old[sig] = signal.signal(sig, _handler)
        # A closed terminal (an ssh session dropping) stops the run cleanly too, unless the user asked to
        # outlive it (nohup leaves SIGHUP ignored: that choice stands).
        if hasattr(signal, "SIGHUP") and signal.getsignal(signal.SIGHUP) is signal.SIG_DFL:
            old[signal.SIGHUP] = signal.signal(signal.SIGHUP, _handler)
        if hasattr(signal, "SIGUSR1"):                   # `kill -USR1 PID`: the counters now (POSIX only)
            def _asked(signum, frame):
                self._counters_asked += 1
            old[signal.SIGUSR1] = signal.signal(signal.SIGUSR1, _asked)

        def _restore():
            for sig, h in old.items():
                signal.signal(sig, h)
        return _restore


def _describe_listeners(sinks: Sequence[Sink]) -> list[str]:
    """Return one line per TCP logger server saying where it listens (the port tcp:0 picked)."""
    out = []
    for s in sinks:
        if isinstance(s.transport, TcpServerTransport):
            host, port = s.transport.address
            out.append(f"fieldvane live: logger {s.name} listening on {host}:{port}")
    return out


def run_live(url: str, input_format: str, estimate: Estimate, outputs: Iterable,
             capture_dir: str | None = None, *, columns: Sequence[str] | None = None,
             baudrate: int = 115200, log: Callable[[str], None] | None = _stderr,
             log_interval_s: float = 60.0, max_capture_file_bytes: int = 64 * 1024 * 1024,
             capture_buffer_bytes: int = DEFAULT_CAPTURE_BUFFER_BYTES,
             handle_signals: bool = True,
             on_ready: Callable[[LiveLoop], None] | None = None,
             estimate_batch: "EstimateBatch | None" = None,
             status: Callable[[LiveLoop], None] | None = None,
             counters_report: Callable[[LiveLoop, bool], None] | None = None) -> LiveSummary:
    """Run the live loop on a port URL until SIGINT/SIGTERM (or loop.stop()); return the summary.

    outputs are Sinks, `--out` strings or SinkSpecs (opened here, after the capture). The capture folder is created and its first file written before the port is opened, so a
    folder that cannot be written is an InputError (exit 2) before anything is read.
    """
    decoder = make_decoder(input_format, columns, source=url)
    sinks: list[Sink] = []
    capture = None
    outputs = list(outputs)
    try:
        if capture_dir is not None:       # first: a folder that cannot be written stops us here
            meta = {"input_format": input_format, "source": url, "fieldvane": __version__,
                    "wire_format_version": WIRE_VERSION}
            if columns is not None:
                meta["columns"] = list(columns)
            capture = CaptureWriter(capture_dir, meta, max_file_bytes=max_capture_file_bytes)
        for out in outputs:
            sinks.append(out if isinstance(out, Sink) else open_sink(out))
    except BaseException:
        close_sinks(sinks + [o for o in outputs if isinstance(o, Sink) and o not in sinks], 1.0)
        if capture is not None:
            capture.discard()
        raise
    for line in _describe_listeners(sinks):
        (log or (lambda s: None))(line)
    link = SerialLink(url, baudrate=baudrate)
    loop = LiveLoop(link, decoder, estimate, sinks, capture, log=log,
                    log_interval_s=log_interval_s, capture_buffer_bytes=capture_buffer_bytes,
                    estimate_batch=estimate_batch, status=status, counters_report=counters_report)
    restore = loop.install_signal_handlers() if handle_signals else (lambda: None)
    try:
        if on_ready is not None:
            on_ready(loop)
        return loop.run()
    finally:
        restore()


# ---------------------------------------------------------------------------------- replay

def _capture_format(infos, path, input_format: str | None):
    fmt = input_format or (infos[0].metadata.get("input_format") if infos else None)
    if fmt is None:
        raise InputError("the capture does not say its input format; give --input-format binary or csv",
                         str(path))
    return fmt, (infos[0].metadata.get("columns") if infos else None)


def _add(totals: dict, counters: Mapping[str, int]) -> None:
    for k, v in counters.items():
        totals[k] = totals.get(k, 0) + v


def runs_from_capture(path, input_format: str | None = None, columns: Sequence[str] | None = None,
                      *, run_id: str | None = None, counters: dict | None = None,
                      capture_counters: dict | None = None,
                      warnings: list[str] | None = None,
                      host_times: list | None = None) -> Iterator[tuple[str, Iterator[Sample]]]:
    """Yield (run_id, Samples iterator) per run of a capture, each decoded by a fresh decoder as live.

    Give each run a fresh estimator to reproduce each live run exactly (a live run starts with
    a fresh tracker). Consume each run's samples before asking for the next run. When a run's
    samples are exhausted, `counters` (dict) receives the decoder counters summed over runs,
    `capture_counters` the reader's damage counters (CaptureReader.counters) summed, and
    `warnings` (list) one line per damaged or cut file, with its byte offset. run_id: that run only.
    host_times (list): receives the host receive time (ns) of the chunk that completed each sample, in
    sample order, before the sample is yielded (the consumer takes them from the front).
    """
    header_warnings: list[str] = []
    all_infos = capture_files(path, header_warnings)
    if warnings is not None:
        warnings.extend(header_warnings)
    runs: list[str] = []
    for info in all_infos:
        if info.run_id not in runs and (run_id is None or info.run_id == run_id):
            runs.append(info.run_id)
    if not runs:
        raise InputError(f"no capture files of run {run_id}", str(path))
    for run in runs:
        infos = [i for i in all_infos if i.run_id == run]
        fmt, meta_columns = _capture_format(infos, path, input_format)
        decoder = make_decoder(fmt, columns if columns is not None else meta_columns,
                               source=str(path))
        reader = CaptureReader(path, run)
        reader.warnings = [w for w in reader.warnings if w not in header_warnings]

        def samples(decoder=decoder, reader=reader):
            for chunk in reader:
                got = feed_chunk(decoder, chunk)
                if host_times is not None:
                    host_times.extend([chunk.host_time_ns] * len(got))
                yield from got
            if counters is not None:
                _add(counters, decoder.counters())
            if capture_counters is not None:
                _add(capture_counters, reader.counters())
            if warnings is not None:
                warnings.extend(reader.warnings)
        yield run, samples()


def _mark_restart(samples: Iterator[Sample]) -> Iterator[Sample]:
    """Yield samples with the first one marked `restarted` (a new run starts there)."""
    first = True
    for sample in samples:
        if first:
            sample = dataclasses.replace(sample, restarted=True)
            first = False
        yield sample


def frames_from_capture(path, input_format: str | None = None,
                        columns: Sequence[str] | None = None, run_id: str | None = None,
                        counters: dict | None = None, *, capture_counters: dict | None = None,
                        warnings: list[str] | None = None) -> Iterator[Sample]:
    """Yield the Samples of a capture file or folder, decoded exactly as the live loop did.

    input_format and columns default to what the capture's metadata recorded. Each run gets a
    fresh decoder, as it had live; the first sample of every run after the first is marked
    `restarted` (a tracker fed all runs in one go starts afresh there). If `counters` is a dict,
    it receives the decoder counters (summed over runs) when the iteration ends;
    `capture_counters` and `warnings` as in runs_from_capture.
    """
    totals: dict[str, int] = {}
    for k, (_run, samples) in enumerate(runs_from_capture(
            path, input_format, columns, run_id=run_id, counters=totals,
            capture_counters=capture_counters, warnings=warnings)):
        yield from (_mark_restart(samples) if k else samples)
    if counters is not None:
        counters.update(totals)


def replay_capture(path, estimate: Estimate, sinks: Sequence[Sink],
                   input_format: str | None = None, columns: Sequence[str] | None = None,
                   run_id: str | None = None, *,
                   estimate_for_run: Callable[[str], Estimate] | None = None,
                   warnings: list[str] | None = None) -> dict:
    """Feed a capture through decoder, estimate and sinks as live did; return the counters.

    With estimate_for_run, each run gets its own estimate function (e.g. a fresh tracker), so
    the output equals the live runs' outputs one after the other; otherwise `estimate` sees
    every run, the first sample of each later run marked `restarted`. Sinks are not closed
    here. Replay never drops: it waits for a full sink queue instead (a replay has no deadline).
    """
    decoder_counters: dict = {}
    capture_counters: dict = {}
    samples = records = errors = 0
    for k, (run, run_samples) in enumerate(runs_from_capture(
            path, input_format, columns, run_id=run_id, counters=decoder_counters,
            capture_counters=capture_counters, warnings=warnings)):
        if estimate_for_run is not None:
            step = estimate_for_run(run)
        else:
            step = estimate
            if k:
                run_samples = _mark_restart(run_samples)
        for sample in run_samples:
            samples += 1
            try:
                record = step(sample)
            except Exception:
                errors += 1
                continue
            if record is None:
                continue
            records += 1
            for sink in sinks:
                sink.emit_wait(record, timeout=60.0)
    return {"samples": samples, "records": records, "estimate_errors": errors,
            "decoder": decoder_counters, "capture": capture_counters}


def capture_problem_lines(capture_counters: Mapping[str, int], warnings: Sequence[str],
                          max_warnings: int = 20) -> list[str]:
    """Return 'warning: ...' lines for a replayed capture's damage and live losses (none when clean).

    For replay and tune: pass the `capture_counters` and `warnings` that frames_from_capture /
    runs_from_capture filled; print each line to stderr.
    """
    lines = [f"warning: {w}" for w in list(warnings)[:max_warnings]]
    if len(warnings) > max_warnings:
        lines.append(f"warning: ... and {len(warnings) - max_warnings} more capture warnings")
    c = capture_counters
    problems = []
    if c.get("live_bytes_lost"):
        problems.append(f"{c['live_bytes_lost']} bytes the live run could not store")
    if c.get("truncated_files"):
        problems.append(f"{c['truncated_files']} cut file(s)")
    if c.get("damaged_records"):
        problems.append(f"{c['damaged_records']} damaged record(s)")
    if c.get("bytes_unreadable"):
        problems.append(f"{c['bytes_unreadable']} unreadable bytes")
    if problems:
        lines.append("warning: the capture is incomplete: " + ", ".join(problems)
                     + "; estimates around those places are missing")
    return lines
