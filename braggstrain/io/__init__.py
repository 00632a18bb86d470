"""Files: scan files and frame stacks, checkpoints, the results file, VTK and
dislocation tables; every write is atomic."""
