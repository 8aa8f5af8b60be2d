"""Steps of a run whose files store none: taken from the integer that orders the file names.

Outside check: the over-one-cell count is recounted by brute force with plain numpy — the
Chebyshev displacement of every particle in level-0 cells, with the minimum image on periodic
axes, divided by the steps between the two snapshots, compared with 1 (one cell per step: the
Courant-type limit of an explicit particle push, common practice).
"""

from __future__ import annotations

import numpy as np
import pytest

from swarmaudit.app.cli import main
from swarmaudit.audit import tables as audit
from swarmaudit.core.context import AuditContext
from swarmaudit.core.errors import OptionError
from swarmaudit.core.layout import regular_layout
from swarmaudit.readers.discover import open_run

N, CELLS = 3000, 64
STEPS = [0, 10, 20, 30]


@pytest.fixture(autouse=True)
def private_cache(tmp_path, monkeypatch):
    monkeypatch.setenv("SWARMAUDIT_CACHE", str(tmp_path / "cache"))


def _motion():
    # speeds of 0 to 0.4 cells per step in random directions: over 10 steps 0 to 4 cells
    rng = np.random.default_rng(3)
    x0 = rng.random((N, 2))
    v = rng.normal(size=(N, 2))
    v *= (rng.uniform(0.0, 0.4, N) / np.abs(v).max(axis=1))[:, None] / CELLS
    return x0, v


def _positions(step):
    x0, v = _motion()
    return (x0 + v * step) % 1.0


def _write_npz(folder, steps=STEPS, store_step=False, name="snap_{:04d}.npz"):
    folder.mkdir()
    for s in steps:
        x = _positions(s)
        extra = {"step": np.array(s)} if store_step else {}
        np.savez(folder / name.format(s), x=x[:, 0], y=x[:, 1], id=np.arange(N), **extra)
    return folder


def _write_csv(folder):
    folder.mkdir()
    for s in STEPS:
        x = _positions(s)
        rows = "\n".join(f"{float(a)!r},{float(b)!r},{i}" for i, (a, b) in enumerate(x))
        (folder / f"dump_{s:04d}.csv").write_text(f"# particle dump, step {s}\nx,y,id\n{rows}\n")
    return folder


def _brute_over_one_cell(step_a, step_b, steps_between):
    d = _positions(step_b) - _positions(step_a)
    d -= np.round(d)                                   # minimum image, periodic unit box
    cells = np.max(np.abs(d) * CELLS, axis=1)          # Chebyshev, level-0 cells
    return int(np.count_nonzero(cells / steps_between > 1.0))


def _context(folder, **kw):
    lay = regular_layout([0, 1, 0, 1], [CELLS, CELLS], [4, 4], periodic=("x", "y"))
    return AuditContext(open_run(str(folder)), lay, use_cache=False, **kw)


def _over(ctx):
    _, summary = audit.migration_tables(ctx)
    return summary[summary["species"] == "all"]["over_one_cell"].tolist()


@pytest.mark.parametrize("writer", [_write_npz, _write_csv])
def test_steps_from_the_file_names(tmp_path, writer):
    ctx = _context(writer(tmp_path / "run"))
    assert [ctx.run[i].step for i in range(len(ctx.run))] == STEPS
    assert "no step stored; steps taken from the file names (0, 10, 20, …)" in ctx.notes
    want = [_brute_over_one_cell(a, b, b - a) for a, b in zip(STEPS, STEPS[1:])]
    assert _over(ctx) == want
    # the snapshots are ten steps apart: counting one step would flag most particles
    one_step = [_brute_over_one_cell(a, b, 1) for a, b in zip(STEPS, STEPS[1:])]
    assert min(one_step) > 20 * max(want)


@pytest.mark.parametrize("rule,between", [("index", 1), (5, 5), ("5", 5)])
def test_the_option_says_how_many_steps_lie_between_snapshots(tmp_path, rule, between):
    ctx = _context(_write_npz(tmp_path / "run"), steps_per_snapshot=rule)
    assert [ctx.run[i].step for i in range(len(ctx.run))] == [between * i for i in range(len(STEPS))]
    assert _over(ctx) == [_brute_over_one_cell(a, b, between) for a, b in zip(STEPS, STEPS[1:])]
    assert sum("no step stored" in n and "--steps-per-snapshot" in n for n in ctx.notes) == 1


def test_stored_steps_win_and_the_option_is_noted_unused(tmp_path):
    folder = _write_npz(tmp_path / "run", store_step=True, name="out_{:04d}.npz")
    ctx = _context(folder, steps_per_snapshot="index")
    assert [ctx.run[i].step for i in range(len(ctx.run))] == STEPS
    assert not any(n.startswith("no step stored") for n in ctx.notes)
    assert any("--steps-per-snapshot index is not used" in n for n in ctx.notes)


def test_names_without_numbers_count_snapshots(tmp_path):
    folder = tmp_path / "run"
    folder.mkdir()
    for s, label in zip(STEPS[:3], ("first", "second", "third")):
        x = _positions(s)
        np.savez(folder / f"{label}.npz", x=x[:, 0], y=x[:, 1], id=np.arange(N))
    ctx = _context(folder)
    assert [ctx.run[i].step for i in range(3)] == [0, 1, 2]
    assert any(n.startswith("no step stored; steps counted by snapshot") for n in ctx.notes)


@pytest.mark.parametrize("bad", ["0", "-3", "2.5", "every"])
def test_a_bad_value_is_one_clear_error(tmp_path, capsys, bad):
    folder = _write_npz(tmp_path / "run")
    assert main(["check", str(folder), "--rtol", "0.1", f"--steps-per-snapshot={bad}"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "--steps-per-snapshot" in err[0] and "Traceback" not in err[0]
    with pytest.raises(OptionError):
        _context(folder, steps_per_snapshot=bad)


def test_check_prints_the_note_and_the_report_shows_where_steps_came_from(tmp_path, capsys):
    folder = _write_npz(tmp_path / "run")
    assert main(["check", str(folder), "--rtol", "0.1"]) == 0
    assert "note: no step stored; steps taken from the file names (0, 10, 20, …)" in capsys.readouterr().err
    out = tmp_path / "out"
    assert main(["export", str(folder), "--out", str(out), "--domain", "0,1,0,1", "--cells", "64,64",
                 "--blocks", "4,4", "--periodic", "x,y", "--quiet", "--width", "200", "--height", "160",
                 "--snapshots", "first"]) == 0
    html = (out / "report.html").read_text()
    assert "0 … 30, taken from the file names (none stored)" in html
    assert "no step stored; steps taken from the file names (0, 10, 20, …)" in html
    summary = (out / "migration_summary.csv").read_text().splitlines()
    all_rows = [r.split(",") for r in summary[1:] if r.split(",")[2] == "all"]
    assert [int(r[-1]) for r in all_rows] == [_brute_over_one_cell(a, b, b - a)
                                              for a, b in zip(STEPS, STEPS[1:])]
