"""The built-in polarized fiducial spectra (TT, EE, BB, TE), computed from the cosmology.

Extends the semi-analytic temperature model of :mod:`cmbtools.simulate.theory_spectrum`
(same background, ionization history, tight-coupling perturbations and
flat-sky projection) with the polarization of last scattering.

Scalar E modes
--------------
Thomson scattering of a quadrupole polarizes the photons.  Summing the photon
hierarchy's quadrupole and polarization equations (Ma & Bertschinger 1995, ApJ
455, 7, eqs. 63-64, truncated above l = 2; the approach of Zaldarriaga &
Harari 1995, PRD 52, 3276) gives a relaxation equation for the polarization
source Pi = F_2 + G_0 + G_2 (here in the normalization where the temperature
multipoles are Theta_l = F_l / 4)::

    Pi' = (2/15) theta_gamma - (3/10) tau' Pi,

whose tight-coupling limit is Pi = (4/9) theta_gamma / tau': the quadrupole is
the velocity gradient over the scattering rate.  theta_gamma comes from the
damped tight-coupling solution of the temperature model; the equation is
integrated exactly for a source linear between the time nodes.  The E-mode
source is ``S_E = (3/4) g Pi`` (Seljak & Zaldarriaga 1996, ApJ 469, 437,
eq. 12), projected like the temperature with the flat-sky factor
``(l/x)^2 = 1 - mu^2`` of the spin-2 harmonics
(``sqrt((l+2)!/(l-2)!) j_l(x)/x^2 -> (l/x)^2 j_l(x)``)::

    D^EE_l = T0^2 int dtheta cos(theta) Delta_zeta^2 |S_E(k, mu)|^2 cos^4(theta),
    D^TE_l = T0^2 int dtheta cos(theta) Delta_zeta^2 Re[S_T S_E^*] cos^2(theta),

with the temperature's S_T, k and mu.  The same reionization screening as the
temperature (exp(-2 tau) on small scales) multiplies EE and TE.

Tensor B modes
--------------
Gravitational waves of power ``Delta_t^2(k) = r A_s (k/k_0)^(n_t)``,
``n_t = -r/8`` (the single-field consistency relation, common practice),
evolve as ``h'' + 2 (a'/a) h' + k^2 h = 0`` from h = 1 outside the horizon
(integrated numerically in the radiation plus matter background).  Their
shear polarizes the photons through ``Psi' = -(1/10) h' - (3/10) tau' Psi``
(tight-coupling limit Psi = -h' / (3 tau'); Pritchard & Kamionkowski 2005,
Ann. Phys. 318, 2, from memory), and the full-sky line of sight gives
(Zaldarriaga & Seljak 1997, PRD 55, 1830; from memory)::

    Delta_B,l(k) = int d eta g Psi [2 j_l'(x) + 4 j_l(x) / x],  x = k (eta_0 - eta),
    C^BB_l = (1/8) 4 pi int dk/k Delta_t^2(k) Delta_B,l(k)^2.

The factor 1/8 is 1/2 (the two polarizations share Delta_t^2) times 1/4 (the
amplitude of h in the Boltzmann source is half the metric perturbation, as we
read the conventions of those papers).  This overall normalization is the
least certain number here: it was checked only against a recalled value
(a BB peak of about 0.03 uK^2 for r = 0.2, from memory), so treat the tensor
amplitude as uncertain by up to a factor of 2.  Only last scattering is
included (no reionization bump at l < 10).

Lensing-like template
---------------------
Gravitational lensing turns E into B.  cmbtools does not compute the lensing
potential; the optional template is a smooth spectrum with the shape of the
lensing B modes, ``C^BB_l = A exp(-(l / 1000)^2)`` with A = (5 uK-arcmin)^2,
the white level of lensing B modes on large scales (peak D_l = 0.12 uK^2 at
l = 1000; common practice, values from memory).

Accuracy (stated honestly)
--------------------------
For astropy's ``Planck18`` and the default extras the model gives EE peaks at
l = 147, 405, 705, 1015, 1331 with D_l = 1.2, 22, 48, 62, 58 uK^2, TE negative near l = 150
(-49 uK^2) and positive near l = 300 (+99 uK^2, -102 uK^2 at l = 470); the measured
spectra have EE peaks near l ~ 140, 400, 690, 1000 with heights of about 1,
20, 40 and 40 uK^2 and TE ~ -50 uK^2 at l ~ 150, +115 uK^2 at l ~ 300 (from
memory).  For r = 0.1 the tensor BB peaks at l = 88 with
D_l = 0.015 uK^2 (from memory: about 0.015 uK^2 near l ~ 80).  The first
three EE peaks and the TE extrema agree with the measured ones to a few
multipoles in position and 10-20 % in height; the fourth and fifth EE peaks
are 30-50 % too high (no lensing smoothing, crude damping).  The first call
takes tens of seconds (the tensor part about half of it).  Left
out: the reionization bumps of EE, TE and BB at l < 10, tensor contributions
to TT, TE and EE, the exact lensing B modes, and everything the temperature
model leaves out.  Use these spectra for demos, simulations and validation,
never for parameter estimation; pass your own tables for anything else.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import integrate
from scipy.interpolate import CubicSpline
from scipy.special import spherical_jn

from cmbtools._core.checks import check_lmax, check_positive
from cmbtools.exceptions import InvalidInputError
from cmbtools.physics.parameters import resolve_cosmology, resolve_extras
from cmbtools.simulate import theory_spectrum as _fiducial

__all__ = ["fiducial_spectra", "lensing_bb_template"]

#: Highest multipole of the tensor B-mode computation (above it the tensor BB is set to 0; it is
#: below 1e-3 of its peak there).
_TENSOR_LMAX = 600
#: Overall factor of the tensor formula (see the module notes: the least certain number of this model).
_TENSOR_NORMALIZATION = 1.0 / 8.0
#: (5 uK-arcmin)^2 in K^2: the large-scale white level of lensing B modes (from memory).
_LENSING_WHITE = (5e-6 * math.pi / 10800.0) ** 2


def _relax(source, eta, tau, tau_prime0, rate=0.3):
    """Solve ``P' = source - rate tau' P`` on the nodes (source linear between nodes; exact).

    ``source``: (n_k, n_nodes); ``tau``: optical depth to today at the nodes (decreasing);
    the first node starts from the steady state source / (rate tau').
    """
    out = np.empty_like(source)
    out[:, 0] = source[:, 0] / (rate * tau_prime0)
    d_eta = np.diff(eta)
    x_all = rate * np.maximum(tau[:-1] - tau[1:], 0.0)
    for n in range(eta.size - 1):
        x = x_all[n]
        e = math.exp(-x)
        if x < 1e-4:
            f1, f2 = 1.0 - x / 2.0 + x * x / 6.0, 0.5 - x / 3.0 + x * x / 8.0
        else:
            f1 = (1.0 - e) / x
            f2 = (1.0 - e - x * e) / (x * x)
        s0, s1 = source[:, n], source[:, n + 1]
        out[:, n + 1] = out[:, n] * e + d_eta[n] * (s1 * f1 - (s1 - s0) * f2)
    return out


def _nodes(model):
    eta_lo = float(model.eta_of_z(1600.0))
    eta_mid = float(model.eta_of_z(650.0))
    eta_end = float(model.eta_of_z(_fiducial._Z_END))
    fine = eta_lo + np.arange(int(eta_mid - eta_lo) + 1) * 1.0
    coarse = np.geomspace(fine[-1], eta_end, 81)[1:]
    return np.concatenate([fine, coarse]), fine


def _history_at(model, eta):
    a = model.scale_factor(eta)
    z = 1.0 / a - 1.0
    g = np.asarray(model.hist.visibility(z))
    tau = np.asarray(model.hist.optical_depth(z))
    return g, tau


def _scalar_dl(model, lmax):
    """(D^TT, D^EE, D^TE) in K^2 for l = 0..lmax (flat-sky projection of the module notes)."""
    extras = model.extras
    dist = model.distance
    k_max = (lmax + 0.5) / dist + 0.45
    k = np.concatenate([np.geomspace(5e-5, 8e-3, 40, endpoint=False), np.arange(8e-3, k_max + 3e-3, 1.5e-3)])
    eta_nodes, _ = _nodes(model)
    src_a, src_b, theta_g = model.sources(k, eta_nodes, with_velocity=True)
    g, tau = _history_at(model, eta_nodes)
    tau_prime0 = float(model.tau_prime(eta_nodes[0]))
    pi_src = _relax((2.0 / 15.0) * theta_g, eta_nodes, tau, tau_prime0)
    src_e = 0.75 * g * pi_src
    n_nodes = eta_nodes.size
    spline = CubicSpline(k, np.concatenate([src_a, src_b, src_e], axis=1), axis=0)
    rel_eta = eta_nodes - model.eta_star

    ell_nodes = np.unique(np.concatenate([np.arange(2, min(lmax, 60) + 1), np.arange(60, lmax + 1, 6), [lmax]]))
    ell_nodes = ell_nodes[(ell_nodes >= 2) & (ell_nodes <= lmax)]
    x, wq = np.polynomial.legendre.leggauss(128)
    theta = 0.25 * math.pi * (x + 1.0)
    wq = 0.25 * math.pi * wq
    cos_t, sin_t = np.cos(theta), np.sin(theta)
    a_s, n_s, k0 = extras.amplitude_scalar, extras.tilt_scalar, extras.pivot_wavenumber_mpc
    nodes = {key: np.zeros(ell_nodes.size) for key in ("TT", "EE", "TE")}
    chunk = 24
    for start in range(0, ell_nodes.size, chunk):
        ells = ell_nodes[start : start + chunk].astype(float)
        k_perp = (ells + 0.5) / dist
        kk = (k_perp[:, None] / cos_t[None, :]).reshape(-1)
        mu = np.broadcast_to(sin_t, (ells.size, theta.size)).reshape(-1)
        proj = np.broadcast_to(cos_t**2, (ells.size, theta.size)).reshape(-1)  # (l/x)^2 = 1 - mu^2
        inside = kk <= k[-1]
        vals = np.zeros((kk.size, 3 * n_nodes))
        vals[inside] = spline(kk[inside])
        wts = _fiducial._hat_weights(kk * mu, rel_eta)
        s_a = np.einsum("mn,mn->m", wts, vals[:, :n_nodes])
        s_b = np.einsum("mn,mn->m", wts, vals[:, n_nodes : 2 * n_nodes])
        s_e = np.einsum("mn,mn->m", wts, vals[:, 2 * n_nodes :]) * proj
        s_t = s_a - 1j * mu * s_b
        keep = np.where(inside, 1.0, 0.0) * a_s * (kk / k0) ** (n_s - 1.0)
        for key, power in (("TT", np.abs(s_t) ** 2), ("EE", np.abs(s_e) ** 2), ("TE", (s_t * np.conj(s_e)).real)):
            nodes[key][start : start + ells.size] = (power * keep).reshape(ells.size, theta.size) @ (wq * cos_t)
    out = {}
    ell_all = np.arange(2, lmax + 1)
    for key in ("TT", "EE", "TE"):
        dl = np.zeros(lmax + 1)
        if lmax >= 2:
            if ell_nodes.size >= 2 and key != "TE":
                dl[2:] = np.exp(CubicSpline(ell_nodes, np.log(nodes[key]))(ell_all))
            elif ell_nodes.size >= 2:
                dl[2:] = CubicSpline(ell_nodes, nodes[key])(ell_all)
            else:
                dl[2:] = nodes[key]
            if model.reion_factor is not None:
                screen, ell_re = model.reion_factor
                dl[2:] *= screen + (1.0 - screen) / (1.0 + (ell_all / ell_re) ** 2)
        out[key] = dl * model.t0**2
    return out


def _tensor_bb_dl(model, lmax, r):
    """Tensor D^BB_l in K^2 for l = 0..lmax (full-sky line of sight of the module notes)."""
    lmax_t = min(lmax, _TENSOR_LMAX)
    out = np.zeros(lmax + 1)
    if lmax_t < 2 or r == 0.0:
        return out
    extras = model.extras
    k, ell_nodes, sources = _tensor_sources(model, lmax_t)
    n_t = -r / 8.0
    power = _TENSOR_NORMALIZATION * r * extras.amplitude_scalar * (k / extras.pivot_wavenumber_mpc) ** n_t
    cl_nodes = np.zeros(ell_nodes.size)
    for i, (sel, delta_b) in enumerate(sources):
        cl_nodes[i] = 4.0 * math.pi * integrate.trapezoid(power[sel] * delta_b**2 / k[sel], k[sel])
    ell_all = np.arange(2, lmax_t + 1)
    dl_nodes = ell_nodes * (ell_nodes + 1.0) * cl_nodes / (2.0 * math.pi)
    out[2 : lmax_t + 1] = np.exp(CubicSpline(ell_nodes, np.log(np.maximum(dl_nodes, 1e-300)))(ell_all))
    return out * model.t0**2


def _tensor_sources(model, lmax_t):
    """What the tensor BB takes from the cosmology, not from r: the wavenumbers, the multipole nodes and, per node,
    the wavenumbers used and the B-mode transfer ``delta_b(k)``.  Computed once per model and ``lmax_t`` (the
    gravitational-wave equation and the projections are nearly all of the cost; r only sets the primordial
    power), kept on the model."""
    kept = model.__dict__.setdefault("_tensor_sources", {})
    if lmax_t in kept:
        return kept[lmax_t]
    _, eta = _nodes(model)  # last scattering only: z = 1600 .. 650, every Mpc
    g, tau = _history_at(model, eta)
    eta0 = model.eta_star + model.distance
    dist = model.distance
    k = np.arange(2e-5, (lmax_t + 60.0) / dist + 0.02, 5e-5)
    # gravitational waves: h'' + 2 (a'/a) h' + k^2 h = 0 from h = 1, h' = 0 deep in the radiation era
    eta_i = 1e-3 / k.max()

    def rhs(t, y):
        h, dh = y[: k.size], y[k.size :]
        return np.concatenate([dh, -2.0 * float(model.conformal_hubble(t)) * dh - k * k * h])

    y0 = np.concatenate([np.ones(k.size), np.zeros(k.size)])
    sol = integrate.solve_ivp(rhs, (eta_i, float(eta[-1])), y0, t_eval=eta, rtol=1e-7, atol=1e-10, method="RK45")
    if not sol.success:  # pragma: no cover - defensive
        raise InvalidInputError(f"The tensor perturbation equation failed: {sol.message}")
    dh = sol.y[k.size :]
    psi = _relax(-0.1 * dh, eta, tau, float(model.tau_prime(eta[0])))
    weights = np.gradient(eta)
    keep = g > 1e-4 * g.max()  # the visibility vanishes elsewhere
    src = (g * psi * weights[None, :])[:, keep]
    dist_eta = (eta0 - eta)[keep]
    ell_nodes = np.unique(np.concatenate([np.arange(2, min(lmax_t, 30) + 1, 2), np.arange(30, lmax_t + 1, 30), [lmax_t]]))
    sources = []
    for ell in ell_nodes:
        sel = k * dist_eta.max() > 0.5 * ell  # j_l(x) is negligible for x < l/2
        xs = k[sel, None] * dist_eta[None, :]
        j = spherical_jn(int(ell), xs)
        dj = spherical_jn(int(ell), xs, derivative=True)
        sources.append((sel, np.sum(src[sel] * (2.0 * dj + 4.0 * j / xs), axis=1)))
    kept[lmax_t] = (k, ell_nodes, sources)
    return kept[lmax_t]


def lensing_bb_template(lmax, *, amplitude=1.0) -> np.ndarray:
    """The lensing-like B-mode template C_l in K^2, l = 0..lmax (see the module notes).

    ``amplitude * (5 uK-arcmin)^2 * exp(-(l/1000)^2)`` for l >= 2, 0 below.

    Parameters
    ----------
    lmax : int
        Largest multipole.
    amplitude : float, default=1
        Factor on the template (>= 0).

    Returns
    -------
    ndarray of shape (lmax+1,)
        C^BB_l in K^2.
    """
    lmax = check_lmax(lmax)
    amp = check_positive(amplitude, "amplitude", allow_zero=True)
    ell = np.arange(lmax + 1, dtype=float)
    cl = amp * _LENSING_WHITE * np.exp(-((ell / 1000.0) ** 2))
    cl[:2] = 0.0
    return cl


def _entry(cosmo, extras):
    return _fiducial._model_for(cosmo, extras)


def _scalar_disk_key(entry):
    """The disk-cache key of the scalar polarized spectra: the temperature model's key and this module's source."""
    from pathlib import Path

    from cmbtools._core import files as _io

    return _io.sha256_arrays("fiducial_polarized_dl", entry["disk_key"], Path(__file__).read_bytes().decode(
        "utf-8", "replace"))


def _scalar_cache_path(key, l_calc):
    from cmbtools._core import files as _io

    return _io.cache_dir() / f"fiducial_pol_dl_{key[:24]}_lmax{int(l_calc)}.npz"


def _read_scalar_cache(entry, l_calc):
    """The scalar D^TT, D^EE, D^TE to ``l_calc`` from the disk cache (same model and code), or None."""
    from cmbtools._core import files as _io

    key = _scalar_disk_key(entry)
    try:
        path = _scalar_cache_path(key, l_calc)
        if not path.exists():
            return None
        with open(path, "rb") as fh, np.load(fh, allow_pickle=False) as data:
            out = {k: np.array(data[k], dtype=np.float64) for k in ("TT", "EE", "TE")}
            ok = (str(data["model_sha256"]) == key
                  and str(data["checksum_sha256"]) == _io.sha256_arrays(out["TT"], out["EE"], out["TE"]))
    except Exception:  # an unreadable or foreign file: computed again (and rewritten)
        return None
    if not ok or any(v.size != l_calc + 1 for v in out.values()):
        return None
    return out


def _write_scalar_cache(entry, scalar):
    import warnings

    from cmbtools._core import files as _io
    from cmbtools.exceptions import CmbtoolsWarning

    key = _scalar_disk_key(entry)
    arrays = {k: np.asarray(scalar[k], dtype=np.float64) for k in ("TT", "EE", "TE")}
    try:
        with _io.atomic_output(_scalar_cache_path(key, arrays["TT"].size - 1), overwrite=True) as tmp:
            with open(tmp, "wb") as fh:
                np.savez(fh, **arrays, model_sha256=np.str_(key),
                         checksum_sha256=np.str_(_io.sha256_arrays(arrays["TT"], arrays["EE"], arrays["TE"])))
    except OSError as exc:
        warnings.warn(f"could not write the polarized fiducial-spectrum cache ({exc}); the result is not cached.",
                      CmbtoolsWarning, stacklevel=3)


def fiducial_spectra(lmax, *, cosmo=None, extras=None, tensor_ratio=0.0, lensing_bb=False) -> dict:
    """The built-in polarized fiducial spectra C_l in K^2: TT, EE, BB, TE (and zero TB, EB).

    TT is :func:`~cmbtools.simulate.fiducial_cl`; EE and TE come from the
    polarization of last scattering in the same semi-analytic model; BB is
    the tensor B modes of a tensor-to-scalar ratio ``tensor_ratio`` plus,
    optionally, a lensing-like template.  See :mod:`cmbtools.simulate.polarized_theory`
    for the equations and an honest statement of the accuracy (peak positions
    within a few per cent, heights within tens of per cent; no reionization
    bumps; the lensing B modes only as a template).

    Parameters
    ----------
    lmax : int
        Largest multipole, at most 10000.
    cosmo : astropy.cosmology.FLRW, optional
        Default astropy's ``Planck18``.
    extras : CosmologyExtras, optional
        Default ``CosmologyExtras()``.
    tensor_ratio : float, default=0
        Tensor-to-scalar ratio r at the pivot wavenumber (>= 0).
    lensing_bb : bool or float, default=False
        Add the lensing-like B-mode template (True: amplitude 1; a float
        scales it).

    Returns
    -------
    dict
        ``'TT', 'TE', 'TB', 'EE', 'EB', 'BB'`` -> ndarray of shape (lmax+1,),
        C_l in K^2 with C_0 = C_1 = 0 (TB and EB are zero).

    Notes
    -----
    The first call for a cosmology takes some seconds; results are kept in
    memory per (cosmology, extras, r), and the scalar spectra also on disk in
    ``cmbtools._core.files.cache_dir()`` (``fiducial_pol_dl_<hash>_lmax<L>.npz``, the hash covering the
    temperature model's key and the source of this module).
    """
    lmax = check_lmax(lmax)
    if lmax > _fiducial.FIDUCIAL_LMAX_LIMIT:
        raise InvalidInputError(
            f"The 'lmax' parameter must be an int in [0, {_fiducial.FIDUCIAL_LMAX_LIMIT}] for the fiducial spectrum. "
            f"Got {lmax!r} instead."
        )
    r = check_positive(tensor_ratio, "tensor_ratio", allow_zero=True)
    if r > 10.0:
        raise InvalidInputError(f"The 'tensor_ratio' parameter must be in [0, 10]. Got {tensor_ratio!r} instead.")
    if isinstance(lensing_bb, bool):
        lens_amp = 1.0 if lensing_bb else 0.0
    else:
        lens_amp = check_positive(lensing_bb, "lensing_bb", allow_zero=True)
    cosmo = resolve_cosmology(cosmo)
    extras = resolve_extras(extras)
    entry = _fiducial._model_for(cosmo, extras, build=False)  # (built only if the spectra are not cached)
    l_calc = max(2500, lmax)
    scalar = entry.setdefault("polarized", {}).get(l_calc)
    if scalar is None:
        bigger = [v for key, v in entry["polarized"].items() if key >= l_calc]
        scalar = bigger[0] if bigger else _read_scalar_cache(entry, l_calc)
        if scalar is None:
            scalar = _scalar_dl(_entry(cosmo, extras)["model"], l_calc)
            _write_scalar_cache(entry, scalar)
        entry["polarized"][l_calc] = scalar
    tensors = entry.setdefault("tensor_bb", {})
    if r not in tensors:
        tensors[r] = np.zeros(_TENSOR_LMAX + 1) if r == 0.0 else _tensor_bb_dl(_entry(cosmo, extras)["model"],
                                                                              _TENSOR_LMAX, r)
    ell = np.arange(lmax + 1, dtype=float)
    to_cl = np.zeros(lmax + 1)
    to_cl[2:] = 2.0 * math.pi / (ell[2:] * (ell[2:] + 1.0))
    tt = _fiducial.fiducial_cl(lmax, cosmo=cosmo, extras=extras)
    bb = np.zeros(lmax + 1)
    n = min(lmax, _TENSOR_LMAX) + 1
    bb[:n] = tensors[r][:n] * to_cl[:n]
    if lens_amp:
        bb += lensing_bb_template(lmax, amplitude=lens_amp)
    zero = np.zeros(lmax + 1)
    return {"TT": tt, "TE": scalar["TE"][: lmax + 1] * to_cl, "TB": zero, "EE": scalar["EE"][: lmax + 1] * to_cl,
            "EB": zero.copy(), "BB": bb}
