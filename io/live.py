"""The live loop: link -> capture (first) -> decoder -> estimate -> sinks, and capture replay.

The loop thread never waits on a logger: sinks queue records and drop (counted) when full. Raw
bytes reach the capture before decoding, so `frames_from_capture` can feed the same bytes, in the
same order, through the same decoder and reproduce the live samples (and estimates) exactly.
"""

from __future__ import annotations

import signal
import sys
import threading
import time
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field

from fieldvane import __version__
from fieldvane.estimator.samples import Sample
from fieldvane.io.capture import CaptureReader, CaptureWriter, capture_files, capture_runs
from fieldvane.io.csv_lines import CsvLineDecoder
from fieldvane.io.errors import InputError
from fieldvane.io.serial_link import SerialLink
from fieldvane.io.sinks import Sink, close_sinks, open_sink
from fieldvane.io.wire import VERSION as WIRE_VERSION
from fieldvane.io.wire import FrameDecoder

INPUT_FORMATS = ("binary", "csv")
Estimate = Callable[[Sample], "Mapping | None"]


class BinarySampleDecoder:
    """FrameDecoder that returns Samples: feed(bytes) -> list[Sample]."""

    def __init__(self, max_encoded_len: int | None = None):
        self.frames = FrameDecoder() if max_encoded_len is None else FrameDecoder(max_encoded_len)

    def feed(self, data: bytes) -> list[Sample]:
        """Return the Samples of the frames completed by data."""
        return [f.to_sample() for f in self.frames.feed(data)]

    def counters(self) -> dict[str, int]:
        """Return the frame decoder's counters."""
        return self.frames.counters()


def make_decoder(input_format: str, columns: Sequence[str] | None = None,
                 source: str = "<serial>"):
    """Return a pure decoder for 'binary' frames or 'csv' lines: feed(bytes) -> list[Sample]."""
    if input_format == "binary":
        return BinarySampleDecoder()
    if input_format == "csv":
        return CsvLineDecoder(columns, source=source)
    raise InputError(f"unknown input format '{input_format}' (use binary or csv)",
                     column="--input")


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
    """What a live run ended with: final counters, whether a signal stopped it, sink shutdown."""

    counters: dict
    interrupted: bool = False
    sinks_closed: bool = True
    capture_files: list[str] = field(default_factory=list)

    def text(self) -> str:
        """Return the final counter summary as one line."""
        return "fieldvane live: final " + format_counters(self.counters)


