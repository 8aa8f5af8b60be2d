"""The Python API (``swarmaudit.open_run``): the same context, tables and errors as the CLI."""

from __future__ import annotations

import os
import subprocess
import sys

import numpy as np
import pandas as pd
import pytest

from _need import need

from _export_samples import LAYOUT_ARGS, snapshot_columns, write_npz_run
import swarmaudit as sa
from swarmaudit.app.cli import build_parser, main
from swarmaudit.app.options import context_from_options

N, SNAPS, STEPS, DT = 1200, 3, 10, 0.01
KEYWORDS = dict(domain=(0, 1, 0, 1), cells=(32, 32), blocks=(4, 2), ranks=2, periodic="x,y")


@pytest.fixture(scope="module")
def sample(tmp_path_factory):
    base = tmp_path_factory.mktemp("api")
    folder, state = write_npz_run(str(base / "run"), n=N, snapshots=SNAPS, steps_between=STEPS,
                                  dt=DT, charge_jump=0.02)
    return {"folder": folder, "state": state, "base": base,
            "run": sa.open_run(folder, **KEYWORDS, no_cache=True)}


def test_import_is_light():
    code = ("import sys, swarmaudit; heavy = [m for m in ('pandas', 'panel', 'holoviews', "
            "'matplotlib', 'numpy', 'dask') if m in sys.modules]; print(','.join(heavy))")
    env = dict(os.environ)
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env,
                         check=True)
    assert out.stdout.strip() == ""
    assert callable(sa.open_run) and "open_run" in dir(sa)
    with pytest.raises(AttributeError):
        sa.no_such_name   # noqa: B018


def test_keywords_and_command_line_make_the_same_context(sample):
    args = build_parser().parse_args(["inspect", sample["folder"], *LAYOUT_ARGS])
    cli_ctx = context_from_options(args)
    api_ctx = sample["run"].ctx
    a, b = cli_ctx.layout(0), api_ctx.layout(0)
    assert np.array_equal(a.lower, b.lower) and np.array_equal(a.upper, b.upper)
    assert np.array_equal(a.rank, b.rank) and tuple(a.periodic) == tuple(b.periodic)
    assert list(a.cells) == list(b.cells)
    # the same options as text, as typed on the command line
    text = sa.open_run(sample["folder"], domain="0,1,0,1", cells="32,32", blocks="4,2", ranks="2",
                       periodic=("x", "y"), no_cache=True)
    pd.testing.assert_frame_equal(text.census(), sample["run"].census())


def test_census_counts_per_block_match_numpy_histogramdd(sample):
    census = sample["run"].census()
    for i in range(SNAPS):
        cols = snapshot_columns(sample["state"], i * STEPS * DT)
        for sp, c in cols.items():
            # reference: numpy.histogramdd on the written positions, blocks numbered x fastest
            h, _ = np.histogramdd(np.c_[c["x"], c["y"]], bins=(np.linspace(0, 1, 5), np.linspace(0, 1, 3)))
            want = h.T.ravel().astype(np.int64)          # [iy, ix] → ix + 4 * iy
            got = census[(census["snapshot"] == i) & (census["species"] == sp)].sort_values("block")
            assert got["block"].tolist() == list(range(8))
            assert got["count"].to_numpy().tolist() == want.tolist()
            assert np.allclose(got["weight"].to_numpy(), 2.0 * want)


def test_tables_are_the_exported_csvs(sample):
    run = sample["run"]
    out = sample["base"] / "export"
    res = run.export(out, snapshots="first", width=320, height=240, dpi=60)
    for name, df in (("census.csv", run.census()), ("migration.csv", run.migration()),
                     ("migration_summary.csv", run.migration_summary()), ("drift.csv", run.drift())):
        disk = pd.read_csv(res.tables[name])
        assert list(disk.columns) == list(df.columns), name
        pd.testing.assert_frame_equal(disk, df.reset_index(drop=True), check_dtype=False,
                                      check_categorical=False, rtol=1e-12, obj=name)
    assert os.path.isfile(res.report)


def test_halo_is_the_audit_table(sample):
    from swarmaudit.audit.tables import halo_table
    got = sample["run"].halo(0, width_cells=2)
    pd.testing.assert_frame_equal(got, halo_table(sample["run"].ctx, 0, 2))
    a = got[got["species"] == "all"]
    assert a["count"].sum() == sum(len(sample["run"].frame(0, s)) for s in sample["run"].species)


def test_snapshots_table(sample):
    t = sample["run"].snapshots
    assert t["snapshot"].tolist() == list(range(SNAPS))
    assert t["step"].tolist() == [0, STEPS, 2 * STEPS]
    assert np.allclose(t["time"], [0, STEPS * DT, 2 * STEPS * DT])
    assert t["count_ions"].tolist() == [N] * SNAPS and t["count"].tolist() == [2 * N] * SNAPS


