"""Equations of state of the bulk reservoir: pressure <-> fugacity, bulk density, p_sat.

The grand canonical simulation needs the activity z = beta*f of the bulk gas at the kernel's
temperature and pressure, and the excess amount needs the bulk density; both come from one
named equation of state (see the conventions):

``"reference"``
    The real gas's reference equation of state through CoolProp (HEOS backend; fluid name =
    ``Probe.reference_eos``). The default wherever the probe has one.
``"peng-robinson"``
    Peng & Robinson, Ind. Eng. Chem. Fundam. 15 (1976) 59, with the probe's real-gas critical
    constants and acentric factor. kappa from the 1976 correlation; for omega > 0.49 the 1978
    extension (Robinson & Peng, GPA Research Report RR-28, 1978; citation from memory) is
    used instead, as is common practice for heavy components. Omega_a and Omega_b are the
    exact solution of the critical conditions (the paper prints them rounded), so the
    EOS's critical point is the probe's (T_c, p_c). The 1976 alpha(T) is used at all T (it
    turns upward again only for T/T_c > (1 + 1/kappa)^2, far above any kernel here). The
    stable root is the one of lowest ln(phi) (lowest Gibbs energy).
``"lennard-jones"``
    The full-potential (untruncated) Lennard-Jones EOS of Thol, Rutkai, Koster, Lustig, Span
    & Vrabec, J. Phys. Chem. Ref. Data 45 (2016) 023101, through teqp (kind
    ``"LJ126_TholJPCRD2016"``). teqp works in LJ reduced units with R = 1 (checked when the
    model is built); conversion uses the probe's epsilon_k and sigma_nm. Note: it describes
    the *full* LJ fluid; a truncated-potential simulation is not consistent with it. The
    paper states a range of validity (about 0.66 < T* < 9, p* < 65; from memory) that is
    not enforced here.
``"ideal"``
    f = p, rho = p/kT, h_res = 0.

Every EOS object caches its CoolProp/teqp object and the saturation state per temperature,
so :meth:`EquationOfState.state` can be called for a whole kernel grid. The objects are not
thread-safe (a CoolProp AbstractState is stateful); they pickle (the library objects are
rebuilt lazily in the new process).

Phase labels: ``"supercritical"`` for T >= T_c of the EOS (whatever the pressure),
``"vapour"`` / ``"liquid"`` for the stable phase below T_c (p <= p_sat is vapour), and
``"ideal"`` for the ideal gas.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy.optimize import brentq

from gcmc.errors import InputError
from gcmc.physics.model import Probe
from gcmc.physics.units import AVOGADRO_PER_MOL, BOLTZMANN_J_PER_K, NM3_PER_M3

EOS_NAMES = ("reference", "peng-robinson", "lennard-jones", "ideal")

#: Bracket limits of the pressure searches (Pa); a fugacity needing p beyond them is refused.
_P_MAX_PA = 1.0e10
_P_MIN_PA = 1.0e-30
_SQRT2 = math.sqrt(2.0)


@dataclass(frozen=True)
class BulkState:
    """One bulk state of the reservoir, in the units of the project's interfaces."""

    eos: str
    temperature_K: float
    pressure_Pa: float
    fugacity_Pa: float
    fugacity_coefficient: float
    density_per_nm3: float  # molecules per nm^3 of the bulk gas/fluid
    compressibility: float  # Z = p / (rho k T), with the EOS's own gas constant
    residual_enthalpy_K: float  # h_res per molecule / k, in K
    phase: str  # "vapour", "liquid", "supercritical", "ideal"

    @property
    def activity_per_nm3(self) -> float:
        """GCMC activity z = beta*f in molecules per nm^3."""
        return self.fugacity_Pa / (BOLTZMANN_J_PER_K * self.temperature_K) / NM3_PER_M3


def _positive(field: str, value: Any) -> float:
    """A finite, strictly positive number, or an InputError naming ``field``."""
    if isinstance(value, bool) or not isinstance(value, int | float | np.integer | np.floating):
        raise InputError(f"{field}: expected a number, got {value!r}")
    v = float(value)
    if not math.isfinite(v) or v <= 0.0:
        raise InputError(f"{field}: must be a finite number > 0, got {value!r}")
    return v


def _number_density_per_nm3(pressure_pa: float, temperature_k: float, z: float) -> float:
    return pressure_pa / (z * BOLTZMANN_J_PER_K * temperature_k) / NM3_PER_M3


