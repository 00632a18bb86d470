"""Dislocations: phase vortices, line tracing, Burgers vectors and character."""