class LiveLoop:
    """One live pipeline; run() processes link chunks until stop() (or a signal) and shuts down."""

    def __init__(self, link: SerialLink, decoder, estimate: Estimate, sinks: Sequence[Sink],
                 capture: CaptureWriter | None = None, log: Callable[[str], None] | None = _stderr,
                 log_interval_s: float = 60.0, clock: Callable[[], float] = time.monotonic,
                 sink_close_timeout_s: float = 5.0, max_logged_errors: int = 10):
        self.link, self.decoder, self.estimate = link, decoder, estimate
        self.sinks = list(sinks)
        self.capture = capture
        self.log = log or (lambda line: None)
        self.log_interval_s = log_interval_s
        self.sink_close_timeout_s = sink_close_timeout_s
        self.max_logged_errors = max_logged_errors
        self._clock = clock
        self._stop = threading.Event()
        self._progress = threading.Condition()
        self.chunks = 0
        self.bytes = 0
        self.samples = 0
        self.records = 0
        self.estimate_errors = 0
        self.capture_errors = 0
        self.finished = threading.Event()

    def stop(self) -> None:
        """Ask run() to finish: it drains what the link received, then shuts down."""
        self._stop.set()

    def counters(self) -> dict:
        """Return loop, decoder, link, capture and per-sink counters (sink counters by name)."""
        c: dict = {"chunks": self.chunks, "bytes": self.bytes, "samples": self.samples,
                   "records": self.records, "estimate_errors": self.estimate_errors,
                   "capture_errors": self.capture_errors}
        c["decoder"] = self.decoder.counters()
        c["link"] = self.link.counters()
        if self.capture is not None:
            c["capture"] = {"bytes": self.capture.bytes_written,
                            "records": self.capture.records_written,
                            "files": len(self.capture.files)}
        for s in self.sinks:
            c[f"sink[{s.name}]"] = s.counters()
        return c

    def wait_for(self, predicate: Callable[["LiveLoop"], bool], timeout: float) -> bool:
        """Return True once predicate(loop) holds after some chunk was processed (else on timeout)."""
        with self._progress:
            return self._progress.wait_for(lambda: predicate(self) or self.finished.is_set(),
                                           timeout) and predicate(self)

    def run(self) -> LiveSummary:
        """Process chunks until stop(); then drain, close capture and sinks; return the summary."""
        interrupted = False
        next_log = self._clock() + self.log_interval_s
        seen_opens = seen_disconnects = 0
        if not self.link.started:
            self.link.start()
        try:
            while not self._stop.is_set():
                chunk = self.link.get(timeout=0.1)
                if chunk is not None:
                    self._process(chunk)
                elif self.capture is not None:
                    self._flush_capture()       # a quiet link must not leave bytes buffered
                link = self.link
                if link.opens != seen_opens or link.disconnects != seen_disconnects:
                    if link.disconnects != seen_disconnects:
                        self.log(f"fieldvane live: link lost ({link.last_error}); reconnecting")
                    if link.opens != seen_opens:
                        self.log(f"fieldvane live: link open: {link.url}")
                    seen_opens, seen_disconnects = link.opens, link.disconnects
                now = self._clock()
                if now >= next_log:
                    self.log("fieldvane live: " + format_counters(self.counters()))
                    next_log = now + self.log_interval_s
        except KeyboardInterrupt:
            interrupted = True
        finally:
            summary = self._shutdown(interrupted)
        return summary

    def _flush_capture(self) -> None:
        try:
            self.capture.flush()
        except OSError as exc:
            self.capture_errors += 1
            if self.capture_errors <= self.max_logged_errors:
                self.log(f"fieldvane live: capture flush failed: {exc}")

    def _process(self, chunk) -> None:
        if self.capture is not None:
            try:
                self.capture.write(chunk.host_time_ns, chunk.data)
            except (OSError, ValueError) as exc:
                self.capture_errors += 1
                if self.capture_errors <= self.max_logged_errors:
                    self.log(f"fieldvane live: capture write failed: {exc}")
        self.chunks += 1
        self.bytes += len(chunk.data)
        for sample in self.decoder.feed(chunk.data):
            self.samples += 1
            try:
                record = self.estimate(sample)
            except Exception as exc:          # one bad sample must not end a days-long run
                self.estimate_errors += 1
                if self.estimate_errors <= self.max_logged_errors:
                    self.log(f"fieldvane live: estimate failed at t={sample.t!r}: {exc!r}")
                continue
            if record is None:
                continue
            self.records += 1
            for sink in self.sinks:
                sink.emit(record)
        with self._progress:
            self._progress.notify_all()

    def _shutdown(self, interrupted: bool) -> LiveSummary:
        self.link.stop()
        while True:                           # bytes already received still go to capture
            chunk = self.link.get(timeout=0)
            if chunk is None:
                break
            self._process(chunk)
        files = []
        if self.capture is not None:
            try:
                self.capture.close()
            except OSError as exc:
                self.capture_errors += 1
                self.log(f"fieldvane live: capture close failed: {exc}")
            files = [str(p) for p in self.capture.files]
        closed = close_sinks(self.sinks, self.sink_close_timeout_s)
        summary = LiveSummary(self.counters(), interrupted or self._signalled, closed, files)
        if not closed:
            self.log("fieldvane live: some sinks did not finish writing in time")
        self.log(summary.text())
        self.finished.set()
        with self._progress:
            self._progress.notify_all()
        return summary

    _signalled = False

    def install_signal_handlers(self) -> Callable[[], None]:
        """Make SIGINT and SIGTERM stop the loop cleanly; return a function restoring the old ones."""
        if threading.current_thread() is not threading.main_thread():
            return lambda: None
        old = {}

        def _handler(signum, frame):
            self._signalled = True
            self._stop.set()

        for sig in (signal.SIGINT, signal.SIGTERM):
            old[sig] = signal.signal(sig, _handler)

        def _restore():
            for sig, h in old.items():
                signal.signal(sig, h)
        return _restore