class EquationOfState:
    """Base class: input validation, caching of saturation states, fugacity inversion.

    Subclasses implement ``_state(T, p)`` (validated inputs, SI units) and
    ``_saturation(T)`` (T below the EOS's critical temperature) and set ``name`` and
    ``critical_temperature_K``.
    """

    name: str = ""
    critical_temperature_K: float = math.inf

    def __init__(self, probe: Probe) -> None:
        self.probe = probe
        self._psat_cache: dict[float, float] = {}

    # -- public API ------------------------------------------------------------------------

    def state(self, temperature_K: float, pressure_Pa: float) -> BulkState:
        """The stable bulk state at (T, p)."""
        t = _positive("temperature_K", temperature_K)
        p = _positive("pressure_Pa", pressure_Pa)
        return self._state(t, p)

    def saturation_pressure(self, temperature_K: float) -> float:
        """Vapour pressure p_sat(T) in Pa; InputError at or above the critical temperature."""
        t = _positive("temperature_K", temperature_K)
        if t >= self.critical_temperature_K:
            raise InputError(
                f"temperature_K: {t} K is not below the critical temperature "
                f"{self.critical_temperature_K:.6g} K of the {self.name} EOS for "
                f"{self.probe.name}; there is no saturation pressure"
            )
        return self._psat(t)

    def state_from_fugacity(self, temperature_K: float, fugacity_Pa: float) -> BulkState:
        """The stable bulk state whose fugacity is ``fugacity_Pa`` (root-find in ln p).

        On the stable branch ln f is continuous and strictly increasing in ln p
        (d ln f / d ln p = Z > 0), so the inverse is unique; below T_c the search is bracketed
        by p_sat (f <= f_sat: vapour, f > f_sat: liquid).
        """
        t = _positive("temperature_K", temperature_K)
        f = _positive("fugacity_Pa", fugacity_Pa)
        ln_f = math.log(f)

        def g(ln_p: float) -> float:
            return math.log(self._state(t, math.exp(ln_p)).fugacity_Pa) - ln_f

        lo = hi = None
        if t < self.critical_temperature_K:
            psat = self._psat_or_none(t)
            if psat is not None:
                g_sat = g(math.log(psat))
                if g_sat == 0.0:
                    return self._state(t, psat)
                if g_sat > 0.0:  # vapour side: p < p_sat
                    hi = math.log(psat)
                    lo = min(ln_f, hi) - 1.0
                else:  # liquid side: p > p_sat
                    lo = math.log(psat)
                    hi = max(ln_f, lo) + 1.0
        if lo is None or hi is None:
            lo, hi = ln_f - 1.0, ln_f + 1.0
        lo, hi = self._bracket(g, lo, hi, t, f)
        ln_p = brentq(g, lo, hi, xtol=1e-14, rtol=1e-14, maxiter=300)
        return self._state(t, math.exp(ln_p))

    def parameters(self) -> dict[str, Any]:
        """Everything needed to reproduce this EOS (for the kernel's provenance)."""
        raise NotImplementedError

    # -- helpers ---------------------------------------------------------------------------

    def _state(self, t: float, p: float) -> BulkState:
        raise NotImplementedError

    def _saturation(self, t: float) -> float:
        raise NotImplementedError

    def _psat(self, t: float) -> float:
        psat = self._psat_cache.get(t)
        if psat is None:
            psat = self._saturation(t)
            self._psat_cache[t] = psat
        return psat

    def _psat_or_none(self, t: float) -> float | None:
        if t >= self.critical_temperature_K:
            return None
        try:
            return self._psat(t)
        except InputError:
            return None

    def _bracket(
        self, g: Callable[[float], float], lo: float, hi: float, t: float, f: float
    ) -> tuple[float, float]:
        """Widen [lo, hi] (ln p) until g changes sign, within [_P_MIN_PA, _P_MAX_PA]."""
        ln_min, ln_max = math.log(_P_MIN_PA), math.log(_P_MAX_PA)

        def safe(x: float) -> float:
            try:
                return g(x)
            except InputError:
                return math.nan

        step = 1.0
        g_lo = safe(lo)
        while not g_lo < 0.0:
            if lo <= ln_min:
                break
            lo = max(lo - step, ln_min)
            step *= 2.0
            g_lo = safe(lo)
        step = 1.0
        g_hi = safe(hi)
        while not g_hi > 0.0:
            if hi >= ln_max:
                break
            hi = min(hi + step, ln_max)
            step *= 2.0
            g_hi = safe(hi)
        if not (g_lo < 0.0 < g_hi):
            raise InputError(
                f"fugacity_Pa: no bulk state of {self.probe.name} with fugacity {f:.6g} Pa at "
                f"{t} K for pressures in [{_P_MIN_PA:g}, {_P_MAX_PA:g}] Pa ({self.name} EOS)"
            )
        return lo, hi

    def _phase_below_tc(self, liquid: bool) -> str:
        return "liquid" if liquid else "vapour"

    def __repr__(self) -> str:
        return f"{type(self).__name__}(probe={self.probe.name!r})"


# ---------------------------------------------------------------------------------------
# Ideal gas


