"""What the field at a probe says about the bodies: distortion and homogeneity.

At each probe point: H and B of the total field, B_applied = mu0 H_applied of
the sources alone, dB = B - B_applied (the field of the magnetised bodies) and
the relative distortion |dB| / |B_applied| in ppm (parts per million).

Over the points of a probe (the region it samples):
  max_abs_B                  T    largest |B|
  max_dB                     T    largest |dB|
  max_distortion_ppm         ppm  largest |dB| / |B_applied|; None when the
                                  applied field vanishes at a point
  homogeneity_ppm            ppm  peak-to-peak of |B|, (max - min) / mean |B|
  component_homogeneity_ppm  ppm  peak-to-peak of B_x, B_y, B_z, each over the
                                  same mean |B| (a transverse component of a
                                  homogeneous field has no useful mean of its own)
Points where the field is not finite (on a current filament) are left out of
the metrics and counted in `nonfinite`.
"""
from __future__ import annotations

import numpy as np

from .sources import total_source_field
from .units import MU0

PPM = 1e6

#: Region metrics: name -> (number of components, SI unit).
METRICS = {"max_abs_B": (0, "T"), "max_dB": (0, "T"), "max_distortion_ppm": (0, "ppm"),
           "homogeneity_ppm": (0, "ppm"), "component_homogeneity_ppm": (1, "ppm")}


def probe_fields(points, sources, solution=None) -> dict:
    """Fields at `points` (n, 3) m: a dict of (n, 3) arrays points (m), H
    (A/m), B, B_applied, dB (T) and the (n,) array distortion_ppm (nan where
    |B_applied| = 0). `solution` None means nothing is magnetised (B = B_applied)."""
    pts = np.atleast_2d(np.asarray(points, float))
    Ha = total_source_field(sources, pts)
    H, B = solution.field(pts) if solution is not None else (Ha, MU0 * Ha)
    Ba = MU0 * Ha
    dB = B - Ba
    ref = np.linalg.norm(Ba, axis=1)
    with np.errstate(divide="ignore", invalid="ignore"):
        ppm = np.where(ref > 0, PPM * np.linalg.norm(dB, axis=1) / ref, np.nan)
    return {"points": pts, "H": H, "B": B, "B_applied": Ba, "dB": dB, "distortion_ppm": ppm}


def region_metrics(f: dict) -> dict:
    """The METRICS of the per-point fields `f` (:func:`probe_fields`) as plain
    floats (component_homogeneity_ppm a list of 3), and `nonfinite`, the
    number of points left out. All None when no point has a finite field."""
    ok = np.all(np.isfinite(f["B"]) & np.isfinite(f["B_applied"]), axis=1)
    out = dict.fromkeys(METRICS)
    out["nonfinite"] = int((~ok).sum())
    if not ok.any():
        return out
    B, dB = f["B"][ok], f["dB"][ok]
    absB = np.linalg.norm(B, axis=1)
    out["max_abs_B"] = float(absB.max())
    out["max_dB"] = float(np.linalg.norm(dB, axis=1).max())
    ppm = f["distortion_ppm"][ok]
    out["max_distortion_ppm"] = None if np.isnan(ppm).any() else float(ppm.max())
    mean = absB.mean()
    if mean > 0:
        out["homogeneity_ppm"] = float(PPM * np.ptp(absB) / mean)
        out["component_homogeneity_ppm"] = (PPM * np.ptp(B, axis=0) / mean).tolist()
    return out
