"""First contact with dumps written the way simulation codes write them, with no option given.

Each fixture is written here in the shape one kind of code uses: one ``.npz`` per snapshot from
an N-body code's Python API (``xyz``, ``vxvyvz``, ``m``, ``hash``, ``t``), HDF5 with one group per
species inside a shared container and ``(N, 3)`` datasets, CSV with numbered vector components.
Totals are checked against numpy sums of the same arrays.
"""

from __future__ import annotations

import json
import re

import h5py
import numpy as np
import pytest

from swarmaudit.app.cli import main
from swarmaudit.core.roles import RoleMap


def _inspect(capsys, *argv):
    rc = main(["inspect", *map(str, argv), "--json"])
    out = capsys.readouterr()
    assert rc == 0, out.err
    return json.loads(out.out)


def _roles(info, species=0):
    sp = info["species"][species]
    return ({c["name"]: c["role"] for c in sp["columns"] if c["role"]},
            {c["name"] for c in sp["columns"] if c["guessed"]})


# one .npz per snapshot, the arrays an N-body code's Python API hands out --------------------------
def write_nbody_npz(folder, n=1200, snapshots=3, seed=7):
    rng = np.random.default_rng(seed)
    data = []
    for k in range(snapshots):
        d = dict(xyz=rng.normal(0, 5, (n, 3)), vxvyvz=rng.normal(0, 1, (n, 3)),
                 m=rng.uniform(0.5, 1.5, n), hash=rng.permutation(n).astype(np.uint32),
                 t=np.float64(0.25 * k))
        np.savez(folder / f"disk_{k:04d}.npz", **d)
        data.append(d)
    return data


def test_an_nbody_dump_is_read_with_no_option(tmp_path, capsys):
    data = write_nbody_npz(tmp_path)
    info = _inspect(capsys, tmp_path)
    roles, guessed = _roles(info)
    assert roles == {"xyz/x": "x", "xyz/y": "y", "xyz/z": "z", "vxvyvz/x": "vx", "vxvyvz/y": "vy",
                     "vxvyvz/z": "vz", "m": "mass", "hash": "id"}
    # the less common names are guesses; m is the usual name of a mass
    assert guessed == {"xyz/x", "xyz/y", "xyz/z", "vxvyvz/x", "vxvyvz/y", "vxvyvz/z", "hash"}
    sp = info["species"][0]
    assert sp["key"] == ["hash"] and sp["momentum"] == "velocity" and sp["ndim"] == 3
    assert [s["time"] for s in info["snapshots"]] == [0.0, 0.25, 0.5]
    assert any("guessed" in n and "--role" in n for n in info["notes"])
    # the placed layout holds the first snapshot's particles (numpy's min/max of the same array)
    lay = info["layout"]
    assert np.allclose(lay["domain_lower"], data[0]["xyz"].min(axis=0))
    assert all(hi > mx for hi, mx in zip(lay["domain_upper"], data[0]["xyz"].max(axis=0)))


def test_the_text_view_marks_a_guess_as_one(tmp_path, capsys):
    write_nbody_npz(tmp_path, snapshots=1)
    assert main(["inspect", str(tmp_path)]) == 0
    out = capsys.readouterr().out
    line = next(ln for ln in out.splitlines() if ln.strip().startswith("xyz/x"))
    assert "guessed" in line
    line = next(ln for ln in out.splitlines() if ln.strip().startswith("m "))
    assert "guessed" not in line


def test_the_guessed_velocities_and_masses_make_the_totals(tmp_path, capsys):
    data = write_nbody_npz(tmp_path)
    from swarmaudit.app.cli import build_parser
    from swarmaudit.app.options import context_from_options
    from swarmaudit.audit.tables import drift_table
    ctx = context_from_options(build_parser().parse_args(["check", str(tmp_path), "--rtol", "1"]))
    df = drift_table(ctx)
    got = df[(df["species"] == "all")].set_index(["snapshot", "quantity"])["value"]
    for k, d in enumerate(data):
        for a, axis in enumerate("xyz"):
            assert got[(k, f"momentum_{axis}")] == pytest.approx(np.sum(d["m"] * d["vxvyvz"][:, a]),
                                                                 rel=1e-12, abs=1e-12)
        assert got[(k, "kinetic_energy")] == pytest.approx(0.5 * np.sum(d["m"] * (d["vxvyvz"] ** 2).sum(1)),
                                                           rel=1e-12)
    # and check judges momentum: these random snapshots do not conserve it
    assert main(["check", str(tmp_path), "--rtol", "1e-6", "--quantities", "momentum_x"]) == 1
    assert "momentum_x" in capsys.readouterr().out


