"""The built-in fiducial CMB temperature spectrum, computed from the cosmology.

The model is a semi-analytic approximation of the acoustic peaks built from
published equations (references below); it is not a table taken from another
program.  Its ingredients, in the order the code follows them:

1. **Background.**  Radiation (photons plus ``Neff`` massless neutrinos) and
   pressureless matter, with the exact scale factor of that mixture in
   conformal time, ``a(eta) = a_eq [(eta/eta_1)^2 + 2 eta/eta_1]``,
   ``a_eq = Omega_r / Omega_m``, ``eta_1 = 2 a_eq / (H0 sqrt(Omega_r))``
   (Mukhanov 2005, *Physical Foundations of Cosmology*, CUP, chapter 1; from
   memory).  Dark energy and curvature are negligible before z ~ 30 and are
   left out of the perturbation equations; the distance to last scattering
   D_M(z*) comes from the astropy cosmology.
2. **Perturbations** of each Fourier mode k in the conformal Newtonian gauge,
   with the equations of Ma & Bertschinger (1995, ApJ 455, 7; eq. numbers from
   memory): the potential phi from the 0i Einstein equation (eq. 23b),
   ``phi' = -H psi + 4 pi G a^2 sum (rho + p) theta / k^2``, and psi from the
   neutrino anisotropic stress (eq. 23d); cold dark matter
   ``theta_c' = -H theta_c + k^2 psi``; massless neutrinos through their
   Boltzmann hierarchy up to l = 6 with the free-streaming truncation
   (eqs. 49-51); and the tightly coupled photon-baryon fluid (Hu & Sugiyama
   1995, ApJ 444, 489, eq. 3, in Ma-Bertschinger variables)
   ``Theta_0' = -theta_g / 3 + phi'``,
   ``(1 + R) theta_g' = k^2 Theta_0 + (1 + R) k^2 psi - R H theta_g``,
   ``R = 3 rho_b / (4 rho_gamma)``.  Solving the tight-coupling equations
   numerically, instead of with the WKB solution and fitted driving term of
   Hu & Sugiyama, gives the radiation driving, the potential decay through
   matter-radiation equality, the baryon loading (odd/even peak heights) and
   the (1 + R)^-1/4 amplitude change.  The initial state is the adiabatic
   growing mode of the k -> 0 equations, integrated with the 00 Einstein
   equation from the radiation-era solution of Ma & Bertschinger (eq. 96) and
   normalised to phi = 3/5 per unit primordial curvature in matter domination
   (common practice).
3. **Diffusion (Silk) damping**, added to the oscillator as a friction
   ``-2 Gamma theta_g``, ``Gamma = k^2 [R^2/(1 + R) + 8/9] / (6 (1 + R) tau')``,
   so that the oscillations decay as ``exp(-k^2 / k_D^2)`` with
   ``k_D^-2 = int d eta [R^2/(1 + R) + 8/9] / (6 (1 + R) tau')`` (Kaiser 1983,
   MNRAS 202, 1169; the factor 8/9, which includes polarization, as in
   Dodelson 2003, *Modern Cosmology*, eq. 8.38; from memory).  The scattering
   rate ``tau' = n_e sigma_T a`` and the visibility come from cmbtools' own
   ionization history (:class:`~cmbtools.physics.IonizationHistory`: Saha and
   the Peebles three-level atom).  Baryons leave the photons around the drag
   epoch: their weight in the oscillator is ``R (1 - exp(-tau_d^3))``, a
   smoothed step at tau_d = 1 (our choice).  After decoupling the friction,
   capped at ``Gamma <= 2 Mpc^-1``, wipes out the photon fluid on small
   scales, a crude stand-in for photon free streaming.
4. **Projection** on the sky in the flat-sky, large-l approximation of
   Mukhanov (2004, Int. J. Theor. Phys. 43, 669, "CMB-slow, or how to estimate
   cosmological parameters by hand": the average of j_l^2 over its
   oscillations; from memory), extended with the finite thickness of last
   scattering and the integrated Sachs-Wolfe (ISW) term of the line-of-sight
   integral (Seljak & Zaldarriaga 1996, ApJ 469, 437, eq. 12)::

       D_l = l(l+1) C_l / 2 pi = T0^2 int_0^{pi/2} d theta cos(theta) Delta_zeta^2(k) |S(k, mu)|^2,
       k = (l + 1/2) / (D_M cos theta),  mu = sin(theta),
       S(k, mu) = int d eta exp(i k mu (eta - eta_*)) [ g (Theta_0 + psi) - i mu g theta_b / k
                                                        + exp(-tau) (phi' + psi') ],

   with the visibility g = tau' exp(-tau) and the primordial spectrum
   ``Delta_zeta^2 = A_s (k / k_0)^(n_s - 1)``.  The time integral is done
   exactly for sources linear between nodes (a Filon-type rule).  For a sharp
   last scattering in matter domination this is the Sachs-Wolfe plateau
   ``D_l = T0^2 A_s / 25`` (Sachs & Wolfe 1967, ApJ 147, 73; with
   Theta_0 + psi = psi/3 and psi = (3/5) zeta: common practice).
5. **Reionization** multiplies the spectrum by
   ``exp(-2 tau_re) + (1 - exp(-2 tau_re)) / (1 + (l / l_re)^2)``, where
   ``l_re`` is the multipole of the horizon at the reionization redshift:
   scales inside that horizon are screened by exp(-2 tau) (common practice);
   the interpolation between the two limits is our own.

Accuracy (stated honestly).  For astropy's ``Planck18`` and the default
:class:`~cmbtools.physics.CosmologyExtras` the model gives peaks at
l = 223, 532, 817, 1136, 1442 with D_l = 5500, 2550, 2840, 1340, 1030 uK^2
and troughs at l = 407, 666 with 1580, 1630 uK^2; D_10 = 580 uK^2 and
D_2000 = 250 uK^2.  The Planck 2018 best-fit spectrum has its peaks at
l ~ 220, 537, 810, 1125, 1445 with D_l ~ 5750, 2600, 2500, 1230, 800 uK^2
(from memory), so the peak positions agree to a few multipoles and the
heights to about 5 % (first two), 15 % (third), 10 % (fourth) and 30 %
(fifth).  Left out: gravitational lensing (which lowers the peaks by a few
per cent and fills the troughs), the late (dark-energy) ISW effect that
raises D_l by tens of per cent at l < 20 (so the plateau here, ~550-600
uK^2, is below the measured one), the breakdown of tight coupling during
recombination beyond the damping friction, photon polarization as a
dynamical variable, tensor modes and secondary anisotropies.  The flat-sky
projection is least accurate at l < 10.  Use the spectrum for demos,
simulations and validation, never for parameter estimation.
"""