def test_frame_as_pandas_and_as_dask(sample):
    run = sample["run"]
    want = snapshot_columns(sample["state"], 1 * STEPS * DT)["ions"]
    df = run.frame(1, "ions", columns=["x", "vx"])
    assert isinstance(df, pd.DataFrame) and list(df.columns) == ["x", "vx"]
    assert np.array_equal(df["x"].to_numpy(), want["x"])
    both = run.frame(-1, columns=["x"])
    assert both["species"].value_counts().to_dict() == {"ions": N, "electrons": N}
    lazy = sa.open_run(sample["folder"], **KEYWORDS, engine="dask", no_cache=True)
    ddf = lazy.frame(1, "ions", columns=["x", "vx"])
    import dask.dataframe as dd
    assert isinstance(ddf, dd.DataFrame)
    got = ddf.compute()
    assert np.array_equal(got["x"].to_numpy(), want["x"])
    with pytest.raises(sa.InputError, match="no column 'nope'"):
        run.frame(0, "ions", columns=["nope"])
    with pytest.raises(sa.InputError, match="no species 'neutrons'"):
        run.frame(0, "neutrons")


def test_check_passes_and_fails_like_the_gate(sample):
    run = sample["run"]
    # the first species' charge is scaled by 1.02 in the last snapshot (a 2 % jump)
    bad = run.check(rtol=1e-3)
    assert not bad.passed and not bad
    first = bad.failures.iloc[0]
    assert (first["quantity"], first["species"], first["snapshot"]) == ("charge", "ions", SNAPS - 1)
    assert first["drift_pct"] == pytest.approx(2.0, rel=1e-9)
    assert "FAIL: charge of species ions" in repr(bad)
    good = run.check(rtol=1e-3, quantities="count,weight")
    assert good.passed and repr(good).startswith("ok:")
    assert set(good.table["quantity"]) == {"count", "weight"}
    assert "check passed" in good._repr_html_()


def test_errors_are_the_command_lines_sentences(sample, capsys):
    code = main(["inspect", sample["folder"], "--domain", "0,1,x", "--cells", "8,8"])
    assert code == 2
    cli_message = capsys.readouterr().err.strip().removeprefix("swarmaudit: error: ")
    with pytest.raises(sa.OptionError) as err:
        sa.open_run(sample["folder"], domain="0,1,x", cells=(8, 8))
    assert str(err.value) == cli_message
    with pytest.raises(sa.OptionError, match="no run option called 'bogus'"):
        sa.open_run(sample["folder"], bogus=1)
    with pytest.raises(sa.InputError):
        sa.open_run(str(sample["base"] / "no_such_run"))
    with pytest.raises(sa.OptionError, match="outside this run of 3"):
        sample["run"].frame(7)
    with pytest.raises(sa.OptionError, match="--quantities: no total called"):
        sample["run"].check(rtol=1e-3, quantities=["nonsense"])


def test_roles_keyword_is_the_role_option(tmp_path):
    rng = np.random.default_rng(1)
    n = 200
    for k in range(2):
        np.savez(tmp_path / f"s_{k}.npz", step=np.array(k), time=np.array(0.1 * k),
                 **{"grains/x": rng.random(n), "grains/y": rng.random(n),
                    "grains/macro_w": np.full(n, 3.0),
                    "grains/id": np.arange(n)})
    run = sa.open_run(tmp_path, roles={"weight": "macro_w"}, no_cache=True)
    census = run.census()
    assert census.loc[census["species"] == "grains", "weight"].sum() == pytest.approx(3.0 * n * 2)
    toml = tmp_path.parent / f"{tmp_path.name}_roles.toml"
    toml.write_text('[roles]\nweight = "macro_w"\n')
    from_file = sa.open_run(tmp_path, roles=toml, no_cache=True)      # as --roles FILE.toml
    pd.testing.assert_frame_equal(from_file.census(), census)
    with pytest.raises(sa.OptionError, match="no species of .* has a column 'w2'"):
        sa.open_run(tmp_path, roles={"weight": "w2"})


def test_view_takes_the_link_state_names(sample):
    run = sample["run"]
    pn = need("panel")
    v = run.view("space", snapshot=1, scaling="log", cmap="viridis")
    assert isinstance(v, pn.viewable.Viewable)
    assert isinstance(run.view("drift", rtol=1e-2), pn.viewable.Viewable)
    assert isinstance(run.view("totals", rtol=1e-2), pn.viewable.Viewable)   # the old tab name
    with pytest.raises(sa.OptionError, match="scaling='bogus' is not one of"):
        run.view("space", scale="bogus")
    with pytest.raises(sa.OptionError, match="no state called 'zoom'"):
        run.view(zoom=2)
    with pytest.raises(sa.OptionError, match="view\\(\\) takes one of"):
        run.view("sideways")


def test_compare_is_the_compare_command(sample, tmp_path, capsys):
    cand, _ = write_npz_run(str(tmp_path / "cand"), n=N, snapshots=SNAPS, steps_between=STEPS, dt=DT)
    same = sample["run"].compare(sample["run"])
    assert same.passed and set(same.particles["identical"]) == {True}
    # the reference's first species has its charge scaled by 1.02 in the last snapshot
    differ = sample["run"].compare(cand, rtol=1e-3, **KEYWORDS, no_cache=True)
    assert not differ.passed
    assert len(differ.failures) > 0 and "FAIL" in repr(differ)
    out = tmp_path / "cmp"
    code = main(["compare", sample["folder"], cand, *LAYOUT_ARGS, "--rtol", "1e-3", "--out", str(out),
                 "--quiet", "--no-cache"])
    assert code == 1
    assert capsys.readouterr().out.strip().splitlines()[-1] in differ.lines
    for name, df in differ.tables.items():
        disk = pd.read_csv(out / name)
        assert list(disk.columns) == list(df.columns), name
        assert len(disk) == len(df), name
