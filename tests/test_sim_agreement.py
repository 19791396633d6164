"""The fast response model (response.py) against the time-domain Bloch + lock-in model (lockin.py).

Both solve the same equations with the same parameters: the fast model in closed form to first
order in the modulation, the slow one by direct integration and digital demodulation. Directions
close to a beam axis, where the amplitude vanishes and the phase is undefined, are left out.
"""

from __future__ import annotations

import numpy as np
import pytest

from fieldvane.firmware_sim.lockin import simulate_time_domain
from fieldvane.firmware_sim.response import response
from fieldvane.firmware_sim.sensor import default_config

MAX_PHASE_DEG = 0.25     # aim of the brief: ~1 degree
MAX_AMPLITUDE_PCT = 0.5  # aim of the brief: ~2 %


def _fibonacci(n):
    k = np.arange(n) + 0.5
    z = 1.0 - 2.0 * k / n
    phi = np.pi * (1.0 + 5.0 ** 0.5) * k
    r = np.sqrt(1.0 - z * z)
    return np.stack([r * np.cos(phi), r * np.sin(phi), z], axis=1)


def _away_from_beams(cfg, u, n_keep, limit=0.25):
    """Keep directions where every channel's |p x u||q x u| exceeds limit."""
    pumps, probes = cfg.pump_array(), cfg.probe_array()
    amp = np.ones(u.shape[0])
    for ch in cfg.channels:
        p, q = pumps["ab".index(ch[1])], probes[int(ch[0]) - 1]
        amp = np.minimum(amp, np.linalg.norm(np.cross(p, u), axis=1) * np.linalg.norm(np.cross(q, u), axis=1))
    return u[amp > limit][:n_keep]


CASES = {
    # The nominal sensor with a couple of degrees of beam misalignment.
    "nominal": (default_config(2, misalignment_deg=2.0), [1_000.0, 2_000.0, 5_000.0, 10_000.0, 20_000.0]),
    # Everything turned up: strong exchange, cross-pumping, heading error, unequal pumps, one probe.
    "stressed": (default_config(1, misalignment_deg=4.0, spin_exchange_per_s=2500.0, cross_pumping=0.15,
                                heading_strength=4.0, modulation_depth=0.6, pump_rate_per_s=(300.0, 150.0),
                                relaxation_per_s=(250.0, 350.0), probe_weight=(0.5, -0.3),
                                handedness=(1, -1)),
                 [1_000.0, 3_000.0, 20_000.0]),
}


@pytest.fixture(scope="module", params=sorted(CASES))
def compared(request):
    cfg, fields = CASES[request.param]
    u0 = _away_from_beams(cfg, _fibonacci(60), 25)
    u = np.tile(u0, (len(fields), 1))
    b = np.repeat(np.array(fields), u0.shape[0])
    z_slow = simulate_time_domain(cfg, u, b, settle_s=0.008, average_s=0.004)
    f, z_fast = response(cfg, u, b)
    return request.param, cfg, u, b, z_slow, z_fast


def test_fast_model_matches_time_domain(compared):
    name, cfg, u, b, z_slow, z_fast = compared
    dphi = np.degrees(np.abs(np.angle(z_fast / z_slow)))
    damp = 100.0 * np.abs(np.abs(z_fast) / np.abs(z_slow) - 1.0)
    per_field = ", ".join(f"{bb / 1000:g} uT: {dphi[b == bb].max():.3f} deg / {damp[b == bb].max():.3f} %"
                          for bb in np.unique(b))
    msg = (f"{name}: max phase difference {dphi.max():.3f} deg, max amplitude difference "
           f"{damp.max():.3f} % over {u.shape[0] // np.unique(b).size} directions ({per_field})")
    print(msg)
    assert dphi.max() < MAX_PHASE_DEG and damp.max() < MAX_AMPLITUDE_PCT, msg


def test_comparison_is_sensitive_to_the_coupling(compared):
    # The agreement above means something only if a wrong model would fail it: dropping the
    # exchange coupling from the fast model must put it visibly off the time-domain result at 1 uT.
    name, cfg, u, b, z_slow, _ = compared
    low = b == b.min()
    _, z_wrong = response(cfg.replace(spin_exchange_per_s=0.0), u[low], b[low])
    dphi = np.degrees(np.abs(np.angle(z_wrong / z_slow[low])))
    assert dphi.max() > 10 * MAX_PHASE_DEG, f"{name}: uncoupled model only {dphi.max():.3f} deg off"
