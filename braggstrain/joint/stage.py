"""The joint stage: from the independent route's results to the joint fit.

:func:`joint_stage` takes what the pipeline has after the tensor stage —
every reflection's prepared scan, the registered reconstructions on the
common grid and the :class:`~braggstrain.strain.tensor.TensorField` — checks
that the reflections can be fitted together, builds each reflection's
measured voxels at their exact Q and the starting point (support, mean
normalised amplitude, displacement), and runs
:func:`~braggstrain.joint.fit.joint_refine`.
"""

from __future__ import annotations

import numpy as np

from braggstrain.joint.fit import JointError, joint_refine
from braggstrain.joint.model import measured_voxels

__all__ = ["joint_stage", "starting_amplitude"]


def starting_amplitude(objects, support):
    """Mean over reflections of |ρ_j| divided by its median inside ``support``."""
    amps = []
    for o in objects:
        a = np.abs(np.nan_to_num(np.asarray(o)))
        med = np.median(a[support]) if np.any(support) else 0.0
        amps.append(a / med if med > 0 else a)
    return np.mean(amps, axis=0)


def joint_stage(prepared, objects, tensor, *, labels, failed=None, q_map="exact", **options):
    """Fit all reflections together, started from the independent route.

    Parameters
    ----------
    prepared : list of PreparedScan
        One per reflection, in the order of ``objects``.
    objects : list of SampleObject
        The registered reconstructions on the common grid (their
        ``g_vector`` is the reflection's G).
    tensor : TensorField
        The independent route's tensor (support and displacement).
    labels : list of str
        Reflection names, for messages.
    failed : dict label → reason, optional
        Reflections whose independent results are unusable (the pipeline
        names them); any of them refuses the stage.
    q_map : "exact" (default) or "linear"
        Where each measured voxel's Q comes from
        (:func:`~braggstrain.joint.model.measured_voxels`).
    options
        Keyword options of :func:`~braggstrain.joint.fit.joint_refine`.

    Returns
    -------
    JointResult

    Raises
    ------
    JointError
        Fewer than three reflections, or a reflection that failed in the
        independent route.
    """
    labels = list(labels)
    if len(objects) < 3:
        raise JointError(f"[joint]: {len(objects)} reflection(s) {labels}; the joint fit needs at least three "
                         f"non-coplanar reflections")
    failed = dict(failed or {})
    if failed:
        why = "; ".join(f"'{k}': {v}" for k, v in failed.items())
        raise JointError(f"[joint]: reflection(s) {sorted(failed)} failed in the independent route ({why}); "
                         f"the joint fit starts from every reflection's result, so it is not run: remove or "
                         f"re-measure these reflections, or set [joint] enabled = false")
    if tensor.displacement is None:
        raise JointError("[joint]: the tensor stage gave no displacement map (tensor.displacement = false?); "
                         "the joint fit starts from it")
    support = np.asarray(tensor.support, bool)
    data = [measured_voxels(p, o.g_vector, name=lab, q_map=q_map) for p, o, lab in zip(prepared, objects, labels)]
    grid = objects[0].grid
    amp = starting_amplitude([o.obj for o in objects], support)
    return joint_refine(data, grid, support, amp, np.asarray(tensor.displacement, float),
                        reference_objects=[o.obj for o in objects], **options)