class IdealGas(EquationOfState):
    """f = p; rho = p/kT; no residual enthalpy."""

    name = "ideal"

    def _state(self, t: float, p: float) -> BulkState:
        return BulkState(
            eos=self.name,
            temperature_K=t,
            pressure_Pa=p,
            fugacity_Pa=p,
            fugacity_coefficient=1.0,
            density_per_nm3=_number_density_per_nm3(p, t, 1.0),
            compressibility=1.0,
            residual_enthalpy_K=0.0,
            phase="ideal",
        )

    def state_from_fugacity(self, temperature_K: float, fugacity_Pa: float) -> BulkState:
        """The bulk state at a temperature (K) and fugacity (Pa)."""
        t = _positive("temperature_K", temperature_K)
        f = _positive("fugacity_Pa", fugacity_Pa)
        return self._state(t, f)

    def saturation_pressure(self, temperature_K: float) -> float:
        """Saturation pressure p0 (Pa) at a temperature (K); NaN above the critical point."""
        _positive("temperature_K", temperature_K)
        raise InputError("eos: the ideal gas has no saturation pressure; name a real-gas EOS")

    def parameters(self) -> dict[str, Any]:
        """The equation of state's parameters, as stored in a kernel's ``/eos/parameters``."""
        return {"eos": self.name, "description": "ideal gas: f = p, rho = p/(kT)"}


# ---------------------------------------------------------------------------------------
# Peng-Robinson


def _cubic_real_roots(a2: float, a1: float, a0: float) -> list[float]:
    """Real roots of x^3 + a2 x^2 + a1 x + a0, ascending.

    The largest real root r comes from the trigonometric/Cardano formula (accurate for the
    dominant root) and is Newton-polished; the other two come from the deflated quadratic
    x^2 + c1 x + c0 with c0 = -a0/r and c1 = (c0 - a1)/r, which keeps full relative precision
    for roots much smaller than r (the liquid roots of a cubic EOS at very low pressure).
    """

    def newton(x: float) -> float:
        for _ in range(4):
            fx = ((x + a2) * x + a1) * x + a0
            dfx = (3.0 * x + 2.0 * a2) * x + a1
            if dfx == 0.0:
                break
            dx = fx / dfx
            if abs(dx) > 0.1 * abs(x):  # not in the root's basin: keep the formula's value
                break
            x -= dx
            if abs(dx) <= 1e-16 * abs(x):
                break
        return x

    shift = a2 / 3.0
    p = a1 - a2 * shift
    q = 2.0 * shift**3 - shift * a1 + a0
    disc = 0.25 * q * q + p**3 / 27.0
    if disc > 0.0:
        s = math.sqrt(disc)
        u = -0.5 * q - s if q > 0.0 else -0.5 * q + s  # the larger-magnitude term
        c = math.copysign(abs(u) ** (1.0 / 3.0), u)
        r = c - p / (3.0 * c) - shift if c != 0.0 else -shift
    else:
        m = 2.0 * math.sqrt(max(-p / 3.0, 0.0))
        arg = max(-1.0, min(1.0, 3.0 * q / (p * m))) if m != 0.0 else 0.0
        r = m * math.cos(math.acos(arg) / 3.0) - shift
    r = newton(r)
    if r == 0.0:
        disc2 = a2 * a2 - 4.0 * a1
        if disc2 < 0.0:
            return [0.0]
        return sorted([0.0, 0.5 * (-a2 + math.sqrt(disc2)), 0.5 * (-a2 - math.sqrt(disc2))])
    c0 = -a0 / r
    c1 = (c0 - a1) / r
    disc2 = c1 * c1 - 4.0 * c0
    if disc2 < 0.0:
        return [r]
    qq = -0.5 * (c1 + math.copysign(math.sqrt(disc2), c1))
    others = [qq, c0 / qq] if qq != 0.0 else [0.0, -c1]
    return sorted([r] + [newton(x) for x in others])


