"""``swarmaudit check`` end to end on small .npz runs."""

import numpy as np
import pytest

from swarmaudit.app.cli import main

from _audit_runs import drifting_plasma, write_npz_run


@pytest.fixture(autouse=True)
def private_cache(tmp_path, monkeypatch):
    # keep the reduction cache of these runs out of the user's home
    monkeypatch.setenv("SWARMAUDIT_CACHE", str(tmp_path / "cache"))


@pytest.fixture
def charge_loss_run(tmp_path):
    # a constructed run: the electrons lose 1 % of their charge at snapshot 3 (step 30)
    return write_npz_run(tmp_path / "run", drifting_plasma(n=400, snapshots=6, loss_at=3, loss=0.01))


def test_tight_band_fails_naming_charge_and_snapshot_three(charge_loss_run, capsys):
    code = main(["check", charge_loss_run, "--rtol", "0.005"])
    out = capsys.readouterr().out.splitlines()
    assert code == 1
    assert out[0].startswith("FAIL: charge of species electrons")
    assert "snapshot 3 (step 30)" in out[0]
    assert any(line.split()[:2] == ["charge", "electrons"] and line.endswith("FAIL") for line in out)


def test_wide_band_passes(charge_loss_run, capsys):
    assert main(["check", charge_loss_run, "--rtol", "0.02"]) == 0
    assert capsys.readouterr().out.startswith("ok: ")


def test_quantity_and_species_filters(charge_loss_run, capsys):
    assert main(["check", charge_loss_run, "--rtol", "0.005", "--quantities", "count,total_energy"]) == 0
    assert main(["check", charge_loss_run, "--rtol", "0.005", "--species", "ions"]) == 0
    assert main(["check", charge_loss_run, "--rtol", "1e-9", "--quantities", "kinetic_energy"]) == 0


@pytest.mark.parametrize("rtol", ["-1", "0", "abc", "inf"])
def test_bad_rtol_exits_2(charge_loss_run, rtol, capsys):
    with pytest.raises(SystemExit) as err:
        main(["check", charge_loss_run, "--rtol", rtol])
    assert err.value.code == 2
    assert "--rtol" in capsys.readouterr().err


def test_unknown_quantity_and_missing_run_exit_2(charge_loss_run, tmp_path, capsys):
    assert main(["check", charge_loss_run, "--rtol", "0.1", "--quantities", "entropy"]) == 2
    err = capsys.readouterr().err
    assert "entropy" in err and "charge" in err and "Traceback" not in err
    assert main(["check", str(tmp_path / "nowhere"), "--rtol", "0.1"]) == 2


def test_energy_exchange_with_the_field_is_not_a_failure(tmp_path, capsys):
    # kinetic energy goes into the field and back; only the total is conserved
    snaps = drifting_plasma(n=200, snapshots=5, loss_at=None)
    ke0 = None
    for k, s in enumerate(snaps):
        cols = s["species"]["electrons"][0]
        scale = 1.0 + 0.1 * np.sin(k)
        cols["vx"] = cols["vx"] * scale
        cols["vy"] = cols["vy"] * scale
        ke = 0.5 * np.sum(cols["vx"] ** 2 + cols["vy"] ** 2)
        ke0 = ke if ke0 is None else ke0
        s["meta"] = {"field_energy": 1.0 + ke0 - ke}
    run = write_npz_run(tmp_path / "exchange", snaps)
    assert main(["check", run, "--rtol", "1e-9", "--quantities", "total_energy"]) == 0
    assert main(["check", run, "--rtol", "1e-3", "--quantities", "kinetic_energy"]) == 1
    assert "kinetic_energy" in capsys.readouterr().out


def test_second_check_is_served_from_the_cache_with_the_same_answer(charge_loss_run, capsys):
    from swarmaudit.audit.cache import cache_for
    assert main(["check", charge_loss_run, "--rtol", "0.005"]) == 1
    first = capsys.readouterr()
    hits = cache_for().hits
    assert main(["check", charge_loss_run, "--rtol", "0.005"]) == 1
    second = capsys.readouterr()
    assert cache_for().hits >= hits + 6          # one totals entry per snapshot
    assert second.out == first.out and second.err == first.err