from __future__ import annotations

import math
import warnings

import numpy as np
from scipy import integrate
from scipy.interpolate import CubicSpline

from cmbtools.physics.parameters import resolve_cosmology, resolve_extras
from cmbtools._core import files as _io
from cmbtools._core.checks import check_lmax
from cmbtools.exceptions import CmbtoolsWarning, InvalidInputError

__all__ = ["fiducial_cl", "fiducial_dl", "FIDUCIAL_LMAX_LIMIT"]

#: What the built-in spectra are, in the words of every message, run record and table header that names them:
#: cmbtools' own model evaluated for the parameter set astropy bundles as ``Planck18`` (with the default
#: ``CosmologyExtras``), not a published spectrum.
FIDUCIAL_MODEL = "cmbtools' model with astropy's Planck18 parameters"
#: The name of the built-in temperature spectrum in messages and records.
FIDUCIAL_LABEL = f"built-in fiducial spectrum ({FIDUCIAL_MODEL})"

#: Largest multipole :func:`fiducial_cl` computes (the model is meaningless far into the damping tail).
FIDUCIAL_LMAX_LIMIT = 10000

#: Speed of light in km/s (exact, SI definition).
_C_KM_S = 299792.458
#: (7/8) (4/11)^(4/3): energy density of one massless neutrino species relative to photons.
_NU_PER_SPECIES = 7.0 / 8.0 * (4.0 / 11.0) ** (4.0 / 3.0)
#: Damping-friction cap after decoupling, Mpc^-1 (numerical; see the module notes).
_GAMMA_CAP = 2.0
#: Redshift where the integration of the perturbations (and the ISW term) stops.
_Z_END = 30.0
#: Modes with k above this (Mpc^-1) stop at _Z_END_SMALL_SCALES.
_K_SPLIT = 0.08
_Z_END_SMALL_SCALES = 300.0
#: Highest multipole of the massless-neutrino hierarchy.
_NU_LMAX = 6

_cache: dict = {}
_CACHE_SIZE = 8


def _cosmo_key(cosmo):
    parts = [type(cosmo).__qualname__]
    for name, value in cosmo.parameters.items():
        v = getattr(value, "value", value)
        parts.append((name, None if v is None else np.asarray(v, dtype=float).tobytes()))
    return tuple(parts)


