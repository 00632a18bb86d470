"""Joint refinement of all reflections: one amplitude and one displacement
field, every measured voxel at its exact scattering vector (docs/joint.md)."""

from braggstrain.joint.fit import JointError, JointResult, joint_refine
from braggstrain.joint.model import FarField, MeasuredVoxels, direct_far_field, measured_voxels
from braggstrain.joint.stage import joint_stage

__all__ = ["FarField", "MeasuredVoxels", "measured_voxels", "direct_far_field", "joint_refine", "JointResult",
           "JointError", "joint_stage"]
