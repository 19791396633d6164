"""Plain containers for lock-in samples: what io hands to the estimator."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

# Channel names: probe number then pump letter. Order is fixed everywhere (arrays, frames, CSV).
CHANNELS_ONE_PROBE = ("1a", "1b")
CHANNELS_TWO_PROBES = ("1a", "1b", "2a", "2b")
PUMPS = ("a", "b")


def channel_pump(channel: str) -> str:
    """Return the pump letter ('a' or 'b') that a channel name like '2b' is demodulated at."""
    return channel[1]


def channel_probe(channel: str) -> int:
    """Return the probe number (1 or 2) of a channel name like '2b'."""
    return int(channel[0])


@dataclass(frozen=True)
class Sample:
    """One lock-in sample: time (s), pump modulation frequencies (Hz), complex X+iY per channel."""

    t: float
    f_a: float
    f_b: float
    z: np.ndarray  # complex, one entry per channel in `channels` order (lock-in volts)
    channels: tuple[str, ...] = CHANNELS_TWO_PROBES
    status: int = 0
    restarted: bool = False  # the source restarted just before this sample (sequence reset, new capture run)


@dataclass
class SampleBlock:
    """Many samples as arrays: t (N,) s, f (N, 2) Hz [f_a, f_b], z (N, C) complex X+iY."""

    t: np.ndarray
    f: np.ndarray
    z: np.ndarray
    channels: tuple[str, ...]
    applied_b_nT: np.ndarray | None = None   # (N, 3) applied field, sensor frame (calibration scans)
    truth: dict[str, np.ndarray] = field(default_factory=dict)  # true_ux.. true_b_nT (simulator)
    metadata: dict[str, str] = field(default_factory=dict)      # from '# key: value' comment lines
    skipped_rows: int = 0                     # malformed rows dropped (counted, never silent; a slice has none)
    lines: np.ndarray | None = None           # (N,) int64 1-based source line of each row (text files)
    status: np.ndarray | None = None          # (N,) int64 sensor status bits (wire frames)
    restarted: np.ndarray | None = None       # (N,) bool: the source restarted just before the row

    def __len__(self) -> int:
        return int(self.t.shape[0])

    def sample(self, i: int) -> Sample:
        """Return row i as a Sample (status and restart mark included when the block has them)."""
        return Sample(float(self.t[i]), float(self.f[i, 0]), float(self.f[i, 1]), self.z[i], self.channels,
                      0 if self.status is None else int(self.status[i]),
                      False if self.restarted is None else bool(self.restarted[i]))

    def __iter__(self):
        for i in range(len(self)):
            yield self.sample(i)

    def __getitem__(self, index):
        """Row i as a Sample, or a slice of rows as a SampleBlock (per-row arrays sliced, metadata copied)."""
        if not isinstance(index, slice):
            i = range(len(self))[index]
            return self.sample(i)
        values = {name: _rows(value, index) for name, value in self.__dict__.items()}
        values["skipped_rows"] = 0
        return SampleBlock(**values)

    @classmethod
    def concatenate(cls, blocks: list[SampleBlock]) -> SampleBlock:
        """Return blocks of the same channels as one (per-row arrays joined; metadata of the first)."""
        first = blocks[0]
        if len(blocks) == 1:
            return first
        if any(b.channels != first.channels for b in blocks):
            raise ValueError("blocks of different channels cannot be joined")
        joined = {}
        for name, value in first.__dict__.items():
            if name in _PER_ROW:
                parts = [getattr(b, name) for b in blocks]
                if name in _DEFAULTS and any(p is not None for p in parts):     # status 0, no restart where absent
                    parts = [np.full(len(b), _DEFAULTS[name]) if p is None else p for b, p in zip(blocks, parts)]
                joined[name] = None if any(p is None for p in parts) else np.concatenate(parts)
            elif name == "truth":
                joined[name] = {k: np.concatenate([b.truth[k] for b in blocks]) for k in value
                                if all(k in b.truth for b in blocks)}
            elif name == "skipped_rows":
                joined[name] = sum(b.skipped_rows for b in blocks)
            elif name == "metadata":
                joined[name] = dict(value)
            else:
                joined[name] = value
        return cls(**joined)


_PER_ROW = ("t", "f", "z", "applied_b_nT", "lines", "status", "restarted")
_DEFAULTS = {"status": np.int64(0), "restarted": np.False_}


def _rows(value, index: slice):
    """Return value's rows `index` when it is a per-row array, a dict with per-row arrays sliced (a new dict), or
    value itself."""
    if isinstance(value, np.ndarray):
        return value[index]
    if isinstance(value, dict):
        return {k: v[index] if isinstance(v, np.ndarray) else v for k, v in value.items()}
    return value