class _Model:
    """The background, ionization history and perturbation solution of one cosmology."""

    def __init__(self, cosmo, extras):
        from cmbtools.physics.ionization_history import IonizationHistory

        self.t0 = float(cosmo.Tcmb0.to_value("K"))
        self.h0 = float(cosmo.H0.to_value("km/(s Mpc)")) / _C_KM_S  # Mpc^-1
        om_gamma = float(cosmo.Ogamma0)
        om_nu = om_gamma * float(cosmo.Neff) * _NU_PER_SPECIES
        self.om_b = float(cosmo.Ob0)
        self.om_c = float(cosmo.Om0) - self.om_b
        self.om_gamma, self.om_nu = om_gamma, om_nu
        self.om_m = self.om_b + self.om_c
        self.om_r = om_gamma + om_nu
        self.a_eq = self.om_r / self.om_m
        self.eta_1 = 2.0 * self.a_eq / (self.h0 * math.sqrt(self.om_r))
        self.r_coeff = 0.75 * self.om_b / om_gamma  # R = r_coeff * a
        self.extras = extras

        hist = IonizationHistory(cosmo, extras, with_reionization=False)
        self.hist = hist
        z_tab = np.asarray(hist.redshift)
        keep = z_tab > 0
        z_tab = z_tab[keep]
        eta_tab = self.eta_of_z(z_tab)
        order = np.argsort(eta_tab)
        self._eta_tab = eta_tab[order]
        zt = z_tab[order]
        a_tab = 1.0 / (1.0 + zt)
        dtau_dz = np.asarray(hist.optical_depth_derivative(zt))
        tau_prime = dtau_dz * self.conformal_hubble(self._eta_tab) / a_tab  # Mpc^-1
        self._log_tau_prime = np.log(np.maximum(tau_prime, 1e-300))
        self._tau_drag = np.asarray(hist.drag_optical_depth(zt))
        self._z_top = float(z_tab.max())
        self.eta_top = float(self._eta_tab[0])

        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            from cmbtools.physics.last_scattering_surface import last_scattering

            ls = last_scattering(cosmo, extras)
        self.z_star = ls.z_star
        self.distance = ls.dm_star_mpc  # comoving distance to last scattering, Mpc
        self.eta_star = float(self.eta_of_z(self.z_star))
        self.reion_factor = self._reionization(cosmo, extras, ls)

    # -- background in conformal time (radiation + matter)
    def scale_factor(self, eta):
        s = np.asarray(eta) / self.eta_1
        return self.a_eq * (s * s + 2.0 * s)

    def conformal_hubble(self, eta):
        s = np.asarray(eta) / self.eta_1
        return 2.0 * (s + 1.0) / (self.eta_1 * s * (s + 2.0))

    def eta_of_z(self, z):
        a = 1.0 / (1.0 + np.asarray(z, dtype=float))
        return self.eta_1 * (np.sqrt(1.0 + a / self.a_eq) - 1.0)

    def tau_prime(self, eta):
        """Conformal Thomson scattering rate n_e sigma_T a (Mpc^-1); +inf above the table."""
        eta = np.asarray(eta, dtype=float)
        out = np.exp(np.interp(eta, self._eta_tab, self._log_tau_prime))
        return np.where(eta < self.eta_top, np.inf, out)

    def baryon_weight(self, eta):
        """1 - exp(-tau_drag): 1 while baryons move with the photons, 0 after the drag epoch."""
        eta = np.asarray(eta, dtype=float)
        td = np.interp(eta, self._eta_tab, self._tau_drag)
        return np.where(eta < self.eta_top, 1.0, -np.expm1(-(td**3)))

    def _reionization(self, cosmo, extras, ls):
        tau_re = extras.reionization_optical_depth
        if tau_re == 0.0 or ls.z_reionization is None:
            return None
        z_re = ls.z_reionization
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            d_re = float(cosmo.comoving_transverse_distance(z_re).to_value("Mpc"))
            d_star = ls.dm_star_mpc
        # conformal time at z_re: distance from z_re to last scattering plus eta_star
        eta_re = (d_star - d_re) + self.eta_star
        ell_re = math.pi * d_re / eta_re
        return math.exp(-2.0 * tau_re), ell_re

    # -- perturbations
    def _superhorizon_state(self, eta_i):
        """State of the adiabatic growing mode at ``eta_i`` in the limit k -> 0.

        Integrates the k = 0 equations from deep in the radiation era, with the
        potential from the 00 Einstein equation (which, unlike the 0i equation
        used later, enforces the energy constraint), starting from the leading
        radiation-era solution of Ma & Bertschinger (1995, eq. 96):
        delta_r = -2 psi, delta_m = 3/4 delta_r, theta = k^2 eta psi / 2,
        sigma_nu = (k eta)^2 psi / 15, phi = (1 + 2 R_nu / 5) psi.  It then
        rescales the solution so that the potential of matter domination is
        phi = 3/5 per unit primordial curvature (common practice: Phi = (3/5) zeta).
        Returns the state vector of :meth:`solve` (velocities as theta/k^2,
        shear as sigma/k^2, higher neutrino moments as F_l / k^l).
        """
        h0sq = 1.5 * self.h0**2
        r_nu = self.om_nu / self.om_r
        n_hi = _NU_LMAX - 2  # G_3 .. G_L

        def state0(eta):
            psi = 1.0
            u = 0.5 * eta * psi
            s = eta * eta * psi / 15.0
            return np.concatenate([[(1.0 + 0.4 * r_nu) * psi, u, u, u, s], np.zeros(n_hi)])

        eta0 = 1e-6 * self.eta_1
        y_start = state0(eta0)
        phi_start = y_start[0]
        dr0, dm0 = -2.0, -1.5  # delta_r and delta_m at eta0 per unit psi (leading order)

        def derivs(eta, y):
            phi, u_c, u_g, u_nu, s = y[:5]
            g_hi = y[5:]
            a = float(self.scale_factor(eta))
            hc = float(self.conformal_hubble(eta))
            r = self.r_coeff * a
            psi = phi - 4.0 * h0sq * self.om_nu * s / (a * a)
            d_r = dr0 + 4.0 * (phi - phi_start)
            d_m = dm0 + 3.0 * (phi - phi_start)
            drho = (h0sq / a) * self.om_m * d_m + (h0sq / (a * a)) * self.om_r * d_r  # 4 pi G a^2 delta rho
            dphi = -hc * psi - drho / (3.0 * hc)
            out = np.empty_like(y)
            out[0] = dphi
            out[1] = -hc * u_c + psi
            out[2] = (0.25 * d_r + (1.0 + r) * psi - r * hc * u_g) / (1.0 + r)
            out[3] = 0.25 * d_r + psi
            out[4] = (4.0 / 15.0) * u_nu
            g_prev = 2.0 * s
            for j in range(n_hi):
                ell = j + 3
                out[5 + j] = ell * g_prev / (2 * ell + 1)
                g_prev = g_hi[j]
            return out

        def run(eta_end):
            sol = integrate.solve_ivp(derivs, (eta0, eta_end), y_start, method="RK45", rtol=1e-10, atol=1e-14,
                                      first_step=0.1 * eta0)
            return sol.y[:, -1]

        late = run(3e3 * self.eta_1)  # a / a_eq ~ 1e7: deep in matter domination
        scale = 0.6 / late[0]
        y = run(eta_i) * scale
        phi = y[0]
        d_r = (dr0 + 4.0 * (y[0] / scale - phi_start)) * scale
        return {"phi": phi, "u_c": y[1], "theta0": 0.25 * d_r, "u_g": y[2], "d_nu": d_r,
                "u_nu": y[3], "s": y[4], "g_hi": y[5:]}

    def sources(self, k, eta_nodes, with_velocity=False):
        """Sources g(Theta0 + psi) + e^-tau (phi' + psi') and g theta_b / k at the nodes, for every k.

        Modes above ``_K_SPLIT`` are integrated only to z = ``_Z_END_SMALL_SCALES``: later
        their ISW term is negligible and the visibility is zero, so their sources are set
        to 0 there (this halves the cost).  Returns two arrays of shape (len(k), len(eta_nodes)).
        """
        src_a = np.zeros((k.size, eta_nodes.size))
        src_b = np.zeros((k.size, eta_nodes.size))
        theta_g = np.zeros((k.size, eta_nodes.size))
        eta_cut = float(self.eta_of_z(_Z_END_SMALL_SCALES))
        eta_i = min(1e-2 / k.max(), 1e-3 * self.eta_1)
        start = self._superhorizon_state(eta_i)
        for sel, last in ((k <= _K_SPLIT, eta_nodes.size), (k > _K_SPLIT, int(np.searchsorted(eta_nodes, eta_cut)) + 1)):
            if np.any(sel):
                a_part, b_part, t_part = self.solve(k[sel], eta_nodes[:last], eta_i, start, with_velocity=True)
                src_a[sel, :last] = a_part
                src_b[sel, :last] = b_part
                theta_g[sel, :last] = t_part
        if with_velocity:  # the photon velocity divergence theta_gamma (Mpc^-1), for the polarization source
            return src_a, src_b, theta_g
        return src_a, src_b

    def solve(self, k, eta_nodes, eta_i, start, with_velocity=False):
        """Sources (see :meth:`sources`) of the modes ``k`` at the nodes, integrating to the last node.

        State per mode: phi, u_c, Theta_0, u_g, delta_nu, u_nu, s, G_3 .. G_L with u = theta / k^2,
        s = sigma_nu / k^2 and G_l = F_nu,l / k^l (every variable O(1) for any k).  Massless
        neutrinos follow the Boltzmann hierarchy of Ma & Bertschinger (1995, eq. 49) up to
        l = L with their truncation (eq. 51); their anisotropic stress makes psi differ from phi:
        k^2 (phi - psi) = 12 pi G a^2 (rho + p)_nu sigma_nu (their eq. 23d).
        """
        nk = k.size
        k2 = k * k
        h0sq = 1.5 * self.h0**2
        om_c, om_b, om_g, om_n = self.om_c, self.om_b, self.om_gamma, self.om_nu
        n_hi = _NU_LMAX - 2
        n_var = 7 + n_hi

        def psi_of(phi, s, a):
            return phi - 4.0 * h0sq * om_n * s / (a * a)

        def derivs(eta, y):
            y = y.reshape(n_var, nk)
            phi, u_c, t0, u_g, d_nu, u_nu, s = y[:7]
            a = float(self.scale_factor(eta))
            hc = float(self.conformal_hubble(eta))
            w = float(self.baryon_weight(eta))
            r = self.r_coeff * a * w
            psi = psi_of(phi, s, a)
            u_b = w * u_g + (1.0 - w) * u_c
            # 4 pi G a^2 (rho + p) theta / k^2, summed over the components
            mom = (h0sq / a) * (om_c * u_c + om_b * u_b) + (h0sq / (a * a)) * (4.0 / 3.0) * (om_g * u_g + om_n * u_nu)
            dphi = -hc * psi + mom
            tp = float(self.tau_prime(eta))
            if np.isfinite(tp):
                gam = k2 * (r * r / (1.0 + r) + 8.0 / 9.0) / (6.0 * (1.0 + r) * tp)
                np.minimum(gam, _GAMMA_CAP, out=gam)
            else:
                gam = 0.0
            out = np.empty_like(y)
            out[0] = dphi
            out[1] = -hc * u_c + psi
            out[2] = -k2 * u_g / 3.0 + dphi
            out[3] = (t0 + (1.0 + r) * psi - r * hc * u_g) / (1.0 + r) - 2.0 * gam * u_g
            out[4] = -(4.0 / 3.0) * k2 * u_nu + 4.0 * dphi
            out[5] = 0.25 * d_nu - k2 * s + psi
            out[6] = (4.0 / 15.0) * u_nu - 0.3 * k2 * y[7]
            g = y[7:]
            g_prev = 2.0 * s
            for j in range(n_hi - 1):
                ell = j + 3
                out[7 + j] = (ell * g_prev - (ell + 1) * k2 * g[j + 1]) / (2 * ell + 1)
                g_prev = g[j]
            out[7 + n_hi - 1] = g_prev - (_NU_LMAX + 1) * g[n_hi - 1] / eta
            return out.reshape(-1)

        y0 = np.empty((n_var, nk))
        for i, name in enumerate(("phi", "u_c", "theta0", "u_g", "d_nu", "u_nu", "s")):
            y0[i] = start[name]
        y0[7:] = np.asarray(start["g_hi"])[:, None]
        sol = integrate.solve_ivp(
            derivs, (eta_i, float(eta_nodes[-1])), y0.reshape(-1), method="RK45",
            t_eval=eta_nodes, rtol=1e-5, atol=1e-9, first_step=0.1 * eta_i,
        )
        if not sol.success:  # pragma: no cover - defensive
            raise InvalidInputError(f"The fiducial-spectrum perturbation equations failed: {sol.message}")
        ys = sol.y.reshape(n_var, nk, -1)
        phi, u_c, t0, u_g, u_nu, s = ys[0], ys[1], ys[2], ys[3], ys[5], ys[6]
        a = self.scale_factor(eta_nodes)
        hc = self.conformal_hubble(eta_nodes)
        w = self.baryon_weight(eta_nodes)
        u_b = w * u_g + (1.0 - w) * u_c
        psi = psi_of(phi, s, a)
        mom = (h0sq / a) * (om_c * u_c + om_b * u_b) + (h0sq / (a * a)) * (4.0 / 3.0) * (om_g * u_g + om_n * u_nu)
        dphi = -hc * psi + mom
        # psi' from psi = phi - 4 (3/2) H0^2 Om_nu s / a^2
        ds = (4.0 / 15.0) * u_nu - 0.3 * (k2[:, None]) * ys[7]
        dpsi = dphi - 4.0 * h0sq * om_n * (ds / (a * a) - 2.0 * hc * s / (a * a))
        phi_for_src = psi
        z_nodes = 1.0 / a - 1.0
        g = np.asarray(self.hist.visibility(z_nodes))
        tau = np.asarray(self.hist.optical_depth(z_nodes))
        src_a = g * (t0 + phi_for_src) + np.exp(-tau) * (dphi + dpsi)
        src_b = g * u_g * k[:, None]  # g theta_b / k, baryons moving with the photons at last scattering
        if with_velocity:
            return src_a, src_b, u_g * k2[:, None]
        return src_a, src_b


