"""The instrument: a diffractometer with any sample and detector circles and a
flat area detector.

One object per physical thing: :class:`Detector` and :class:`Diffractometer`
are made once (from the pipeline file or a scan file) and then asked:

* :meth:`Diffractometer.pixel_q` — Q of every pixel for per-frame angles, in
  the sample or the lab frame (xrayutilities' ``QConversion`` is the engine);
* :meth:`Diffractometer.solve_bragg` — circle angles that put a G in the
  Bragg condition on a chosen pixel (the one solver of
  :mod:`braggstrain.geometry.bragg`);
* :meth:`Diffractometer.linear_map` — the local linear map from (frame, row,
  column) steps to q steps at the peak.

Conventions (docs/design.md): lab frame right-handed, y along the incident beam,
z up. Circle axes are written ``"x+"``, ``"y-"``, ``"z+"``…: the rotation
axis and its sense (``+`` right-handed about the axis, ``-`` left-handed).
Circles are listed outermost first (the mounting order), so for a vector v
fixed in the sample frame the lab vector is R₁·R₂·…·Rₙ·v. Angles are degrees
at the interface and radians inside. The detector's distance and pixel size
are in metres (beamline practice; only their ratio enters Q).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Mapping

import numpy as np

from braggstrain.geometry.crystal import wavelength
from braggstrain.geometry.rotation import axis_rotation, axis_vector, rotation_about
from braggstrain.errors import GeometryError, InputError

__all__ = ["Circle", "Detector", "Diffractometer"]

def _check_axis(spec, where):
    try:
        axis_vector(spec)
    except InputError:
        raise InputError(f"{where}: axis '{spec}': expected one of x+, x-, y+, y-, z+, z-") from None
    return spec


@dataclass(frozen=True)
class Circle:
    """One diffractometer circle: its name, rotation axis with sense, limits (degrees)."""

    name: str
    axis: str
    limits: tuple = (-180.0, 180.0)

    def __post_init__(self):
        _check_axis(self.axis, f"circle '{self.name}'")
        lo, hi = self.limits
        if not lo < hi:
            raise InputError(f"circle '{self.name}': limits {self.limits}: expected lower < upper (degrees)")


@dataclass(frozen=True)
class Detector:
    """A flat area detector.

    Parameters
    ----------
    shape : (rows, columns)
    pixel_size : (row pitch, column pitch), metres
    distance : sample–detector distance, metres
    direct_beam : (row, column) pixel hit by the direct beam at zero detector angles
    row_direction, column_direction : lab axes along which the row and column
        indices grow at zero detector angles (default "z-": rows run down;
        "x+": columns run along +x)
    rotation_deg : in-plane rotation of the detector about the beam, degrees
    gaps : list of (axis, start, stop): rows (axis 0) or columns (axis 1) with
        no sensor, masked
    """

    shape: tuple = (256, 256)
    pixel_size: tuple = (75e-6, 75e-6)
    distance: float = 1.0
    direct_beam: tuple = (128.0, 128.0)
    row_direction: str = "z-"
    column_direction: str = "x+"
    rotation_deg: float = 0.0
    gaps: tuple = ()

    def __post_init__(self):
        if len(self.shape) != 2 or min(self.shape) < 1:
            raise InputError(f"detector.shape: expected (rows, columns), got {self.shape}")
        ps = tuple(np.broadcast_to(np.asarray(self.pixel_size, float), (2,)))
        object.__setattr__(self, "pixel_size", ps)
        if min(ps) <= 0 or self.distance <= 0:
            raise InputError("detector: pixel_size and distance must be positive (metres)")
        _check_axis(self.row_direction, "detector.row_direction")
        _check_axis(self.column_direction, "detector.column_direction")
        if self.row_direction[0] == self.column_direction[0]:
            raise InputError("detector: row_direction and column_direction must be different axes")

    def gap_mask(self):
        """Bool mask (rows, columns), True on the detector's gaps."""
        m = np.zeros(self.shape, dtype=bool)
        for axis, start, stop in self.gaps:
            if axis == 0:
                m[int(start):int(stop), :] = True
            else:
                m[:, int(start):int(stop)] = True
        return m

    def region(self, first_row, first_column, shape):
        """The detector seen through a region of interest.

        Frames stored as a region of ``shape`` (rows, columns) whose first
        pixel is the full detector's (``first_row``, ``first_column``): the
        region's pixel (i, j) is the full detector's (first_row + i,
        first_column + j), so the returned detector has the same geometry with
        the direct beam and the gaps given in the region's indices.

        Raises
        ------
        InputError
            when the region does not lie on the detector.
        """
        r0, c0 = int(first_row), int(first_column)
        nr, nc = int(shape[0]), int(shape[1])
        if r0 < 0 or c0 < 0 or r0 + nr > self.shape[0] or c0 + nc > self.shape[1]:
            raise InputError(f"detector region of interest: rows [{r0}, {r0 + nr}) and columns [{c0}, {c0 + nc}) "
                             f"expected inside the {self.shape[0]} × {self.shape[1]} detector")
        gaps = []
        for axis, start, stop in self.gaps:
            off, n = (r0, nr) if int(axis) == 0 else (c0, nc)
            a, b = max(int(start) - off, 0), min(int(stop) - off, n)
            if a < b:
                gaps.append((int(axis), a, b))
        from dataclasses import replace

        return replace(self, shape=(nr, nc), direct_beam=(self.direct_beam[0] - r0, self.direct_beam[1] - c0),
                       gaps=tuple(gaps))

    def to_dict(self):
        return {
            "shape": list(self.shape), "pixel_size": list(self.pixel_size), "distance": self.distance,
            "direct_beam": list(self.direct_beam), "row_direction": self.row_direction,
            "column_direction": self.column_direction, "rotation_deg": self.rotation_deg,
            "gaps": [list(g) for g in self.gaps],
        }