class PengRobinson(EquationOfState):
    """Peng-Robinson (1976) cubic EOS of a pure gas from its critical constants."""

    name = "peng-robinson"
    #: Omega_a, Omega_b and Z_c: the exact solution of the critical conditions (a triple root
    #: of the cubic at T_c, p_c), printed rounded as 0.45724, 0.07780 and 0.307 by Peng &
    #: Robinson (1976). With the exact values the EOS's critical point is the probe's (T_c,
    #: p_c); with the rounded ones it lies ~1e-5 lower in T. Z_c is used only to label a
    #: single-root state below T_c.
    OMEGA_A = 0.457235528921382
    OMEGA_B = 0.07779607390388832
    Z_CRITICAL = 0.3074013086987039

    def __init__(self, probe: Probe) -> None:
        super().__init__(probe)
        for field in ("critical_temperature_K", "critical_pressure_Pa", "acentric_factor"):
            value = getattr(probe, field)
            if not isinstance(value, int | float) or not math.isfinite(value):
                raise InputError(
                    f"probe {probe.name}: {field} is missing; the peng-robinson EOS needs "
                    "critical_temperature_K, critical_pressure_Pa and acentric_factor"
                )
        if probe.critical_temperature_K <= 0 or probe.critical_pressure_Pa <= 0:
            raise InputError(f"probe {probe.name}: critical constants must be > 0")
        self.tc = float(probe.critical_temperature_K)
        self.pc = float(probe.critical_pressure_Pa)
        self.omega = float(probe.acentric_factor)
        w = self.omega
        if w > 0.49:
            self.kappa_form = "1978"
            self.kappa = 0.379642 + 1.48503 * w - 0.164423 * w**2 + 0.016666 * w**3
        else:
            self.kappa_form = "1976"
            self.kappa = 0.37464 + 1.54226 * w - 0.26992 * w**2
        self.critical_temperature_K = self.tc

    def _alpha(self, t: float) -> float:
        return (1.0 + self.kappa * (1.0 - math.sqrt(t / self.tc))) ** 2

    def _ab(self, t: float, p: float) -> tuple[float, float]:
        tr, pr = t / self.tc, p / self.pc
        return self.OMEGA_A * self._alpha(t) * pr / tr**2, self.OMEGA_B * pr / tr

    @staticmethod
    def _roots(a: float, b: float) -> list[float]:
        """Physical roots Z > B of the PR cubic, ascending."""
        roots = _cubic_real_roots(-(1.0 - b), a - 3.0 * b * b - 2.0 * b, -(a * b - b * b - b**3))
        return [z for z in roots if z > b]

    @staticmethod
    def _log_term(z: float, b: float) -> float:
        return math.log((z + (1.0 + _SQRT2) * b) / (z + (1.0 - _SQRT2) * b))

    @classmethod
    def _ln_phi(cls, z: float, a: float, b: float) -> float:
        return z - 1.0 - math.log(z - b) - a / (2.0 * _SQRT2 * b) * cls._log_term(z, b)

    def _state(self, t: float, p: float) -> BulkState:
        a, b = self._ab(t, p)
        roots = self._roots(a, b)
        if not roots:
            raise InputError(f"pressure_Pa: no physical Peng-Robinson root at T={t} K, p={p} Pa")
        ln_phis = [self._ln_phi(z, a, b) for z in roots]
        i = int(np.argmin(ln_phis))  # lowest residual Gibbs energy = the stable phase
        z, ln_phi = roots[i], ln_phis[i]
        # h_res/(RT) = Z - 1 + (T da/dT - a)/(2 sqrt2 b R T) ln(...), a = a_c alpha(T)
        sqrt_tr = math.sqrt(t / self.tc)
        dlna_dlnt = -self.kappa * sqrt_tr / math.sqrt(self._alpha(t))
        h_res = z - 1.0 + a / (2.0 * _SQRT2 * b) * (dlna_dlnt - 1.0) * self._log_term(z, b)
        if t >= self.tc:
            phase = "supercritical"
        elif len(roots) == 3:
            phase = self._phase_below_tc(liquid=(i == 0))
        else:  # one root: v > v_c is vapour, v < v_c liquid (exact for stable states)
            phase = self._phase_below_tc(liquid=z * (t / self.tc) / (p / self.pc) < self.Z_CRITICAL)
        phi = math.exp(ln_phi)
        return BulkState(
            eos=self.name,
            temperature_K=t,
            pressure_Pa=p,
            fugacity_Pa=phi * p,
            fugacity_coefficient=phi,
            density_per_nm3=_number_density_per_nm3(p, t, z),
            compressibility=z,
            residual_enthalpy_K=h_res * t,
            phase=phase,
        )

    def _spinodal_pressures(self, t: float) -> tuple[float, float]:
        """(p at the liquid spinodal, p at the vapour spinodal) of the PR isotherm, Pa."""
        tr = t / self.tc
        beta = self.OMEGA_A * self._alpha(t) / (self.OMEGA_B * tr)  # a alpha / (b R T)
        # dp/dv = 0 with x = v/b: (x^2 + 2x - 1)^2 = 2 beta (x + 1)(x - 1)^2
        coeffs = [1.0, 4.0 - 2.0 * beta, 2.0 + 2.0 * beta, -4.0 + 2.0 * beta, 1.0 - 2.0 * beta]
        xs = sorted(r.real for r in np.roots(coeffs) if abs(r.imag) < 1e-9 and r.real > 1.0)
        if len(xs) < 2:
            raise InputError(
                f"temperature_K: {t} K is at or above the Peng-Robinson critical temperature "
                f"of {self.probe.name}; there is no saturation pressure"
            )
        unit = self.pc * tr / self.OMEGA_B  # R T / b

        def p_of(x: float) -> float:
            return unit * (1.0 / (x - 1.0) - beta / (x * x + 2.0 * x - 1.0))

        return p_of(xs[-2]), p_of(xs[-1])

    def _saturation(self, t: float) -> float:
        """Equal fugacity of the liquid and vapour roots, bracketed by the spinodals.

        Between the spinodal pressures the cubic has three roots; g = ln phi_L - ln phi_V is
        > 0 where the vapour is stable and < 0 where the liquid is, and is solved in ln p
        (Brent). When the liquid spinodal pressure is negative the lower end starts below
        the Wilson estimate p_c exp[5.373 (1 + omega)(1 - T_c/T)].
        """
        p_min, p_max = self._spinodal_pressures(t)

        def g(ln_p: float) -> float:
            a, b = self._ab(t, math.exp(ln_p))
            roots = self._roots(a, b)
            if len(roots) < 3:  # within rounding of a spinodal: sign of the nearer end
                return 1.0 if ln_p < 0.5 * (lo + hi) else -1.0
            return self._ln_phi(roots[0], a, b) - self._ln_phi(roots[-1], a, b)

        hi = math.log(p_max) + math.log1p(-1e-7)
        if p_min > 0.0:
            lo = math.log(p_min) + math.log1p(1e-7)
        else:
            wilson = math.log(self.pc) + 5.373 * (1.0 + self.omega) * (1.0 - self.tc / t)
            lo = min(hi - 1.0, wilson - 5.0)
            while g(lo) <= 0.0 and lo > -650.0:
                lo -= 10.0
        fail = InputError(
            f"temperature_K: no Peng-Robinson saturation pressure found for "
            f"{self.probe.name} at {t} K"
        )
        try:
            ln_p = brentq(g, lo, hi, xtol=1e-14, rtol=1e-14, maxiter=300)
        except ValueError:
            raise fail from None
        a, b = self._ab(t, math.exp(ln_p))
        roots = self._roots(a, b)
        if len(roots) < 3:
            raise fail
        if abs(self._ln_phi(roots[0], a, b) - self._ln_phi(roots[-1], a, b)) > 1e-8:
            raise fail
        return math.exp(ln_p)

    def parameters(self) -> dict[str, Any]:
        """The equation of state's parameters, as stored in a kernel's ``/eos/parameters``."""
        return {
            "eos": self.name,
            "reference": "Peng & Robinson, Ind. Eng. Chem. Fundam. 15 (1976) 59",
            "critical_temperature_K": self.tc,
            "critical_pressure_Pa": self.pc,
            "acentric_factor": self.omega,
            "omega_a": self.OMEGA_A,
            "omega_b": self.OMEGA_B,
            "kappa": self.kappa,
            "kappa_form": self.kappa_form,
            "alpha": "[1 + kappa (1 - sqrt(T/Tc))]^2",
            "root_selection": "lowest ln(phi) (stable phase)",
        }


