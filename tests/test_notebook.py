"""The API in a real notebook kernel: a notebook is written, run headless (nbclient + ipykernel), read back."""

from __future__ import annotations

import json
import os

import numpy as np
import pytest

from _need import need
from _export_samples import snapshot_columns, write_npz_run
import swarmaudit

nbformat = need("nbformat")
nbclient = need("nbclient")

STEPS, DT, N = 10, 0.01, 900
#: what Panel and HoloViews put in a notebook's output: the page's scripts, then each object
LOAD_MIME = "application/vnd.holoviews_load.v0+json"
EXEC_MIME = "application/vnd.holoviews_exec.v0+json"


def _outputs(cell, kind=None):
    return [o for o in cell.outputs if kind is None or o.output_type == kind]


def _text(cell) -> str:
    return "".join(o.get("text", "") for o in _outputs(cell, "stream"))


def test_notebook_census_check_and_view(tmp_path):
    folder, state = write_npz_run(str(tmp_path / "run"), n=N, snapshots=3, steps_between=STEPS,
                                  dt=DT, charge_jump=0.05)
    cells = [
        # 0: the kernel imports this tree, not another installed copy
        "import swarmaudit as sa\nprint(sa.__file__)",
        # 1: open the run with the command line's options as keywords
        f"run = sa.open_run({folder!r}, domain=(0, 1, 0, 1), cells=(32, 32), blocks=(4, 2),\n"
        "                  ranks=2, periodic='x,y', no_cache=True)\nrun",
        # 2: the census as a user sees it, and as JSON for the test to read back
        "census = run.census()\nprint(census.to_json(orient='records'))\n"
        "census[census.snapshot == 0].head()",
        # 3: the gate
        "result = run.check(rtol=1e-3)\nprint('passed' if result.passed else 'failed')\nresult",
        # 4: one view of the dashboard, inline
        "run.view('phase', snapshot=1, scaling='log')",
        # 5: errors are raised, one sentence
        "try:\n    run.view('space', cmap='no-such-map')\nexcept sa.OptionError as exc:\n"
        "    print('OptionError:', exc)",
    ]
    nb = nbformat.v4.new_notebook()
    nb.cells = [nbformat.v4.new_code_cell(c) for c in cells]
    nbformat.write(nb, str(tmp_path / "audit.ipynb"))
    nb = nbformat.read(str(tmp_path / "audit.ipynb"), as_version=4)

    tree = os.path.dirname(os.path.dirname(os.path.abspath(swarmaudit.__file__)))
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join([tree] + [p for p in env.get("PYTHONPATH", "").split(os.pathsep) if p])
    env["SWARMAUDIT_CACHE"] = "off"
    env.setdefault("MPLBACKEND", "Agg")
    client = nbclient.NotebookClient(nb, timeout=240, kernel_name="python3",
                                     resources={"metadata": {"path": str(tmp_path)}})
    client.execute(env=env)

    # 0: this tree
    assert _text(nb.cells[0]).strip() == os.path.abspath(swarmaudit.__file__)
    shown = _outputs(nb.cells[1], "execute_result")[0]["data"]["text/plain"]
    assert shown.startswith("<swarmaudit run 'run': 3 snapshots")

    # 2: counts per block equal numpy.histogramdd of the positions written (blocks x fastest)
    census = json.loads(_text(nb.cells[2]).strip().splitlines()[-1])
    html = _outputs(nb.cells[2], "execute_result")[0]["data"]["text/html"]
    assert "<table" in html and "count" in html
    for i in range(3):
        for sp, c in snapshot_columns(state, i * STEPS * DT).items():
            h, _ = np.histogramdd(np.c_[c["x"], c["y"]], bins=(np.linspace(0, 1, 5), np.linspace(0, 1, 3)))
            want = h.T.ravel().astype(int).tolist()
            got = sorted((r["block"], r["count"]) for r in census
                         if r["snapshot"] == i and r["species"] == sp)
            assert [b for b, _ in got] == list(range(8))
            assert [n for _, n in got] == want

    # 3: the first species' charge jumps by 5 % in the last snapshot: the gate fails on it
    assert _text(nb.cells[3]).strip() == "failed"
    data = _outputs(nb.cells[3], "execute_result")[0]["data"]
    assert "FAIL: charge of species ions" in data["text/plain"]
    assert "check failed" in data["text/html"]

    # 4: the view is a Panel/Bokeh payload the notebook renders (scripts loaded, object shown)
    mimes = [m for o in nb.cells[4].outputs if o.output_type in ("display_data", "execute_result")
             for m in o.get("data", {})]
    assert LOAD_MIME in mimes, mimes
    assert EXEC_MIME in mimes, mimes
    exec_out = next(o for o in nb.cells[4].outputs if EXEC_MIME in o.get("data", {}))
    assert "text/html" in exec_out["data"]

    # 5: a bad state value is an OptionError naming it and the choices
    err = _text(nb.cells[5])
    assert err.startswith("OptionError: view(): cmap='no-such-map' is not one of the choices")