def run_live(url: str, input_format: str, estimate: Estimate, outputs: Iterable[str | Sink],
             capture_dir: str | None = None, *, columns: Sequence[str] | None = None,
             baudrate: int = 115200, log: Callable[[str], None] | None = _stderr,
             log_interval_s: float = 60.0, max_capture_file_bytes: int = 64 * 1024 * 1024,
             handle_signals: bool = True,
             on_ready: Callable[[LiveLoop], None] | None = None) -> LiveSummary:
    """Run the live loop on a port URL until SIGINT/SIGTERM (or loop.stop()); return the summary."""
    decoder = make_decoder(input_format, columns, source=url)
    sinks: list[Sink] = []
    capture = None
    try:
        for out in outputs:
            sinks.append(out if isinstance(out, Sink) else open_sink(out))
        if capture_dir is not None:
            meta = {"input_format": input_format, "source": url, "fieldvane": __version__,
                    "wire_format_version": WIRE_VERSION}
            if columns is not None:
                meta["columns"] = list(columns)
            capture = CaptureWriter(capture_dir, meta, max_file_bytes=max_capture_file_bytes)
    except BaseException:
        close_sinks(sinks, 1.0)
        raise
    link = SerialLink(url, baudrate=baudrate)
    loop = LiveLoop(link, decoder, estimate, sinks, capture, log=log,
                    log_interval_s=log_interval_s)
    restore = loop.install_signal_handlers() if handle_signals else (lambda: None)
    try:
        if on_ready is not None:
            on_ready(loop)
        return loop.run()
    finally:
        restore()


def _capture_format(path, input_format: str | None, run_id: str | None):
    infos = [i for i in capture_files(path) if run_id is None or i.run_id == run_id]
    fmt = input_format or (infos[0].metadata.get("input_format") if infos else None)
    if fmt is None:
        raise InputError("the capture does not say its input format; give --input binary or csv",
                         str(path))
    return fmt, (infos[0].metadata.get("columns") if infos else None)


def frames_from_capture(path, input_format: str | None = None,
                        columns: Sequence[str] | None = None, run_id: str | None = None,
                        counters: dict | None = None) -> Iterator[Sample]:
    """Yield the Samples of a capture file or directory, decoded exactly as the live loop did.

    input_format and columns default to what the capture's metadata recorded. Each run gets a
    fresh decoder, as it had live. If `counters` is a dict, it receives the decoder counters
    (summed over runs) when the iteration ends.
    """
    runs = [run_id] if run_id is not None else capture_runs(path)
    totals: dict[str, int] = {}
    for run in runs:
        fmt, meta_columns = _capture_format(path, input_format, run)
        decoder = make_decoder(fmt, columns if columns is not None else meta_columns,
                               source=str(path))
        for chunk in CaptureReader(path, run):
            yield from decoder.feed(chunk.data)
        for k, v in decoder.counters().items():
            totals[k] = totals.get(k, 0) + v
    if counters is not None:
        counters.update(totals)


def replay_capture(path, estimate: Estimate, sinks: Sequence[Sink],
                   input_format: str | None = None, columns: Sequence[str] | None = None,
                   run_id: str | None = None) -> dict:
    """Feed a capture through decoder, estimate and sinks as live did; return the counters.

    Sinks are not closed here (the caller closes them). Replay never drops: it waits for a full
    sink queue instead, since a replay has no real-time deadline.
    """
    decoder_counters: dict = {}
    samples = records = errors = 0
    for sample in frames_from_capture(path, input_format, columns, run_id, decoder_counters):
        samples += 1
        try:
            record = estimate(sample)
        except Exception:
            errors += 1
            continue
        if record is None:
            continue
        records += 1
        for sink in sinks:
            sink.emit_wait(record, timeout=60.0)
    return {"samples": samples, "records": records, "estimate_errors": errors,
            "decoder": decoder_counters}
