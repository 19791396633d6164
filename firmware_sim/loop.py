"""The pumps' frequency loops: the modulation frequency each loop sets and reports (f_a, f_b).

'exact' loops report gamma * |B| (an idealization kept for the original tests). 'locked' loops sit
on the resonance of their isotope's upper-level mode as the cell really has it: the precession
rate |Omega| including the light shift and the heading shift (kappa times the longitudinal
polarization, which depends on the pump-field angle), then pulled by spin exchange. The two
upper levels form the coupled-mode pair (docs/references.md, 'Two isotopes coupled by spin exchange')

    d beta_i / dt = (i W_i - G_i) beta_i + k_i beta_other

and each loop reports the imaginary part of the eigenvalue that belongs to its isotope (the one
nearer i W_i - G_i); with a frequency gap dw >> k the pull is about k_0 k_1 / dw, away from the
other line, so it grows as the field falls. The lower hyperfine level is not followed by a loop.
"""

from __future__ import annotations

import numpy as np

from .cell import CellRates, longitudinal_polarization
from .sensor import SensorConfig


def precession_rate(cell: CellRates) -> np.ndarray:
    """Return |Omega_i| of the two upper levels in their mean state, (N, 2) rad/s."""
    p_l = longitudinal_polarization(cell)
    along = 2.0 * np.pi * cell.b_nT[:, None] * cell.gamma[None, :2] - cell.kappa[:, :2] * p_l
    omega = along[:, :, None] * cell.u[:, None, :]
    omega = omega + np.einsum("nsj,jc->nsc", cell.light_rate()[:, :2, :], cell.pumps)
    return np.sqrt(np.sum(omega * omega, axis=2))


def locked_hz(cell: CellRates) -> np.ndarray:
    """Return the resonance frequency (N, 2) in Hz of each isotope's exchange-coupled upper-level mode."""
    w = precession_rate(cell)
    a = 1j * w - cell.damping()
    k0, k1 = cell.exchange
    mean = 0.5 * (a[:, 0] + a[:, 1])
    root = np.sqrt((0.5 * (a[:, 0] - a[:, 1])) ** 2 + k0 * k1)
    lam = np.stack([mean + root, mean - root], axis=1)
    first_is_0 = np.abs(lam[:, 0] - a[:, 0]) <= np.abs(lam[:, 1] - a[:, 0])
    mode0 = np.where(first_is_0, lam[:, 0], lam[:, 1])
    mode1 = np.where(first_is_0, lam[:, 1], lam[:, 0])
    return np.stack([mode0.imag, mode1.imag], axis=1) / (2.0 * np.pi)


def modulation_hz(config: SensorConfig, cell: CellRates) -> np.ndarray:
    """Return the pumps' modulation frequencies (N, 2) in Hz as the loops set (and report) them."""
    if config.frequency_loop == "locked":
        return locked_hz(cell)
    return cell.b_nT[:, None] * config.gamma_hz_per_nt()[None, :]