def test_a_role_given_beats_the_guess_of_that_kind(tmp_path, capsys):
    rng = np.random.default_rng(2)
    n = 400
    np.savez(tmp_path / "s_0000.npz", xyz=rng.random((n, 3)), a=rng.random(n), b=rng.random(n),
             c=rng.random(n), hash=np.arange(n))
    info = _inspect(capsys, tmp_path, "--role", "x=a", "--role", "y=b", "--role", "z=c")
    roles, guessed = _roles(info)
    # no mix of the user's x with the guessed y and z: the guess of positions is dropped whole
    assert roles == {"a": "x", "b": "y", "c": "z", "hash": "id"} and guessed == {"hash"}


# HDF5: one group per species inside a shared container, (N, 3) datasets ---------------------------
def write_grouped_h5(folder, snapshots=2, seed=3):
    rng = np.random.default_rng(seed)
    counts = {"grain": 300, "gas": 500}
    for k in range(snapshots):
        with h5py.File(folder / f"out_{k:03d}.h5", "w") as f:
            f.attrs["time"] = 0.1 * k
            for sp, n in counts.items():
                g = f.create_group(f"particles/{sp}")
                g.attrs["mass"] = 2.0 if sp == "grain" else 1.0
                g.create_dataset("xyz", data=rng.uniform(-1, 1, (n, 3)))
                g.create_dataset("vel", data=rng.normal(size=(n, 3)))
                g.create_dataset("particle_id", data=np.arange(n))
    return counts


def test_species_in_a_shared_group_are_shown_by_their_own_names(tmp_path, capsys):
    counts = write_grouped_h5(tmp_path)
    info = _inspect(capsys, tmp_path)
    names = {sp["species"]: sp["name_in_file"] for sp in info["species"]}
    assert names == {"grain": "particles/grain", "gas": "particles/gas"}
    assert info["snapshots"][0]["count"] == counts
    for i in range(2):
        roles, guessed = _roles(info, i)
        assert roles == {"xyz/x": "x", "xyz/y": "y", "xyz/z": "z", "vel/x": "vx", "vel/y": "vy",
                         "vel/z": "vz", "particle_id": "id"}
        assert guessed == {"xyz/x", "xyz/y", "xyz/z"}


@pytest.mark.parametrize("name", ["grain", "particles/grain", "/particles/grain"])
def test_species_option_takes_the_short_or_the_full_name(tmp_path, capsys, name):
    write_grouped_h5(tmp_path)
    info = _inspect(capsys, tmp_path, "--species", name)
    assert [sp["species"] for sp in info["species"]] == ["grain"]
    assert info["snapshots"][0]["count"] == {"grain": 300}


def test_a_species_in_no_shared_group_keeps_its_path(tmp_path, capsys):
    rng = np.random.default_rng(0)
    with h5py.File(tmp_path / "s_000.h5", "w") as f:
        for sp in ("beam/electrons", "wall/ions"):
            g = f.create_group(sp)
            g.create_dataset("position", data=rng.random((50, 2)))
    info = _inspect(capsys, tmp_path)
    assert sorted(sp["species"] for sp in info["species"]) == ["beam/electrons", "wall/ions"]


# CSV with numbered vector components --------------------------------------------------------------
def test_csv_with_numbered_vector_columns(tmp_path, capsys):
    rng = np.random.default_rng(5)
    n = 200
    for k in range(2):
        xyz, v = rng.normal(size=(n, 3)), rng.normal(size=(n, 3))
        lines = [f"# t = {0.5 * k}", "hash,xyz:0,xyz:1,xyz:2,vxvyvz:0,vxvyvz:1,vxvyvz:2,m"]
        lines += [",".join([str(i)] + [f"{x:.9g}" for x in (*xyz[i], *v[i])] + ["1.0"]) for i in range(n)]
        (tmp_path / f"snap_{k:03d}.csv").write_text("\n".join(lines) + "\n")
    info = _inspect(capsys, tmp_path)
    roles, guessed = _roles(info)
    assert roles == {"hash": "id", "xyz:0": "x", "xyz:1": "y", "xyz:2": "z", "vxvyvz:0": "vx",
                     "vxvyvz:1": "vy", "vxvyvz:2": "vz", "m": "mass"}
    assert guessed == set(roles) - {"m"}
    assert [s["time"] for s in info["snapshots"]] == [0.0, 0.5]