# ---------------------------------------------------------------------------------------
# Reference equation of state (CoolProp)


class ReferenceEOS(EquationOfState):
    """The gas's reference Helmholtz-energy EOS through CoolProp's AbstractState (HEOS)."""

    name = "reference"
    BACKEND = "HEOS"

    def __init__(self, probe: Probe) -> None:
        super().__init__(probe)
        fluid = probe.reference_eos.strip() if isinstance(probe.reference_eos, str) else ""
        if not fluid:
            raise InputError(
                f"probe {probe.name}: reference_eos is empty (the gas has no reference equation "
                "of state); use eos = 'peng-robinson' or 'lennard-jones'"
            )
        self.fluid = fluid
        self._as_obj: Any = None
        st = self._as  # builds the AbstractState, or raises InputError
        self.critical_temperature_K = float(st.T_critical())
        self.critical_pressure_Pa = float(st.p_critical())
        self.critical_density_mol_m3 = float(st.rhomolar_critical())
        self.t_min_K = float(st.Tmin())
        self.gas_constant = float(st.gas_constant())

    @property
    def _as(self) -> Any:
        if self._as_obj is None:
            import CoolProp.CoolProp as CP

            try:
                self._as_obj = CP.AbstractState(self.BACKEND, self.fluid)
            except ValueError as exc:
                raise InputError(
                    f"probe {self.probe.name}: reference_eos {self.fluid!r} is not a CoolProp "
                    f"fluid ({str(exc).strip().splitlines()[0]})"
                ) from None
            self._cp = CP
        return self._as_obj

    def __getstate__(self) -> dict[str, Any]:
        d = self.__dict__.copy()
        d["_as_obj"] = None
        d.pop("_cp", None)
        return d

    def _fail(self, what: str, t: float, p: float | None, exc: Exception) -> InputError:
        msg = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
        at = f"T={t} K" + (f", p={p} Pa" if p is not None else "")
        return InputError(f"{what}: CoolProp {self.fluid} cannot evaluate {at} ({msg})")

    def _state(self, t: float, p: float) -> BulkState:
        if t < self.t_min_K:
            raise InputError(
                f"temperature_K: {t} K is below the range of the {self.fluid} reference EOS "
                f"(T_min = {self.t_min_K} K)"
            )
        st = self._as
        cp = self._cp
        phase = "supercritical"
        psat = self._psat_or_none(t) if t < self.critical_temperature_K else None
        if psat is not None:
            liquid = p > psat
            st.specify_phase(cp.iphase_liquid if liquid else cp.iphase_gas)
            phase = self._phase_below_tc(liquid)
        else:
            st.unspecify_phase()
        try:
            st.update(cp.PT_INPUTS, p, t)
            rho = st.rhomolar()
            ar = st.alphar()
            dar = st.delta() * st.dalphar_dDelta()  # Z - 1
            tar = st.tau() * st.dalphar_dTau()
        except (ValueError, RuntimeError) as exc:
            raise self._fail("pressure_Pa", t, p, exc) from None
        finally:
            st.unspecify_phase()
        if psat is None and t < self.critical_temperature_K:
            phase = self._phase_below_tc(rho > self.critical_density_mol_m3)
        z = 1.0 + dar
        ln_phi = ar + dar - math.log1p(dar)
        phi = math.exp(ln_phi)
        return BulkState(
            eos=self.name,
            temperature_K=t,
            pressure_Pa=p,
            fugacity_Pa=phi * p,
            fugacity_coefficient=phi,
            density_per_nm3=rho * AVOGADRO_PER_MOL / NM3_PER_M3,
            compressibility=z,
            residual_enthalpy_K=(tar + dar) * t,  # h_res/(RT) = tau a^r_tau + delta a^r_delta
            phase=phase,
        )

    def _saturation(self, t: float) -> float:
        if t < self.t_min_K:
            raise InputError(
                f"temperature_K: {t} K is below the range of the {self.fluid} reference EOS "
                f"(T_min = {self.t_min_K} K)"
            )
        st = self._as
        try:
            st.update(self._cp.QT_INPUTS, 0.0, t)
            return float(st.p())
        except (ValueError, RuntimeError) as exc:
            raise self._fail("temperature_K", t, None, exc) from None

    def parameters(self) -> dict[str, Any]:
        """The equation of state's parameters, as stored in a kernel's ``/eos/parameters``."""
        import CoolProp
        import CoolProp.CoolProp as CP

        try:
            bib = CP.get_fluid_param_string(self.fluid, "BibTeX-EOS")
        except ValueError:
            bib = ""
        return {
            "eos": self.name,
            "library": "CoolProp",
            "coolprop_version": CoolProp.__version__,
            "coolprop_gitrevision": CP.get_global_param_string("gitrevision"),
            "backend": self.BACKEND,
            "fluid": self.fluid,
            "eos_bibtex_key": bib,
            "critical_temperature_K": self.critical_temperature_K,
            "critical_pressure_Pa": self.critical_pressure_Pa,
            "critical_density_mol_m3": self.critical_density_mol_m3,
            "molar_mass_kg_mol": float(self._as.molar_mass()),
            "gas_constant_J_mol_K": self.gas_constant,
        }


