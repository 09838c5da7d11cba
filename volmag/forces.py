"""Forces and torques on bodies from the solved magnetisation.

Charge (Coulombian) model: the magnetisation of a body is equivalent to
surface charges sigma (A/m) on its element faces, and the force on it is
F = mu0 sum_f sigma_f int_f H_other dS, where H_other is the field of
everything but the body itself (the applied field and the charges of the
other bodies); a body exerts no net force or torque on itself. The torque
about a point r0 is T = mu0 sum_f sigma_f int_f (r - r0) x H_other dS
(e.g. Furlani, Permanent Magnet and Electromechanical Devices, Academic
Press 2001, ch. 3). Face integrals use Radon's degree-5 rule. The result is
as accurate as the discrete magnetisation; the field of the other bodies is
evaluated exactly for it.

CAUTION: forces between magnets and steel can be large and sudden: pinching,
crushing and flying-object hazards; people with implanted medical devices
must keep away from strong fields. Follow local codes and licensed practice.
The wording shown to users lives in volmag.cautions.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from . import kernels
from .post import charged_faces
from .sources import total_source_field
from .units import MU0


@dataclass(frozen=True)
class ForceResult:
    """Force (N) and torque (N m, about `about`, m) on one body."""
    body: str
    force: np.ndarray
    torque: np.ndarray
    about: np.ndarray


def body_forces(solution, body: str, about=None) -> ForceResult:
    """Force and torque on `body` from the applied field and all other bodies.
    `about` (m): the torque reference point; default the body's centroid."""
    model = solution.model
    mesh = model.mesh
    i = model.body_index(body)
    own = mesh.body_id == i
    mine = mesh.subset(own)
    tris, sigma = charged_faces(mine, solution.M[own])
    if about is None:
        vol = mesh.volumes()[own]
        about = vol @ mesh.centroids()[own] / vol.sum()
    about = np.asarray(about, float)
    rule_p, rule_w = kernels.TRI_RULE_POINTS, kernels.TRI_RULE_WEIGHTS
    area = 0.5 * np.linalg.norm(np.cross(tris[:, 1] - tris[:, 0], tris[:, 2] - tris[:, 0]), axis=1)
    pts = np.einsum("qk,fkd->fqd", rule_p, tris).reshape(-1, 3)
    weight = (sigma[:, None] * area[:, None] * rule_w[None, :]).ravel()
    H = total_source_field(solution.sources, pts)
    if np.any(~own):
        other = mesh.subset(~own)
        otris, osigma = charged_faces(other, solution.M[~own])
        if len(osigma):
            H += kernels.face_field_at_points(pts, np.ascontiguousarray(otris), osigma)
    F = MU0 * weight @ H
    T = MU0 * weight @ np.cross(pts - about, H)
    return ForceResult(body, F, T, about)