def _hat_weights(omega, eta):
    """Integrals of the piecewise-linear hat functions on ``eta`` times exp(i omega eta).

    ``omega`` of shape (m,), ``eta`` of shape (n,) (relative to the phase origin);
    returns (m, n) complex weights so that sum_n W f_n = int f(eta) e^{i omega eta} d eta
    for f linear between nodes (exact for any omega: a Filon-type quadrature).
    """
    h = np.diff(eta)
    h_unique, which = np.unique(np.round(h, 9), return_inverse=True)
    om = omega[:, None]
    t = om * h_unique[None, :]

    def f(t):
        # F(t) = int_0^1 (1 - v) exp(-i t v) dv, with a series near t = 0
        small = np.abs(t) < 0.05
        it = 1j * np.where(small, 1.0, t)
        exact = 1.0 / it - (1.0 - np.exp(-it)) / (it * it)
        series = 0.5 - 1j * t / 6.0 - t * t / 24.0 + 1j * t**3 / 120.0
        return np.where(small, series, exact)

    f_t = f(t)
    left = (h_unique[None, :] * f_t)[:, which]  # segment ending at node n+1
    right = (h_unique[None, :] * np.conj(f_t))[:, which]  # segment starting at node n (F(-t) = conj F(t))
    w = np.zeros((omega.size, eta.size), dtype=np.complex128)
    w[:, 1:] += left
    w[:, :-1] += right
    w *= np.exp(1j * om * eta[None, :])
    return w


