"""``cmbtools physics``: recombination and last-scattering numbers of a cosmology."""

from __future__ import annotations

import argparse
import json
import math

HELP = "print recombination and last-scattering numbers (z*, z_drag, sound horizon, angles, ages)"
DESCRIPTION = """\
Solve the ionization history of a LCDM cosmology (Saha equilibrium, then the
Peebles three-level atom for hydrogen) and print the numbers of last
scattering: the peak of the visibility function z*, the drag redshift, the
comoving sound horizon at both, the acoustic angle theta* and multipole l_A,
distances, ages and temperatures, next to the published fitting formulas
(Hu & Sugiyama 1996 for z*, Eisenstein & Hu 1998 for z_drag).

Without options the cosmology is astropy's bundled Planck18 realization.  Any
option changes that parameter and keeps the others; the dark-energy density
follows from flatness or from --omega-k.

examples:
  cmbtools physics
  cmbtools physics --h0 70 --omega-b-h2 0.0224 --omega-c-h2 0.12
  cmbtools physics --omega-k -0.01 --json
"""


def _number(text):
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number, got {text!r}") from None
    if not math.isfinite(v):
        raise argparse.ArgumentTypeError(f"expected a finite number, got {text!r}")
    return v


def add_arguments(parser):
    parser.formatter_class = argparse.RawDescriptionHelpFormatter
    cosmo = parser.add_argument_group("cosmology (default: astropy's Planck18)")
    cosmo.add_argument("--h0", type=_number, metavar="KM_S_MPC", help="Hubble constant in km/s/Mpc (Planck18: 67.66)")
    cosmo.add_argument("--omega-b-h2", type=_number, metavar="X", help="physical baryon density Omega_b h^2 (Planck18: 0.02242)")
    cosmo.add_argument("--omega-c-h2", type=_number, metavar="X", help="physical cold dark matter density Omega_c h^2 (Planck18: 0.11933)")
    cosmo.add_argument("--omega-k", type=_number, metavar="X", help="curvature density Omega_k (Planck18: 0, flat)")
    cosmo.add_argument("--t0", type=_number, metavar="K", help="CMB temperature today in K (Planck18: 2.7255)")
    cosmo.add_argument("--neff", type=_number, metavar="N", help="effective number of neutrino species (Planck18: 3.046)")
    cosmo.add_argument("--neutrino-mass", type=_number, metavar="EV",
                       help="mass of the one massive neutrino species in eV, the other two massless (Planck18: 0.06)")
    extra = parser.add_argument_group("recombination")
    extra.add_argument("--helium", type=_number, metavar="Y_P", help="primordial helium mass fraction (default: 0.2454)")
    extra.add_argument("--peebles-fudge", type=_number, metavar="F",
                       help="fudge factor of the three-level atom's recombination rate (default: 1.14)")
    parser.add_argument("--json", action="store_true", help="print one JSON object instead of the table")


def _require(value, option, low, *, strict=True, high=None):
    from cmbtools.exceptions import InvalidInputError

    ok = value > low if strict else value >= low
    if high is not None:
        ok = ok and value < high
    if not ok:
        rng = (">" if strict else ">=") + f" {low:g}" + ("" if high is None else f" and < {high:g}")
        raise InvalidInputError(f"The '{option}' option must be {rng}. Got {value:g} instead.")


