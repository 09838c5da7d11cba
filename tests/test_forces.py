"""Forces and torques. A uniformly magnetised sphere's outside field is exactly
a point dipole's (e.g. Jackson, Classical Electrodynamics, 3rd ed., sec. 5.10),
so two rigid magnet spheres interact exactly as point dipoles: on the axis,
F = -3 mu0 m1 m2 / (2 pi d^4) (attractive); a dipole in a uniform field feels
the torque T = mu0 m x H0 and no force."""
import numpy as np

import volmag as vm
from volmag.forces import body_forces
from volmag.materials import PermanentMagnet


def magnet_sphere(name, Br, position):
    return vm.Body(name, vm.Sphere(0.01), PermanentMagnet(name + "-grade", Br, 0.0),
                   placement=vm.Placement(position), mesh=vm.MeshSpec("tet", 0.005, 0.002))


def test_coaxial_magnet_spheres_attract_like_dipoles():
    d = 0.03
    model = vm.Model.build([magnet_sphere("a", (0, 0, 1.0), (0, 0, 0)),
                            magnet_sphere("b", (0, 0, 1.0), (0, 0, d))])
    sol = vm.solve(model, [vm.UniformField((0, 0, 0.0))])
    m1, m2 = sol.moment("a")[2], sol.moment("b")[2]
    ref = -3 * vm.MU0 * m1 * m2 / (2 * np.pi * d ** 4)
    Fb, Fa = body_forces(sol, "b").force, body_forces(sol, "a").force
    assert abs(Fb[2] / ref - 1) < 3e-3, (Fb, ref)
    assert np.allclose(Fa, -Fb, atol=3e-3 * abs(ref))             # Newton's third law
    assert np.abs(Fb[:2]).max() < 1e-3 * abs(ref)


def test_torque_on_magnet_in_uniform_field():
    H0 = np.array([0.0, 0.0, 5e4])
    model = vm.Model.build([magnet_sphere("m", (1.0, 0, 0), (0.1, 0.2, 0.0))])
    sol = vm.solve(model, [vm.UniformField(tuple(H0))])
    res = body_forces(sol, "m")
    ref = vm.MU0 * np.cross(sol.moment("m"), H0)
    assert np.allclose(res.torque, ref, rtol=0, atol=2e-3 * np.abs(ref).max())
    assert np.abs(res.force).max() < 1e-6 * np.abs(ref).max() / 0.01