# ---------------------------------------------------------------------------------------
# Full-potential Lennard-Jones fluid (Thol et al. 2016 via teqp)


class LennardJonesEOS(EquationOfState):
    """Full LJ 12-6 fluid, Thol et al. (2016), in reduced units via teqp.

    Reduced units: T* = T/(eps/k), rho* = rho sigma^3, p* = p sigma^3/eps. The EOS's own
    critical point is solved with teqp starting from the paper's (1.32, 0.31); the solver
    started elsewhere also converges to a spurious stationary point near T* = 1.3035 that
    lies inside the unstable region, so it is not used. Below T_c the stable branch is
    chosen with p_sat (equal p and mu of the two phases, solved here).
    """

    name = "lennard-jones"
    TEQP_KIND = "LJ126_TholJPCRD2016"
    REFERENCE = (
        "Thol, Rutkai, Koster, Lustig, Span & Vrabec, J. Phys. Chem. Ref. Data 45 (2016) 023101"
    )
    #: Starting guess for the critical point (the paper's values, also teqp's reducing state).
    TC_GUESS, RHOC_GUESS = 1.32, 0.31

    def __init__(self, probe: Probe) -> None:
        super().__init__(probe)
        self.epsilon_k = _positive(f"probe {probe.name}: epsilon_k", probe.epsilon_k)
        self.sigma_nm = _positive(f"probe {probe.name}: sigma_nm", probe.sigma_nm)
        sigma_m = self.sigma_nm * 1e-9
        #: pressure unit eps/sigma^3 in Pa
        self.pressure_unit_Pa = BOLTZMANN_J_PER_K * self.epsilon_k / sigma_m**3
        self._model_obj: Any = None
        self._sat_cache: dict[float, tuple[float, float, float]] = {}
        model = self._model
        tc, rhoc = model.solve_pure_critical(self.TC_GUESS, self.RHOC_GUESS)
        self.critical_temperature_reduced = float(tc)
        self.critical_density_reduced = float(rhoc)
        self.critical_temperature_K = self.critical_temperature_reduced * self.epsilon_k

    @property
    def _model(self) -> Any:
        if self._model_obj is None:
            import teqp

            model = teqp.make_model({"kind": self.TEQP_KIND, "model": {}})
            self._x = np.array([1.0])
            r = float(model.get_R(self._x))
            if r != 1.0:  # the reduced-unit formulas below assume R = 1 (teqp 0.23: it is)
                raise RuntimeError(f"teqp {self.TEQP_KIND}: expected R = 1, got {r}")
            self._model_obj = model
        return self._model_obj

    def __getstate__(self) -> dict[str, Any]:
        d = self.__dict__.copy()
        d["_model_obj"] = None
        d.pop("_x", None)
        return d

    # reduced-unit primitives (k = 1)
    def _p_red(self, ts: float, rho: float) -> float:
        return rho * ts * (1.0 + self._model.get_Ar01(ts, rho, self._x))

    def _dp_drho_red(self, ts: float, rho: float) -> float:
        _, a1, a2 = self._model.get_Ar02n(ts, rho, self._x)
        return ts * (1.0 + 2.0 * a1 + a2)

    def _ln_f_red(self, ts: float, rho: float) -> float:
        """ln(f* ) = ln(rho T) + alpha^r + delta alpha^r_delta."""
        a0, a1 = self._model.get_Ar01n(ts, rho, self._x)
        return math.log(rho * ts) + a0 + a1

    def _rho_on(self, ts: float, ps: float, lo: float, hi: float, widen: str) -> float:
        """rho* in [lo, hi] with p*(rho*) = ps, p* increasing on the interval.

        ``widen`` says which end may move: "down" (vapour: hi is the saturated vapour or the
        spinodal density), "up" (liquid: lo is the saturated liquid or the spinodal density)
        or "both" (supercritical). A fixed end that is already (within rounding) on the
        wrong side is the answer itself.
        """

        def h(ln_rho: float) -> float:
            return self._p_red(ts, math.exp(ln_rho)) / ps - 1.0

        a, b = math.log(lo), math.log(hi)
        h_a, h_b = h(a), h(b)
        if widen == "up" and h_a >= 0.0:
            return lo
        if widen == "down" and h_b <= 0.0:
            return hi
        while h_a > 0.0:
            a -= 2.0
            if a < -250.0:
                raise InputError(f"pressure_Pa: no LJ vapour root at T*={ts}, p*={ps}")
            h_a = h(a)
        while h_b < 0.0:
            b += 0.1
            if b > math.log(3.0):
                raise InputError(
                    f"pressure_Pa: p* = {ps:.6g} at T* = {ts:.6g} is beyond the density range "
                    "of the Lennard-Jones EOS (rho* > 3)"
                )
            h_b = h(b)
        return math.exp(brentq(h, a, b, xtol=1e-15, rtol=1e-15, maxiter=300))

    def _spinodals(self, ts: float) -> tuple[float, float] | None:
        """(rho*_V,spin, rho*_L,spin): first and last zero of dp/drho on a scan; None above T_c."""
        grid = np.concatenate([np.geomspace(1e-5, 0.05, 60), np.linspace(0.05, 1.1, 421)[1:]])
        d = np.array([self._dp_drho_red(ts, r) for r in grid])
        neg = np.nonzero(d < 0.0)[0]
        if neg.size == 0:
            return None
        i, j = int(neg[0]), int(neg[-1])
        if i == 0 or j == grid.size - 1:
            return None

        def dp(r: float) -> float:
            return self._dp_drho_red(ts, r)

        rv = brentq(dp, grid[i - 1], grid[i], xtol=1e-15, rtol=1e-14)
        rl = brentq(dp, grid[j], grid[j + 1], xtol=1e-15, rtol=1e-14)
        return rv, rl

    def _saturation_reduced(self, ts: float) -> tuple[float, float, float]:
        """(p*_sat, rho*_L, rho*_V) from equal p and mu, bracketed by the spinodal pressures."""
        sat = self._sat_cache.get(ts)
        if sat is not None:
            return sat
        spin = self._spinodals(ts)
        if spin is None:
            raise InputError(
                f"temperature_K: T* = {ts:.6g} has no vapour-liquid coexistence in the "
                f"Lennard-Jones EOS (T*_c = {self.critical_temperature_reduced:.6g})"
            )
        rv_s, rl_s = spin
        p_max = self._p_red(ts, rv_s)
        p_min = self._p_red(ts, rl_s)

        def g(ln_p: float) -> float:
            ps = math.exp(ln_p)
            rv = self._rho_on(ts, ps, ps / ts * 0.5, rv_s, "down")
            rl = self._rho_on(ts, ps, rl_s, rl_s * 1.05, "up")
            return self._ln_f_red(ts, rl) - self._ln_f_red(ts, rv)

        hi = math.log(p_max) + math.log1p(-1e-9)
        lo = math.log(p_min) + math.log1p(1e-9) if p_min > 0.0 else math.log(p_max) - 30.0
        try:
            ln_p = brentq(g, lo, hi, xtol=1e-14, rtol=1e-14, maxiter=300)
        except ValueError:
            raise InputError(
                f"temperature_K: no Lennard-Jones saturation state found at T* = {ts:.6g}"
            ) from None
        ps = math.exp(ln_p)
        sat = (
            ps,
            self._rho_on(ts, ps, rl_s, rl_s * 1.05, "up"),
            self._rho_on(ts, ps, ps / ts * 0.5, rv_s, "down"),
        )
        self._sat_cache[ts] = sat
        return sat

    def saturation_densities_per_nm3(self, temperature_K: float) -> tuple[float, float]:
        """(liquid, vapour) coexistence densities in molecules/nm^3."""
        t = _positive("temperature_K", temperature_K)
        self.saturation_pressure(t)
        _, rl, rv = self._saturation_reduced(t / self.epsilon_k)
        return rl / self.sigma_nm**3, rv / self.sigma_nm**3

    def _saturation(self, t: float) -> float:
        return self._saturation_reduced(t / self.epsilon_k)[0] * self.pressure_unit_Pa

    def _state(self, t: float, p: float) -> BulkState:
        ts = t / self.epsilon_k
        ps = p / self.pressure_unit_Pa
        psat = self._psat_or_none(t)
        if psat is not None:
            _, rl_sat, rv_sat = self._saturation_reduced(ts)
            liquid = p > psat
            if liquid:
                rho = self._rho_on(ts, ps, rl_sat, rl_sat * 1.05, "up")
            else:
                rho = self._rho_on(ts, ps, ps / ts * 0.5, rv_sat, "down")
            phase = self._phase_below_tc(liquid)
        else:
            rho = self._rho_on(ts, ps, ps / ts * 0.5, max(ps / ts * 2.0, 1e-3), "both")
            phase = "supercritical"
        a0, a1 = (float(v) for v in self._model.get_Ar01n(ts, rho, self._x))
        a10 = float(self._model.get_Ar10(ts, rho, self._x))
        ln_phi = a0 + a1 - math.log1p(a1)
        phi = math.exp(ln_phi)
        z = 1.0 + a1
        return BulkState(
            eos=self.name,
            temperature_K=t,
            pressure_Pa=p,
            fugacity_Pa=phi * p,
            fugacity_coefficient=phi,
            density_per_nm3=rho / self.sigma_nm**3,
            compressibility=z,
            residual_enthalpy_K=(a10 + a1) * t,  # h_res/(kT) = Ar10 + Ar01
            phase=phase,
        )

    def parameters(self) -> dict[str, Any]:
        """The equation of state's parameters, as stored in a kernel's ``/eos/parameters``."""
        import teqp

        return {
            "eos": self.name,
            "reference": self.REFERENCE,
            "library": "teqp",
            "teqp_version": teqp.__version__,
            "teqp_kind": self.TEQP_KIND,
            "potential": "full (untruncated) Lennard-Jones 12-6",
            "epsilon_k": self.epsilon_k,
            "sigma_nm": self.sigma_nm,
            "pressure_unit_Pa": self.pressure_unit_Pa,
            "critical_temperature_reduced": self.critical_temperature_reduced,
            "critical_density_reduced": self.critical_density_reduced,
            "critical_temperature_K": self.critical_temperature_K,
        }


# ---------------------------------------------------------------------------------------

_CLASSES: dict[str, type[EquationOfState]] = {
    "reference": ReferenceEOS,
    "peng-robinson": PengRobinson,
    "lennard-jones": LennardJonesEOS,
    "ideal": IdealGas,
}


def make_eos(name: str, probe: Probe) -> EquationOfState:
    """The equation of state ``name`` (one of :data:`EOS_NAMES`) for ``probe``."""
    if not isinstance(name, str):
        raise InputError(f"eos: expected one of {', '.join(EOS_NAMES)}, got {name!r}")
    key = name.strip().lower().replace("_", "-").replace(" ", "-")
    if key not in _CLASSES:
        raise InputError(f"eos: unknown equation of state {name!r}; valid: {', '.join(EOS_NAMES)}")
    return _CLASSES[key](probe)
