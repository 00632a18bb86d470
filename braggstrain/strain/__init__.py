"""From reconstructions to strain: the sample frame, phase fields of one
reflection, registration of several, the strain tensor and the mean lattice."""