class Diffractometer:
    """A diffractometer: sample circles, detector circles, beam, energy, detector.

    Parameters
    ----------
    sample_circles, detector_circles : sequences of :class:`Circle` (or
        (name, axis) pairs), outermost first
    detector : :class:`Detector`
    energy_kev : photon energy, keV
    beam : incident beam direction in the lab frame (default +y)
    """

    def __init__(self, sample_circles, detector_circles, detector, energy_kev, beam="y+"):
        self.sample_circles = [c if isinstance(c, Circle) else Circle(*c) for c in sample_circles]
        self.detector_circles = [c if isinstance(c, Circle) else Circle(*c) for c in detector_circles]
        names = [c.name for c in self.circles]
        dup = {n for n in names if names.count(n) > 1}
        if dup:
            raise InputError(f"instrument: circle names must be unique, repeated: {sorted(dup)}")
        if not self.sample_circles:
            raise InputError("instrument.sample_circles: expected at least one sample circle")
        self.detector = detector
        self.energy_kev = float(energy_kev)
        wavelength(self.energy_kev)  # validates
        self.beam = _check_axis(beam, "instrument.beam")
        if self.beam[0] in (detector.row_direction[0], detector.column_direction[0]):
            raise InputError("detector: row and column directions must be perpendicular to the beam")

    # -- basics ---------------------------------------------------------
    @property
    def circles(self):
        return [*self.sample_circles, *self.detector_circles]

    @property
    def wavelength(self):
        """Wavelength, Å."""
        return float(wavelength(self.energy_kev))

    @property
    def k(self):
        """Wave number 2π/λ, Å⁻¹."""
        return 2 * np.pi / self.wavelength

    def circle(self, name):
        for c in self.circles:
            if c.name == name:
                return c
        raise InputError(f"circle '{name}': not a circle of this instrument (known: {[c.name for c in self.circles]})")

    def _angles(self, angles, n_frames=None):
        """Angles dict (degrees) → list of arrays in circle order (degrees)."""
        if not isinstance(angles, Mapping):
            raise InputError("angles: expected a mapping circle name → degrees")
        unknown = set(angles) - {c.name for c in self.circles}
        if unknown:
            raise InputError(f"angles: unknown circle(s) {sorted(unknown)}; known: {[c.name for c in self.circles]}")
        out = []
        for c in self.circles:
            if c.name not in angles:
                raise InputError(f"angles: missing circle '{c.name}'")
            a = np.asarray(angles[c.name], dtype=float)
            if not np.all(np.isfinite(a)):
                raise InputError(f"angles: circle '{c.name}' has non-finite values")
            out.append(a)
        return out

    def sample_rotation(self, angles):
        """R_s (lab ← sample) for the sample circles' angles (degrees), shape (..., 3, 3)."""
        vals = self._angles(angles)[: len(self.sample_circles)]
        R = None
        for c, a in zip(self.sample_circles, vals):
            Ri = axis_rotation(c.axis, np.radians(a))
            R = Ri if R is None else R @ Ri
        return R

    def detector_rotation(self, angles):
        """R_d for the detector circles' angles (degrees), shape (..., 3, 3)."""
        vals = self._angles(angles)[len(self.sample_circles):]
        R = np.eye(3)
        for c, a in zip(self.detector_circles, vals):
            R = R @ axis_rotation(c.axis, np.radians(a))
        return R

    # -- Q of pixels ----------------------------------------------------
    def _qconversion(self):
        import xrayutilities as xu

        d = self.detector
        qc = xu.experiment.QConversion([c.axis for c in self.sample_circles],
                                       [c.axis for c in self.detector_circles],
                                       list(axis_vector(self.beam)), en=self.energy_kev * 1000.0)
        qc.init_area(d.row_direction, d.column_direction, cch1=float(d.direct_beam[0]),
                     cch2=float(d.direct_beam[1]), Nch1=int(d.shape[0]), Nch2=int(d.shape[1]),
                     distance=float(d.distance), pwidth1=float(d.pixel_size[0]),
                     pwidth2=float(d.pixel_size[1]), detrot=float(d.rotation_deg))
        return qc

    def pixel_q(self, angles, frame="sample", roi=None):
        """Q = k_f − k_i of every pixel, Å⁻¹, via xrayutilities' QConversion.

        Parameters
        ----------
        angles : mapping circle name → degrees (scalar, or one value per frame)
        frame : "sample" (Q in the sample frame, R_sᵀ·Q_lab) or "lab"
        roi : (row0, row1, col0, col1), half-open, optional

        Returns
        -------
        ndarray (3, [frames,] rows, columns), float64
        """
        if frame not in ("sample", "lab"):
            raise InputError(f"frame '{frame}': expected 'sample' or 'lab'")
        vals = self._angles(angles)
        if frame == "lab":
            vals = [np.zeros_like(v) for v in vals[: len(self.sample_circles)]] + vals[len(self.sample_circles):]
        shape = np.broadcast_shapes(*[np.shape(v) for v in vals])
        if len(shape) > 1:
            raise InputError("angles: expected scalars or 1-D arrays (one value per frame)")
        vals = [np.broadcast_to(v, shape).astype(float) if shape else float(v) for v in vals]
        qc = self._qconversion()
        kw = {}
        if roi is not None:
            r0, r1, c0, c1 = (int(v) for v in roi)
            kw["roi"] = (r0, r1, c0, c1)
        qx, qy, qz = qc.area(*vals, **kw)
        return np.stack([qx, qy, qz])

    def pixel_directions(self, rows, cols, detector_angles=None):
        """Unit vectors from the sample to pixel positions (lab frame), own
        computation (no xrayutilities), for given detector angles (degrees,
        mapping name → value)."""
        d = self.detector
        rows = np.asarray(rows, float)
        cols = np.asarray(cols, float)
        e1 = axis_vector(d.row_direction)
        e2 = axis_vector(d.column_direction)
        b = axis_vector(self.beam)
        P = (d.distance * b[:, None] + (rows.ravel() - d.direct_beam[0]) * d.pixel_size[0] * e1[:, None]
             + (cols.ravel() - d.direct_beam[1]) * d.pixel_size[1] * e2[:, None])
        if d.rotation_deg:
            P = rotation_about(b, np.radians(d.rotation_deg)) @ P
        if detector_angles is not None:
            R = np.eye(3)
            for c in self.detector_circles:
                R = R @ axis_rotation(c.axis, np.radians(float(detector_angles[c.name])))
            P = R @ P
        P = P / np.linalg.norm(P, axis=0)
        return P.reshape((3,) + rows.shape)

    def q_lab_of_pixel(self, row, col, detector_angles):
        """Q_lab of one pixel (own computation), Å⁻¹."""
        p = self.pixel_directions(np.array([row]), np.array([col]), detector_angles)[:, 0]
        return self.k * (p - axis_vector(self.beam))

    # -- Bragg condition -------------------------------------------------
    def solve_bragg(self, g_sample, free, fixed=None, pixel=None, starts=64, seed=0):
        """Angles that put G (sample frame, Å⁻¹) in the Bragg condition on a pixel.

        Solved by the project's one Bragg solver
        (:class:`braggstrain.geometry.bragg.BraggSolver`) from random starts.
        With more than three free circles the solutions form a family; each
        setting found is first moved along its family to the point nearest 0°
        (clipped into the limits) within the limits
        (:meth:`~braggstrain.geometry.bragg.BraggSolver.settle`), so neither
        the seed nor round-off can move the answer along the family. Of the
        settings left, the one with the least travel Σ|θ| from 0° is
        returned (ties: the lexicographically smallest angles).

        Parameters
        ----------
        g_sample : 3 floats, Å⁻¹
        free : names of the circles to solve for (three in general: e.g. one
            sample circle and two detector circles, or two sample circles and
            one detector circle when the detector stays in a plane)
        fixed : mapping name → degrees for every other circle (default 0)
        pixel : (row, column) that must see Q = G (default: the direct-beam pixel)
        starts : number of random starting points
        seed : seed of the starting points

        Returns
        -------
        dict name → degrees for every circle

        Raises
        ------
        GeometryError if no solution within the limits reaches |Q − G| < 1e-9 Å⁻¹.
        """
        from braggstrain.geometry.bragg import CONVERGED, BraggSolver

        g = np.asarray(g_sample, float).reshape(3)
        fixed = dict(fixed or {})
        free = list(free)
        for n in [*free, *fixed]:
            self.circle(n)
        if len(set(free) & set(fixed)):
            raise InputError("solve_bragg: a circle is both free and fixed")
        if len(free) < 3:
            raise InputError(f"solve_bragg: free = {free}: expected at least three free circles "
                             f"(the Bragg condition is three equations)")
        if np.linalg.norm(g) > 2 * self.k:
            raise GeometryError(f"|G| = {np.linalg.norm(g):.4f} Å⁻¹ exceeds 2k = {2 * self.k:.4f} Å⁻¹: "
                                f"unreachable at {self.energy_kev:g} keV")
        solver = BraggSolver(self, free=free, fixed_deg=fixed, pixel=pixel)
        X, res, _, _, _ = solver.solve_batch(g[None], starts, seed)
        Xc, ok, _ = solver.in_limits(X)
        good = np.flatnonzero(ok & (res <= CONVERGED))
        if good.size == 0:
            best = float(res.min()) if res.size else np.inf
            raise GeometryError(f"no angles of circles {free} within their limits put G = {np.round(g, 5)} Å⁻¹ "
                                f"in the Bragg condition (best |Q − G| = {best:.2e} Å⁻¹)")
        # every valid setting to the nearest-home point of its branch of the
        # family (more than three free circles), then the least travel
        _, first = np.unique(np.round(np.degrees(Xc[good]), 2), axis=0, return_index=True)
        good = good[first]
        good = good[np.argsort(((Xc[good] - solver.home) ** 2).sum(axis=1), kind="stable")[:16]]
        Xs, res_s, _, _ = solver.settle(np.repeat(g[None], good.size, axis=0), Xc[good])
        Xs, ok_s, _ = solver.in_limits(Xs)
        keep = ok_s & (res_s <= CONVERGED)
        Xs = Xs[keep] if keep.any() else Xc[good]
        travel = np.round(np.degrees(np.abs(Xs - solver.home).sum(axis=1)), 6)
        x = Xs[np.lexsort(np.round(np.degrees(Xs), 6).T[::-1].tolist() + [travel])[0]]
        return {n: float(np.degrees(v)) for n, v in zip(solver.names, x)}

    # -- linear map -------------------------------------------------------
    def linear_map(self, angles, rocking_circle, rocking_step_deg, pixel):
        """Local linear map from (frame, row, column) steps to q steps.

        At the peak (``angles``, degrees, and the peak ``pixel`` (row, col)),
        the q of index offsets n = (Δframe, Δrow, Δcolumn) is ≈ M·n, in the lab
        frame with the sample at the peak angles: q_lab = R_s(peak)·Q_sample.
        Computed with xrayutilities' pixel Q by central differences over ±1
        frame and ±1 pixel.

        Returns
        -------
        M : (3, 3) ndarray, Å⁻¹ per index step; columns are the steps along
            frame, row and column
        q_center : (3,) ndarray, Q_lab (sample at the peak) of the peak pixel
        R_peak : (3, 3) ndarray, R_s at the peak (lab ← sample)
        """
        self.circle(rocking_circle)
        if self.circle(rocking_circle) not in self.sample_circles:
            raise InputError(f"rocking circle '{rocking_circle}': expected a sample circle")
        if not np.isfinite(rocking_step_deg) or rocking_step_deg == 0:
            raise InputError("rocking step: expected a non-zero step in degrees")
        r, c = (int(round(v)) for v in pixel)
        a0 = {k: float(v) for k, v in angles.items()}
        ang = dict(a0)
        ang[rocking_circle] = a0[rocking_circle] + rocking_step_deg * np.array([-1.0, 0.0, 1.0])
        d = self.detector
        r0, r1 = max(r - 1, 0), min(r + 2, d.shape[0])
        c0, c1 = max(c - 1, 0), min(c + 2, d.shape[1])
        if r1 - r0 < 3 or c1 - c0 < 3:
            raise GeometryError(f"peak pixel {pixel} too close to the detector edge for the linear map")
        Q = self.pixel_q(ang, frame="sample", roi=(r0, r1, c0, c1))  # (3, 3 frames, 3, 3)
        Rp = self.sample_rotation(a0)
        Ql = np.einsum("ij,j...->i...", Rp, Q)
        i, j = r - r0, c - c0
        m = np.column_stack([
            (Ql[:, 2, i, j] - Ql[:, 0, i, j]) / 2,
            (Ql[:, 1, i + 1, j] - Ql[:, 1, i - 1, j]) / 2,
            (Ql[:, 1, i, j + 1] - Ql[:, 1, i, j - 1]) / 2,
        ])
        return m, Ql[:, 1, i, j].copy(), Rp

    def to_dict(self):
        return {
            "energy_kev": self.energy_kev, "beam": self.beam,
            "sample_circles": [[c.name, c.axis, list(c.limits)] for c in self.sample_circles],
            "detector_circles": [[c.name, c.axis, list(c.limits)] for c in self.detector_circles],
            "detector": self.detector.to_dict(),
        }

    @classmethod
    def from_dict(cls, d):
        det = dict(d["detector"])
        det["shape"] = tuple(det["shape"])
        det["pixel_size"] = tuple(det["pixel_size"])
        det["direct_beam"] = tuple(det["direct_beam"])
        det["gaps"] = tuple(tuple(g) for g in det.get("gaps", ()))
        return cls([Circle(n, a, tuple(l)) for n, a, l in d["sample_circles"]],
                   [Circle(n, a, tuple(l)) for n, a, l in d["detector_circles"]],
                   Detector(**det), d["energy_kev"], d.get("beam", "y+"))
