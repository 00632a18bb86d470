"""The simulator (forward model of rocking scans) and the demo's comparison
with the truth."""
