"""The fixed per-sample output record of every estimator (snapshot inverse or tracker)."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

# The estimates CSV columns of docs/estimates_columns.md, in order; extra columns follow them.
ESTIMATE_COLUMNS = ("t", "ux", "uy", "uz", "b_nT", "bx_nT", "by_nT", "bz_nT", "sigma_deg", "flags")


@dataclass
class Estimate:
    """One estimate: time (s), unit direction u (sensor frame), |B| (nT), 1-sigma angle (deg), flags."""

    t: float
    u: np.ndarray
    b_nT: float
    sigma_deg: float
    flags: int
    extras: dict[str, float] = field(default_factory=dict)  # nis, b_a_nT, b_b_nT, phases, ...

    def row(self) -> dict[str, float]:
        """Return the estimates CSV row: the fixed columns in order, then the extras."""
        u = np.asarray(self.u, float)
        out = {"t": self.t, "ux": u[0], "uy": u[1], "uz": u[2], "b_nT": self.b_nT,
               "bx_nT": self.b_nT * u[0], "by_nT": self.b_nT * u[1], "bz_nT": self.b_nT * u[2],
               "sigma_deg": self.sigma_deg, "flags": int(self.flags)}
        out.update(self.extras)
        return out
