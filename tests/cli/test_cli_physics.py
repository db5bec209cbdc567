"""The ``cmbtools physics`` subcommand, run in-process."""

from __future__ import annotations

import json

import pytest
from astropy.cosmology import Planck18

from cmbtools import cli
from cmbtools.physics import last_scattering

REQUIRED_KEYS = (
    "z_star", "z_drag", "r_star_mpc", "theta_star", "ell_a", "dm_star_mpc", "da_star_mpc",
    "age_gyr", "age_star_kyr", "t_star_k", "n_gamma_cm3", "omega_gamma_h2",
)


def _run_json(capsys, *options):
    assert cli.main(["physics", "--json", *options]) == 0
    return json.loads(capsys.readouterr().out)


def test_json_output_of_the_fiducial_cosmology(capsys):
    out = _run_json(capsys)
    for key in REQUIRED_KEYS:
        assert isinstance(out[key], float), key
    # the same numbers as the library, for astropy's Planck18
    ref = last_scattering().to_dict()
    for key in REQUIRED_KEYS:
        assert out[key] == ref[key]
    # Planck 2020 (A&A 641, A6), Table 2, TT,TE,EE+lowE+lensing+BAO: z* = 1089.80 (from memory)
    assert out["z_star"] == pytest.approx(1089.80, rel=2e-3)
    assert out["hundred_theta_star"] == pytest.approx(1.04119, rel=2e-3)
    assert out["cosmology"]["name"] == "Planck18"
    assert out["cosmology"]["omega_b_h2"] == pytest.approx(Planck18.Ob0 * 0.6766**2, rel=1e-12)


def test_table_output(capsys):
    assert cli.main(["physics"]) == 0
    text = capsys.readouterr().out
    lines = text.splitlines()
    assert lines[0].startswith("cosmology: Planck18")
    rows = {line.split("  ")[0]: line for line in lines if "  " in line}
    star = rows["redshift of last scattering z* (visibility peak)"]
    value = float(star.split()[-5])  # the value, then the fit and its source
    assert value == pytest.approx(1089.80, rel=2e-3)  # Planck 2020, Table 2 (from memory)
    assert "Hu & Sugiyama 1996" in star
    assert "Eisenstein & Hu 1998" in rows["baryon drag redshift z_drag"]
    assert "Mpc" in rows["sound horizon r_s(z*)"]
    assert "cm^-3" in rows["CMB photon number density today"]
    # aligned: every value ends in the column where the header 'value' ends
    header = lines[3]
    value_end = header.index("value") + len("value")
    for line in lines[5:]:
        assert line[value_end - 1] != " ", line


def test_changed_parameters(capsys):
    out = _run_json(capsys, "--h0", "70", "--omega-k", "0.01", "--helium", "0.24")
    params = out["cosmology"]
    assert params["h0"] == pytest.approx(70.0)
    # the physical densities are kept; curvature is exactly what was asked (astropy's Ok0)
    assert params["omega_b_h2"] == pytest.approx(Planck18.Ob0 * 0.6766**2, rel=1e-12)
    assert params["omega_k"] == pytest.approx(0.01, abs=1e-12)
    assert params["helium_fraction"] == 0.24
    # the early universe is unchanged (same physical densities), so r* barely moves
    ref = last_scattering()
    assert out["r_star_mpc"] == pytest.approx(ref.r_star_mpc, rel=2e-3)
    assert out["dm_star_mpc"] != pytest.approx(ref.dm_star_mpc, rel=1e-3)


def test_more_baryons_delay_drag(capsys):
    # more baryons: R larger, so drag ends later relative to last scattering (common practice)
    lo = _run_json(capsys, "--omega-b-h2", "0.020")
    hi = _run_json(capsys, "--omega-b-h2", "0.026")
    assert hi["z_star"] - hi["z_drag"] < lo["z_star"] - lo["z_drag"]


@pytest.mark.parametrize(
    "options, words",
    [
        (["--omega-b-h2", "-0.01"], "--omega-b-h2"),
        (["--omega-c-h2", "-0.1"], "--omega-c-h2"),
        (["--h0", "0"], "--h0"),
        (["--omega-k", "-3"], "expansion rate"),
        (["--helium", "0.7"], "helium_fraction"),
        (["--peebles-fudge", "0"], "peebles_fudge"),
        (["--t0", "-2"], "--t0"),
    ],
)
def test_bad_parameters_exit_2_with_one_line(options, words, capsys):
    assert cli.main(["physics", *options]) == 2
    captured = capsys.readouterr()
    err = captured.err.strip().splitlines()
    assert len(err) == 1
    assert err[0].startswith("cmbtools physics: error:")
    assert words in err[0]
    assert captured.out == ""


def test_unparsable_number_is_a_usage_error(capsys):
    with pytest.raises(SystemExit) as info:
        cli.main(["physics", "--h0", "fast"])
    assert info.value.code == 2
    assert len(capsys.readouterr().err.strip().splitlines()) == 1


def test_help(capsys):
    with pytest.raises(SystemExit) as info:
        cli.main(["physics", "--help"])
    assert info.value.code == 0
    out = capsys.readouterr().out
    assert out.startswith("usage: cmbtools physics")
    for option in ("--h0", "--omega-b-h2", "--omega-c-h2", "--omega-k", "--t0", "--neff", "--helium", "--json"):
        assert option in out