def _compute_dl(model: _Model, lmax: int) -> np.ndarray:
    """D_l (K^2) for l = 0..lmax from the model (D_0 = D_1 = 0)."""
    extras = model.extras
    dist = model.distance
    k_max = (lmax + 0.5) / dist + 0.45
    k = np.concatenate([np.geomspace(5e-5, 8e-3, 40, endpoint=False), np.arange(8e-3, k_max + 3e-3, 1.5e-3)])
    # nodes in conformal time: every Mpc across last scattering, then coarser for the ISW tail
    eta_lo = float(model.eta_of_z(1600.0))
    eta_mid = float(model.eta_of_z(650.0))
    eta_end = float(model.eta_of_z(_Z_END))
    fine = eta_lo + np.arange(int(eta_mid - eta_lo) + 1) * 1.0
    coarse = np.geomspace(fine[-1], eta_end, 81)[1:]
    eta_nodes = np.concatenate([fine, coarse])
    src_a, src_b = model.sources(k, eta_nodes)
    spline = CubicSpline(k, np.concatenate([src_a, src_b], axis=1), axis=0)
    n_nodes = eta_nodes.size
    rel_eta = eta_nodes - model.eta_star

    ell_nodes = np.unique(np.concatenate([np.arange(2, min(lmax, 60) + 1), np.arange(60, lmax + 1, 6), [lmax]]))
    ell_nodes = ell_nodes[(ell_nodes >= 2) & (ell_nodes <= lmax)]
    x, wq = np.polynomial.legendre.leggauss(128)
    theta = 0.25 * math.pi * (x + 1.0)
    wq = 0.25 * math.pi * wq
    cos_t, sin_t = np.cos(theta), np.sin(theta)
    a_s, n_s, k0 = extras.amplitude_scalar, extras.tilt_scalar, extras.pivot_wavenumber_mpc

    dl_nodes = np.zeros(ell_nodes.size)
    chunk = 24
    for start in range(0, ell_nodes.size, chunk):
        ells = ell_nodes[start : start + chunk].astype(float)
        k_perp = (ells + 0.5) / dist
        kk = (k_perp[:, None] / cos_t[None, :]).reshape(-1)
        mu = np.broadcast_to(sin_t, (ells.size, theta.size)).reshape(-1)
        inside = kk <= k[-1]
        vals = np.zeros((kk.size, 2 * n_nodes))
        vals[inside] = spline(kk[inside])
        omega = kk * mu
        wts = _hat_weights(omega, rel_eta)
        s_a = np.einsum("mn,mn->m", wts, vals[:, :n_nodes])
        s_b = np.einsum("mn,mn->m", wts, vals[:, n_nodes:])
        total = s_a - 1j * mu * s_b
        power = (total.real**2 + total.imag**2) * np.where(inside, 1.0, 0.0)
        prim = a_s * (kk / k0) ** (n_s - 1.0)
        integrand = (power * prim).reshape(ells.size, theta.size)
        dl_nodes[start : start + ells.size] = integrand @ (wq * cos_t)

    dl = np.zeros(lmax + 1)
    if lmax >= 2:
        ell_all = np.arange(2, lmax + 1)
        if ell_nodes.size >= 2:
            dl[2:] = CubicSpline(ell_nodes, np.log(dl_nodes))(ell_all)
            dl[2:] = np.exp(dl[2:])
        else:
            dl[2:] = dl_nodes
        if model.reion_factor is not None:
            screen, ell_re = model.reion_factor
            dl[2:] *= screen + (1.0 - screen) / (1.0 + (ell_all / ell_re) ** 2)
    return dl * model.t0**2


