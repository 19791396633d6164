"""Fisher information and Cramer-Rao bound of the field direction on the tangent plane of the sphere.

The measurement is the real vector [X_c, Y_c, ...] of the calibrated model plus white Gaussian
noise of std sigma_c on X_c and on Y_c. The direction is parametrised by a tangent step
d = d1*e1 + d2*e2 (radians) at u, with (e1, e2) from `sphere.tangent_basis(u)`, so every 2x2 matrix
here is expressed in that basis. With `gain_free=True` each probe's common gain is an unknown
nuisance: a real log-gain g_p with dZ_c/dg_p = Z_c on every channel of probe p, eliminated by the
Schur complement, so only amplitude ratios and phases inform the direction.
"""

from __future__ import annotations

import numpy as np

from fieldvane.estimator.samples import channel_probe
from fieldvane.estimator.sphere import tangent_basis

# Below this relative determinant a 2x2 information matrix is treated as singular (bound = inf).
SINGULAR_RTOL = 1e-12


def channel_selection(channels, probes=None) -> np.ndarray:
    """Return the indices of the channels read by the given probes (all channels when probes is None)."""
    channels = tuple(channels)
    if probes is None:
        return np.arange(len(channels))
    wanted = {int(p) for p in np.atleast_1d(probes)}
    idx = np.array([k for k, ch in enumerate(channels) if channel_probe(ch) in wanted], dtype=int)
    if idx.size == 0:
        raise ValueError(f"no channel of probe(s) {sorted(wanted)} among {channels}")
    return idx


def probe_groups(channels) -> tuple[np.ndarray, np.ndarray]:
    """Return (probe numbers (P,), membership (C, P) 0/1 matrix) of the channels' probes."""
    probes = sorted({channel_probe(ch) for ch in channels})
    member = np.array([[1.0 if channel_probe(ch) == p else 0.0 for p in probes] for ch in channels])
    return np.array(probes, dtype=int), member.reshape(len(tuple(channels)), len(probes))


def tangent_jacobian(model, u: np.ndarray, b_nT) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Return (Z (N,C), dZ/dd (N,C,2) V/rad along (e1,e2), e1 (N,3), e2 (N,3)) at unit u (N,3), |B| nT."""
    u = np.atleast_2d(np.asarray(u, float))
    z, dz = model.h_and_jacobian(u, b_nT)
    e1, e2 = tangent_basis(u)
    jac = np.stack([np.einsum("nck,nk->nc", dz, e1), np.einsum("nck,nk->nc", dz, e2)], axis=-1)
    return z, jac, e1, e2


def information_from_jacobian(z: np.ndarray, jac: np.ndarray, noise_std: np.ndarray,
                              member: np.ndarray | None = None) -> np.ndarray:
    """Return the 2x2 direction information (N,2,2), 1/rad^2, gains eliminated when `member` (C,P) is given."""
    w = 1.0 / np.asarray(noise_std, float) ** 2                      # (C,)
    # Re(conj(a) b) summed over channels is the real inner product of [X, Y] vectors.
    info = np.einsum("nci,ncj,c->nij", jac.conj(), jac, w).real
    if member is None:
        return info
    # Nuisance block: F_gg is diagonal because each log-gain acts on a disjoint set of channels.
    f_gg = np.einsum("nc,c,cp->np", np.abs(z) ** 2, w, member)        # (N, P)
    f_dg = np.einsum("nci,nc,c,cp->nip", jac.conj(), z, w, member).real  # (N, 2, P)
    safe = np.where(f_gg > 0, f_gg, 1.0)
    correction = np.einsum("nip,njp,np->nij", f_dg, f_dg, np.where(f_gg > 0, 1.0 / safe, 0.0))
    return info - correction


def fisher_information(model, u: np.ndarray, b_nT, probes=None, gain_free: bool = False,
                       noise_std=None) -> np.ndarray:
    """Return the direction Fisher information (N,2,2) in 1/rad^2 on the (e1,e2) tangent basis at u (N,3).

    probes: None for every channel, else the probe numbers whose channels are used. noise_std
    overrides the model's per-channel std of X and Y (scalar or (C,), V).
    """
    idx = channel_selection(model.channels, probes)
    z, jac, _, _ = tangent_jacobian(model, u, b_nT)
    noise = model.noise_std if noise_std is None else np.broadcast_to(
        np.asarray(noise_std, float), (model.n_channels,))
    channels = [model.channels[k] for k in idx]
    member = probe_groups(channels)[1] if gain_free else None
    return information_from_jacobian(z[:, idx], jac[:, idx], noise[idx], member)


def invert_2x2(info: np.ndarray) -> np.ndarray:
    """Return the inverse of symmetric 2x2 matrices (N,2,2); singular ones give +inf on the diagonal."""
    a, b, d = info[..., 0, 0], 0.5 * (info[..., 0, 1] + info[..., 1, 0]), info[..., 1, 1]
    det = a * d - b * b
    scale = np.maximum(np.abs(a) + np.abs(d), 1e-300)
    singular = ~(det > SINGULAR_RTOL * scale * scale)
    safe = np.where(singular, 1.0, det)
    out = np.stack([np.stack([d, -b], -1), np.stack([-b, a], -1)], -2) / safe[..., None, None]
    out[singular] = np.array([[np.inf, 0.0], [0.0, np.inf]])
    return out


def crlb_covariance(model, u: np.ndarray, b_nT, probes=None, gain_free: bool = False,
                    noise_std=None) -> np.ndarray:
    """Return the CRLB covariance (N,2,2) of the tangent direction error, rad^2, basis (e1,e2) at u."""
    return invert_2x2(fisher_information(model, u, b_nT, probes, gain_free, noise_std))


def sigma_deg_from_covariance(cov: np.ndarray) -> np.ndarray:
    """Return sqrt(trace(cov)) in degrees from tangent covariances (N,2,2) in rad^2."""
    return np.degrees(np.sqrt(cov[..., 0, 0] + cov[..., 1, 1]))


def crlb_deg(model, u: np.ndarray, b_nT, probes=None, gain_free: bool = False, noise_std=None) -> np.ndarray:
    """Return the total 1-sigma direction bound sqrt(trace CRLB) (N,), degrees, at unit u (N,3)."""
    return sigma_deg_from_covariance(crlb_covariance(model, u, b_nT, probes, gain_free, noise_std))
