"""volmag: magnetised bodies of any shape in applied fields, by a 3D volume
integral method. SI units throughout (lengths m, H and M in A/m, B in T)."""
__version__ = "0.1.0"

from .geometry import (Body, Box, Cut, Cylinder, Ellipsoid, MeshSpec, Placement, Sphere,
                       SurfaceFile, Tube)
from .materials import LinearMaterial
from .post import DemagResult, demag_tensor
from .solve import Model, Solution, SolverError, SolverOptions, solve
from .sources import UniformField
from .units import MU0

__all__ = ["Body", "Box", "Cut", "Cylinder", "Ellipsoid", "MeshSpec", "Placement", "Sphere",
           "SurfaceFile", "Tube", "LinearMaterial", "DemagResult", "demag_tensor", "Model",
           "Solution", "SolverError", "SolverOptions", "solve", "UniformField", "MU0"]