def _model_for(cosmo, extras, *, build=True):
    """The cache entry of a (cosmology, extras): its model (built now unless ``build`` is False) and spectra."""
    key = (_cosmo_key(cosmo), tuple(sorted(extras.to_dict().items())))
    entry = _cache.get(key)
    if entry is None:
        if len(_cache) >= _CACHE_SIZE:
            _cache.pop(next(iter(_cache)))
        entry = {"model": None, "dl": {}, "disk_key": _disk_key(key), "inputs": (cosmo, extras)}
        _cache[key] = entry
    if build and entry["model"] is None:
        entry["model"] = _Model(*entry["inputs"])
    return entry


def _model_sources_hash() -> str:
    """Hash of the source code the spectrum depends on (this module and the physics package)."""
    from pathlib import Path

    import cmbtools.physics as physics

    files = [Path(__file__)] + sorted(Path(physics.__file__).parent.glob("*.py"))
    return _io.sha256_arrays(*[f.read_bytes().decode("utf-8", "replace") for f in files])


def _disk_key(model_key) -> str:
    return _io.sha256_arrays("fiducial_dl", repr(model_key), _model_sources_hash())


def _disk_path(disk_key, l_calc):
    return _io.cache_dir() / f"fiducial_dl_{disk_key[:24]}_lmax{int(l_calc)}.npz"


