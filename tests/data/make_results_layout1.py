"""Write results_layout1.h5 (see README.md): run with PYTHONPATH at a checkout of commit 27e9039."""
import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))  # tests/, for conftest
from conftest import small_toml
from braggstrain.config import load_config
from braggstrain.simulate.demo import simulate_experiment
from braggstrain.pipeline import run_pipeline

FAST = '''
[prepare]
crop = [20, 20, 20]
min_oversampling = 1.0

[phasing]
runs = 3
keep = 2
seed = 1
[[phasing.plan]]
algorithm = "HIO"
iterations = 200
sigma = [2.0, 1.0]
threshold = 0.15
[[phasing.plan]]
algorithm = "ER"
iterations = 40
update_every = 20
sigma = [1.0, 1.0]
threshold = 0.2

[tensor]
min_overlap = 0.3

[output]
vtk = false
figures = false
report = false
'''
def main():
    d = Path(sys.argv[1] if len(sys.argv) > 1 else "legacy-run")
    d.mkdir(parents=True, exist_ok=True)
    text = small_toml(frames=28, window=28).replace("size_nm = 150.0", "size_nm = 90.0").replace("rocking_q_step = 1.4e-3", "rocking_q_step = 2.4e-3")
    (d / "small.toml").write_text(text + FAST)
    simulate_experiment(load_config(d / "small.toml"), d / "sim", log=None)
    res = run_pipeline(load_config(d / "sim" / "pipeline.toml"), d / "out", progress=False, log=print)
    print(res["paths"])


if __name__ == "__main__":
    main()