def build_cosmology(args):
    """The astropy cosmology the options describe (Planck18 itself when no option is given)."""
    from astropy.cosmology import FlatLambdaCDM, LambdaCDM, Planck18

    from cmbtools.exceptions import InvalidInputError

    names = ("h0", "omega_b_h2", "omega_c_h2", "omega_k", "t0", "neff", "neutrino_mass")
    if all(getattr(args, n) is None for n in names):
        return Planck18
    h18 = float(Planck18.H0.to_value("km/(s Mpc)")) / 100.0
    h0 = args.h0 if args.h0 is not None else 100.0 * h18
    _require(h0, "--h0", 0.0, high=1000.0)
    h2 = (h0 / 100.0) ** 2
    # physical densities are kept when only H0 changes
    ombh2 = args.omega_b_h2 if args.omega_b_h2 is not None else Planck18.Ob0 * h18**2
    omch2 = args.omega_c_h2 if args.omega_c_h2 is not None else (Planck18.Om0 - Planck18.Ob0) * h18**2
    omk = args.omega_k if args.omega_k is not None else 0.0
    t0 = args.t0 if args.t0 is not None else float(Planck18.Tcmb0.to_value("K"))
    neff = args.neff if args.neff is not None else Planck18.Neff
    mnu = args.neutrino_mass if args.neutrino_mass is not None else float(Planck18.m_nu.to_value("eV")[-1])
    _require(ombh2, "--omega-b-h2", 0.0)
    _require(omch2, "--omega-c-h2", 0.0, strict=False)
    _require(t0, "--t0", 0.0, high=100.0)
    _require(neff, "--neff", 0.0, strict=False, high=100.0)
    _require(mnu, "--neutrino-mass", 0.0, strict=False, high=100.0)
    ob0 = ombh2 / h2 if h2 > 0 else math.inf
    om0 = (ombh2 + omch2) / h2 if h2 > 0 else math.inf
    if not (math.isfinite(ob0) and math.isfinite(om0)):
        raise InvalidInputError(
            f"The cosmological parameters give non-finite density parameters (Omega_b = {ob0:g}, "
            f"Omega_m = {om0:g}): --h0 {h0:g} is far too small."
        )
    # astropy counts floor(Neff) neutrino species and wants one mass per species; the mass
    # goes to one species and the others stay massless
    n_species = int(math.floor(neff))
    if n_species == 0:
        if mnu > 0:
            raise InvalidInputError(
                f"A neutrino mass needs at least one neutrino species: give --neff >= 1, or --neutrino-mass 0. "
                f"Got --neff {neff:g} and a mass of {mnu:g} eV instead."
            )
        m_nu = 0.0
    else:
        m_nu = [0.0] * (n_species - 1) + [mnu]
    common = dict(H0=h0, Om0=om0, Ob0=ob0, Tcmb0=t0, Neff=neff, m_nu=m_nu, name="custom")
    try:
        flat = FlatLambdaCDM(**common)
        if omk == 0.0:
            return flat
        ode0 = 1.0 - om0 - omk - flat.Ogamma0 - flat.Onu0
        return LambdaCDM(Ode0=ode0, **common)
    except (ValueError, TypeError) as exc:
        raise InvalidInputError(f"The cosmological parameters are inconsistent: {exc}") from None


def _describe(cosmo, extras):
    h = float(cosmo.H0.to_value("km/(s Mpc)")) / 100.0
    mnu = float(cosmo.m_nu.to_value("eV").sum()) if cosmo.has_massive_nu else 0.0
    return {
        "name": cosmo.name or type(cosmo).__name__,
        "h0": h * 100.0,
        "omega_b_h2": cosmo.Ob0 * h * h,
        "omega_c_h2": (cosmo.Om0 - cosmo.Ob0) * h * h,
        "omega_k": float(cosmo.Ok0),
        "omega_lambda": float(cosmo.Ode0),
        "t0_k": float(cosmo.Tcmb0.to_value("K")),
        "neff": float(cosmo.Neff),
        "neutrino_mass_sum_ev": mnu,
        "helium_fraction": extras.helium_fraction,
        "peebles_fudge": extras.peebles_fudge,
    }