# what is a vector and what is not -----------------------------------------------------------------
@pytest.mark.parametrize("columns, expected", [
    # (N, 3) u is a vector: momentum per unit mass (γv), the velocity of a slow particle
    (["x", "y", "u/x", "u/y", "u/z"], {"x": "x", "y": "y", "ux": "u/x", "uy": "u/y", "uz": "u/z"}),
    # a scalar u (often an internal energy) is no velocity
    (["x", "y", "u"], {"x": "x", "y": "y"}),
    # one component alone, or four, is not a position vector
    (["x_1"], {}),
    (["xyz/0", "xyz/1", "xyz/2", "xyz/3"], {}),
    # a common name wins over a guess of the same kind
    (["x", "y", "xyz/x", "xyz/y", "xyz/z"], {"x": "x", "y": "y"}),
    (["pos/x", "pos/y", "vxvyvz/x", "vxvyvz/y", "v/x", "v/y"],
     {"x": "pos/x", "y": "pos/y", "vx": "v/x", "vy": "v/y"}),
    (["coords/x", "coords/y", "velocities/x", "velocities/y", "pid"],
     {"x": "coords/x", "y": "coords/y", "vx": "velocities/x", "vy": "velocities/y", "id": "pid"}),
    (["r/x", "r/y", "r/z", "tag"], {"x": "r/x", "y": "r/y", "z": "r/z", "id": "tag"}),
])
def test_which_names_are_vectors(columns, expected):
    assert RoleMap().resolve(columns) == expected


# when nothing is recognised: say what is missing and what to write ---------------------------------
def test_no_position_names_the_columns_and_the_options_to_write(tmp_path, capsys):
    rng = np.random.default_rng(1)
    n = 300
    np.savez(tmp_path / "s_0000.npz", blob=rng.random((n, 3)), m=np.ones(n), t=np.float64(0))
    assert main(["inspect", str(tmp_path)]) == 2
    err = capsys.readouterr().err
    assert "Traceback" not in err and len(err.strip().splitlines()) == 1
    assert "no column was recognised as a particle position" in err
    assert "the columns are: blob/x, blob/y, blob/z, m" in err
    assert "--role x=blob/x --role y=blob/y --role z=blob/z" in err
    assert "--domain" not in err
    # the advice works as written: on the command line, and as the lines of a roles file
    opts = re.search(r"(--role \S+ --role \S+ --role \S+)", err).group(1).split()
    assert main(["inspect", str(tmp_path), *opts, "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["species"][0]["ndim"] == 3
    lines = re.search(r"write the lines (.*) in a roles file", err).group(1).split(", ")
    (tmp_path.parent / "roles.toml").write_text("\n".join(lines) + "\n")
    info = _inspect(capsys, tmp_path, "--roles", tmp_path.parent / "roles.toml")
    assert _roles(info)[0] == {"blob/x": "x", "blob/y": "y", "blob/z": "z", "m": "mass"}


def _no_velocity_run(folder, n=200):
    rng = np.random.default_rng(4)
    for k in range(2):
        np.savez(folder / f"s_{k:04d}.npz", pos=rng.random((n, 2)), speed2=rng.random((n, 2)),
                 m=np.ones(n))


def test_a_velocity_total_asked_for_without_velocities_says_what_to_write(tmp_path, capsys):
    _no_velocity_run(tmp_path)
    assert main(["check", str(tmp_path), "--rtol", "1", "--quantities", "count,momentum_x"]) == 2
    err = capsys.readouterr().err
    assert "Traceback" not in err and "needs particle velocities" in err
    assert "pos/x, pos/y, speed2/x, speed2/y, m" in err
    assert "--role vx=speed2/x --role vy=speed2/y" in err


def test_the_default_check_notes_the_totals_it_cannot_form(tmp_path, capsys):
    _no_velocity_run(tmp_path)
    assert main(["check", str(tmp_path), "--rtol", "1"]) == 0
    err = capsys.readouterr().err
    assert "momentum and energy are not checked" in err and "--role vx=speed2/x" in err