def _read_disk_cache(disk_key, l_calc):
    """D_l computed to ``l_calc`` from the disk cache (a file written for the same model and code), or None."""
    try:
        path = _disk_path(disk_key, l_calc)
        if not path.exists():
            return None
        with open(path, "rb") as fh, np.load(fh, allow_pickle=False) as data:
            dl = np.array(data["dl"], dtype=np.float64)
            ok = str(data["model_sha256"]) == disk_key and str(data["checksum_sha256"]) == _io.sha256_arrays(dl)
    except Exception:  # an unreadable or foreign file: computed again (and rewritten)
        return None
    if not ok or dl.size != l_calc + 1:
        return None
    return dl


def _write_disk_cache(disk_key, dl):
    try:
        with _io.atomic_output(_disk_path(disk_key, dl.size - 1), overwrite=True) as tmp:
            with open(tmp, "wb") as fh:
                np.savez(fh, dl=dl, model_sha256=np.str_(disk_key), checksum_sha256=np.str_(_io.sha256_arrays(dl)))
    except OSError as exc:
        warnings.warn(f"could not write the fiducial-spectrum cache ({exc}); the result is not cached.",
                      CmbtoolsWarning, stacklevel=3)


def fiducial_dl(lmax, *, cosmo=None, extras=None) -> np.ndarray:
    """The fiducial D_l = l(l+1) C_l / 2 pi in K^2 for l = 0..lmax (D_0 = D_1 = 0).

    See :func:`fiducial_cl` and the module notes for the model.

    Parameters
    ----------
    lmax : int
        Largest multipole (at most :data:`FIDUCIAL_LMAX_LIMIT`).
    cosmo : astropy.cosmology.FLRW, optional
        Expansion history (default ``Planck18``).
    extras : CosmologyExtras, optional
        What astropy lacks (default ``CosmologyExtras()``).

    Returns
    -------
    ndarray of shape (lmax+1,)
        D_l in K^2.
    """
    lmax = check_lmax(lmax)
    if lmax > FIDUCIAL_LMAX_LIMIT:
        raise InvalidInputError(
            f"The 'lmax' parameter must be an int in [0, {FIDUCIAL_LMAX_LIMIT}] for the fiducial spectrum. "
            f"Got {lmax!r} instead."
        )
    cosmo = resolve_cosmology(cosmo)
    extras = resolve_extras(extras)
    entry = _model_for(cosmo, extras, build=False)  # (built only if the spectrum is not on disk)
    # compute on a grid that does not depend on the requested lmax below 2500,
    # so that fiducial_cl(100) is fiducial_cl(2000)[:101]
    l_calc = max(2500, lmax)
    dl = entry["dl"].get(l_calc)
    if dl is None:
        bigger = [v for key, v in entry["dl"].items() if key >= l_calc]
        if bigger:
            dl = bigger[0]
        else:
            dl = _read_disk_cache(entry["disk_key"], l_calc)
            if dl is None:
                dl = _compute_dl(_model_for(cosmo, extras)["model"], l_calc)
                _write_disk_cache(entry["disk_key"], dl)
            dl.setflags(write=False)
            entry["dl"][l_calc] = dl
    return np.array(dl[: lmax + 1])


