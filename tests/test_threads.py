"""The one-thread limit holds for every BLAS copy during an analysis (issue 18 item 2).

Each check runs in a fresh interpreter (a library already loaded by another test
would hide the fault) and reads the thread pools with
``threadpoolctl.threadpool_info()`` at the end of the analysis. A control in
the same environment first shows that a copy loaded *inside* a limit keeps its
default, so the main check can fail; on a one-CPU machine OpenBLAS starts with
one thread anyway and the check is skipped, saying so.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

pytest.importorskip("threadpoolctl")

ROOT = Path(__file__).resolve().parents[1]
ENV = dict(os.environ, OPENBLAS_NUM_THREADS="4", OMP_NUM_THREADS="4", MKL_NUM_THREADS="4",
           PYTHONPATH=str(ROOT))

CONTROL = """
import json
from threadpoolctl import threadpool_info, threadpool_limits
import numpy
with threadpool_limits(1):
    import scipy.linalg  # loaded inside the limit: the limit misses it
    print(json.dumps([i["num_threads"] for i in threadpool_info()]))
"""

ANALYSIS = """
import json
import numpy as np, pandas as pd
from threadpoolctl import threadpool_info
import benchharness.analysis as A
import benchharness.analysis.steps as S
rng = np.random.default_rng(1)
df = pd.DataFrame({"a": rng.choice(list("xyz"), 300), "b": rng.choice(list("pq"), 300)})
df["wall_s"] = np.exp(rng.normal(0, 0.3, 300)) * np.where(df.a == "x", 1.5, 1.0)
inside = []
real = S.run_analysis
def spy(*args, **kw):
    out = real(*args, **kw)
    inside.append([(i["filepath"], i["num_threads"]) for i in threadpool_info()])
    return out
S.run_analysis = spy
res = A.analyze(df, factors=["a", "b"], art=True)
after = [i["num_threads"] for i in threadpool_info()]
print(json.dumps({"inside": inside[0], "after": after,
                  "significant": [r["term"] for r in res.anova_rows if (r.get("p") or 1) < 0.05]}))
"""


def _py(code: str):
    r = subprocess.run([sys.executable, "-c", code], env=ENV, capture_output=True, text=True,
                       timeout=120, cwd=ROOT)
    assert r.returncode == 0, r.stderr
    return json.loads(r.stdout.strip().splitlines()[-1])


def test_every_blas_copy_runs_one_thread_during_an_analysis():
    control = _py(CONTROL)
    if max(control) <= 1:
        pytest.skip("one CPU: OpenBLAS starts with one thread, so a missed limit cannot show")
    assert len(control) >= 2      # numpy's and scipy's own copies are distinct libraries
    out = _py(ANALYSIS)
    assert len(out["inside"]) >= 2, out
    assert all(n == 1 for _path, n in out["inside"]), out["inside"]
    assert max(out["after"]) > 1          # the limit is lifted when the analysis returns
    assert out["significant"] == ["a"]    # planted: only factor a has an effect (×1.5)
