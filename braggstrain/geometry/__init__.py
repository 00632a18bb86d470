"""Geometry: the crystal (lattice, orientation, reflections) and the instrument
(diffractometer circles, detector, pixel Q, Bragg angles)."""
