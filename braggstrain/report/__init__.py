"""Figures, the dislocation figure and the HTML report."""
