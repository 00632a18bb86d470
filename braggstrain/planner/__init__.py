"""The measurement planner: reachable reflections, the choice of a set, its
figure and pipeline-file fragment."""
