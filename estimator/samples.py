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
    skipped_rows: int = 0                     # malformed rows dropped (counted, never silent)
    lines: np.ndarray | None = None           # (N,) int64 1-based source line of each row (text files)

    def __len__(self) -> int:
        return int(self.t.shape[0])

    def sample(self, i: int) -> Sample:
        """Return row i as a Sample."""
        return Sample(float(self.t[i]), float(self.f[i, 0]), float(self.f[i, 1]), self.z[i],
                      self.channels)

    def __iter__(self):
        for i in range(len(self)):
            yield self.sample(i)