def fiducial_cl(lmax, *, cosmo=None, extras=None) -> np.ndarray:
    """The built-in fiducial CMB temperature power spectrum C_l in K^2, l = 0..lmax.

    Computed by cmbtools itself from the cosmology with a semi-analytic model
    of the acoustic peaks: the tight-coupling equations of Hu & Sugiyama
    (1995) for the photon-baryon fluid in the potentials of Ma & Bertschinger
    (1995) (with free-streaming neutrinos), Silk damping, the finite thickness
    of last scattering from cmbtools' ionization history, the early ISW
    effect and reionization screening, projected with the flat-sky formula of
    Mukhanov (2004).  At low l it reduces to the Sachs-Wolfe plateau
    ``D_l = T0^2 A_s / 25``.  See :mod:`cmbtools.simulate.theory_spectrum` for the equations
    and an honest statement of the accuracy: peak positions within a few
    multipoles and heights within 5-30 % of the Planck 2018 best fit; no
    lensing and no late ISW.

    Parameters
    ----------
    lmax : int
        Largest multipole, at most 10000.
    cosmo : astropy.cosmology.FLRW, optional
        Expansion history and densities (default: astropy's ``Planck18``).
    extras : CosmologyExtras, optional
        Amplitude A_s, tilt n_s and pivot of the primordial spectrum, helium
        fraction and reionization optical depth (default: ``CosmologyExtras()``).

    Returns
    -------
    cl : ndarray of float64, shape (lmax+1,)
        C_l in K^2 (thermodynamic), with ``C_0 = C_1 = 0``.

    Notes
    -----
    The first call for a cosmology takes a few seconds (ionization history and
    perturbation equations); results are kept in memory per (cosmology,
    extras), so later calls are immediate, and in cmbtools' cache directory
    (``cmbtools._core.files.cache_dir()``, one file per cosmology, extras,
    computed lmax and version of the model's source code), so a new process reads them.  The spectrum up to l = 2500 is
    always computed on the same grid, so a shorter ``lmax`` returns a prefix
    of a longer one.
    """
    dl = fiducial_dl(lmax, cosmo=cosmo, extras=extras)
    ell = np.arange(dl.size, dtype=float)
    cl = np.zeros_like(dl)
    cl[2:] = 2.0 * math.pi * dl[2:] / (ell[2:] * (ell[2:] + 1.0))
    return cl
