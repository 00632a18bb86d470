"""Preparation: raw frames to a phasing-ready array (cleaning, peak and crop,
binning, background) and regridding to an orthogonal q grid."""