def _table(result, params):
    d = result
    rows = [
        ("redshift of last scattering z* (visibility peak)", f"{d.z_star:.2f}", "", f"{d.z_star_fit:.2f}  (Hu & Sugiyama 1996)"),
        ("redshift where the optical depth is 1", f"{d.z_tau_unity:.2f}", "", ""),
        ("baryon drag redshift z_drag", f"{d.z_drag:.2f}", "", f"{d.z_drag_fit:.2f}  (Eisenstein & Hu 1998)"),
        ("width of the visibility function (FWHM)", f"{d.visibility_fwhm_z:.1f}", "in z", ""),
        ("sound horizon r_s(z*)", f"{d.r_star_mpc:.3f}", "Mpc", ""),
        ("sound horizon r_s(z_drag)", f"{d.r_drag_mpc:.3f}", "Mpc", ""),
        ("100 theta* = 100 r_s(z*) / D_M(z*)", f"{100 * d.theta_star:.5f}", "", ""),
        ("acoustic multipole l_A = pi / theta*", f"{d.ell_a:.2f}", "", ""),
        ("comoving distance D_M(z*)", f"{d.dm_star_mpc:.1f}", "Mpc", ""),
        ("angular-diameter distance D_A(z*)", f"{d.da_star_mpc:.4f}", "Mpc", ""),
        ("age of the universe today", f"{d.age_gyr:.4f}", "Gyr", ""),
        ("age at z*", f"{d.age_star_kyr:.1f}", "kyr", ""),
        ("photon travel time since z*", f"{d.light_travel_gyr:.4f}", "Gyr", ""),
        ("temperature at z*, T0 (1 + z*)", f"{d.t_star_k:.1f}", "K", ""),
        ("CMB photon number density today", f"{d.n_gamma_cm3:.2f}", "cm^-3", ""),
        ("photon density Omega_gamma h^2", f"{d.omega_gamma_h2:.5e}", "", ""),
        ("Saha -> Peebles switch (x_H = 0.99)", f"{d.z_peebles_start:.1f}", "in z", ""),
        ("residual free-electron fraction at z = 200", f"{d.x_e_residual:.3e}", "", ""),
    ]
    if d.z_reionization is not None:
        rows.append(
            (f"reionization redshift (tanh, tau = {d.tau_reionization:g})", f"{d.z_reionization:.2f}", "", "")
        )
    head = ("quantity", "value", "unit", "fitting formula")
    w = [max(len(r[i]) for r in [head, *rows]) for i in range(3)]
    p = params
    lines = [
        f"cosmology: {p['name']}  H0 = {p['h0']:.2f} km/s/Mpc, Omega_b h^2 = {p['omega_b_h2']:.5f}, "
        f"Omega_c h^2 = {p['omega_c_h2']:.5f}, Omega_k = {p['omega_k']:.4g},",
        f"           T0 = {p['t0_k']:.4f} K, N_eff = {p['neff']:.3f}, sum m_nu = {p['neutrino_mass_sum_ev']:.3g} eV, "
        f"Y_p = {p['helium_fraction']:.4f}, Peebles fudge = {p['peebles_fudge']:.3g}",
        "",
        f"{head[0]:<{w[0]}}  {head[1]:>{w[1]}}  {head[2]:<{w[2]}}  {head[3]}",
        f"{'-' * w[0]}  {'-' * w[1]}  {'-' * w[2]}  {'-' * len(head[3])}",
    ]
    for name, value, unit, fit in rows:
        lines.append(f"{name:<{w[0]}}  {value:>{w[1]}}  {unit:<{w[2]}}  {fit}".rstrip())
    return "\n".join(lines)


def run(args) -> int:
    from cmbtools.physics import CosmologyExtras, last_scattering

    cosmo = build_cosmology(args)
    changes = {}
    if args.helium is not None:
        changes["helium_fraction"] = args.helium
    if args.peebles_fudge is not None:
        changes["peebles_fudge"] = args.peebles_fudge
    extras = CosmologyExtras(**changes)
    result = last_scattering(cosmo, extras)
    params = _describe(cosmo, extras)
    if args.json:
        out = result.to_dict()
        out["hundred_theta_star"] = 100.0 * result.theta_star
        out["cosmology"] = params
        print(json.dumps(out, indent=2))
    else:
        print(_table(result, params))
    return 0
