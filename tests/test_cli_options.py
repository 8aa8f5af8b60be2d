"""The shared command-line options as a user types them: negative numbers, the roles file."""

from __future__ import annotations

import json

import numpy as np
import pytest

from swarmaudit.app.cli import build_parser, main


def _centred_run(folder, n=2000, snapshots=2, seed=3):
    """Particles in [-15, 15)^2 around the origin, the usual N-body / plasma box."""
    rng = np.random.default_rng(seed)
    for s in range(snapshots):
        np.savez(folder / f"box_{s:04d}.npz", x=rng.uniform(-15, 15, n), y=rng.uniform(-15, 15, n),
                 vx=rng.normal(size=n), vy=rng.normal(size=n), id=np.arange(n), step=np.array(s))


def test_a_domain_centred_on_zero_is_accepted_without_the_equals_sign(tmp_path, capsys):
    _centred_run(tmp_path)
    rc = main(["inspect", str(tmp_path), "--json", "--domain", "-15,15,-15,15", "--cells", "8,8",
               "--blocks", "2,2"])
    err = capsys.readouterr()
    assert rc == 0, err.err
    lay = json.loads(err.out)["layout"]
    assert lay["domain_lower"] == [-15.0, -15.0] and lay["domain_upper"] == [15.0, 15.0]
    assert lay["blocks"] == 4
    # every particle is inside [-15, 15)^2, so none is counted outside the domain
    assert all(not h.get("outside_domain") for h in json.loads(err.out)["health"])


@pytest.mark.parametrize("argv, dest, value", [
    (["inspect", "R", "--domain", "-15,15,-15,15"], "domain", "-15,15,-15,15"),
    (["inspect", "R", "--domain", "-1.5e1,15,-.5,0.5"], "domain", "-1.5e1,15,-.5,0.5"),
    (["inspect", "R", "--domain=-15,15,-15,15"], "domain", "-15,15,-15,15"),
    (["export", "R", "--out", "o", "--range", "vx=-2,2"], "range", ["vx=-2,2"]),
    (["export", "R", "--out", "o", "--space", "x,y", "--range", "-2,2"], "range", ["-2,2"]),
])
def test_values_that_start_with_a_minus_are_values(argv, dest, value):
    args = build_parser().parse_args(argv)
    assert getattr(args, dest) == value


@pytest.mark.parametrize("argv, message", [
    (["check", "R", "--rtol", "-1"], "argument --rtol: takes a positive number, got '-1'"),
    (["check", "R", "--rtol", "1", "--c", "-3e8"], "argument --c: takes a positive number, got '-3e8'"),
])
def test_negative_numbers_where_none_make_sense_get_the_options_own_message(argv, message, capsys):
    with pytest.raises(SystemExit) as exc:
        build_parser().parse_args(argv)
    assert exc.value.code == 2
    err = capsys.readouterr().err
    assert message in err and "expected one argument" not in err


def test_a_range_option_without_a_column_is_one_clear_error(tmp_path, capsys):
    _centred_run(tmp_path)
    rc = main(["export", str(tmp_path), "--out", str(tmp_path / "out"), "--range", "-2,2", "--quiet"])
    err = capsys.readouterr().err
    assert rc == 2 and "--range" in err and "Traceback" not in err, err


ROLES = '[roles]\nx = "a"\ny = "b"\nid = "n"\n'


def _plain_names_run(folder, n=500):
    rng = np.random.default_rng(1)
    np.savez(folder / "s_0000.npz", a=rng.random(n), b=rng.random(n), n=np.arange(n))


@pytest.mark.parametrize("option", ["--roles", "--map"])
def test_the_roles_file_and_its_old_name(tmp_path, capsys, option):
    run = tmp_path / "run"
    run.mkdir()
    _plain_names_run(run)
    (tmp_path / "roles.toml").write_text(ROLES)
    rc = main(["inspect", str(run), "--json", option, str(tmp_path / "roles.toml")])
    out = capsys.readouterr()
    assert rc == 0, out.err
    roles = {c["name"]: c["role"] for c in json.loads(out.out)["species"][0]["columns"]}
    assert roles == {"a": "x", "b": "y", "n": "id"}


def test_help_names_the_roles_file_and_the_old_spelling(capsys):
    with pytest.raises(SystemExit):
        build_parser().parse_args(["inspect", "--help"])
    text = " ".join(capsys.readouterr().out.split())
    assert "--roles FILE.toml, --map FILE.toml" in text
    assert "--map is its old name" in text
