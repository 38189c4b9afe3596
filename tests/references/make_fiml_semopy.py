"""Generate ``fiml_semopy.json``: semopy's FIML estimates (``semopy.ModelMeans``,
whose ML objective with means is FIML) of the Holzinger–Swineford
three-factor model with seeded MCAR holes, as the outside reference of
``tests/test_fiml.py``.  semopy is run with ftol 1e-12 (its default stopping
rule leaves estimates off in the third decimal); one fit takes over a minute,
which is why the values are stored.

Run from the project root:  .venv/bin/python tests/references/make_fiml_semopy.py
"""

from __future__ import annotations

import datetime
import json
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import semopy

HERE = Path(__file__).parent
sys.path.insert(0, str(HERE.parent))
import holzinger  # noqa: E402

SEED, RATE = 1939, 0.10


def data_with_holes() -> np.ndarray:
    """The nine tests with 10% of the answers removed completely at random (seeded)."""
    x = holzinger.data().to_numpy(float).copy()
    rng = np.random.default_rng(SEED)
    x[rng.random(x.shape) < RATE] = np.nan
    return x


def main() -> None:
    model = semopy.ModelMeans(holzinger.THREE_FACTOR)
    model.fit(pd.DataFrame(data_with_holes(), columns=holzinger.ITEMS), options={"ftol": 1e-12})
    table = model.inspect()
    rows = [{"lval": r.lval, "op": r.op, "rval": r.rval, "estimate": float(r.Estimate)}
            for r in table.itertuples()]
    out = {"made_by": "tests/references/make_fiml_semopy.py",
           "library": f"semopy {semopy.__version__}, ModelMeans, ftol 1e-12",
           "date": datetime.date.today().isoformat(), "seed": SEED, "rate": RATE,
           "rows": rows}
    (HERE / "fiml_semopy.json").write_text(json.dumps(out, indent=1) + "\n")


if __name__ == "__main__":
    main()
