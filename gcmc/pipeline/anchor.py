"""The equilibrium branch of a build: the liquid-branch anchor of every pore with a hysteresis
loop, along a reversible path of simulated states, and the transition it gives
(gcmc.kernel.equilibrium).

Thermodynamics. The grand partition function of the pore, Xi(beta, z) = sum_N z^N / N!
int exp(-beta U) dr^N, with z = exp(beta mu) / Lambda^3 the activity. For a reservoir gas of
fugacity f, beta mu = ln(beta f Lambda^3), so z = beta f = f / (k T): the activity the GCMC
acceptance uses (gcmc.sampling.point.ThermoState.activity_nm3: the kinetic
factor cancels), in molecules per nm^3. With this normalisation the kinetic factor is inside
z, and Xi depends on beta only through exp(-beta U); hence, with beta Omega = -ln Xi,

    d(beta Omega / V) = u d beta - n d ln z,   u = <U> / (k V),  n = <N> / V,

at every temperature with the *same* z = f/(kT) (in nm^-3; only differences of ln z enter).
At a fixed temperature d ln z = d ln f, which is what the isotherm integrals of
gcmc.kernel.equilibrium use. u is the configurational energy per pore volume in K nm^-3:
the point's mean box energy U/k (fluid-fluid + fluid-solid, slab tail included: the energy in
the acceptance rule; gcmc.sampling.point.PointResult.energy_K) over the pore volume A w, the
volume every kernel density is per, which equals (U/N per molecule) x n.

The path (one task per pore, its states run in order, each starting from the previous
state's configuration, as a pressure ladder does):

(a) an isotherm at T_hot above the bulk critical temperature (a pore's critical temperature
    lies below the bulk's, so no transition is crossed; gcmc.pipeline.config
    .EquilibriumSettings), from a dilute Henry-law state (n_H = K_H(T_hot) f_0 =
    dilute_density_sigma3 / sigma^3) up to ln z_fix, in ln z steps that shrink towards the
    top (:func:`anchor_path`);
(b) at ln z_fix, evenly in beta from 1/T_hot down to 1/T_0, the kernel temperature;
(c) at T_0, evenly in ln z from ln z_fix down to ln z_top, the kernel's top grid point, which
    is the desorption branch's first point (skipped when ln z_fix = ln z_top).

ln z_fix = max(ln z_top, ln z_c), z_c = p_c / (k T_c) with the bulk critical constants (the
larger of the probe's real-gas value and the LJ model fluid's, p_c* / T_c* sigma^-3). Leg (b)
must pass above the pore's capillary critical point: the pore's coexistence activity lies
below the bulk saturation activity at each temperature (attractive walls condense below bulk
saturation, common practice), which rises with temperature up to the bulk critical activity
f_c / (k T_c) = phi_c p_c / (k T_c) <= p_c / (k T_c) (phi_c < 1 for an attractive fluid).
At a low kernel temperature ln z_fix compresses the pore liquid well above saturation along
leg (c), and the pore liquid may freeze on leg (b) or (c); a path that crosses a transition
is not reversible. Each state stores its fluctuations (var N, cov(N, U), var U), the exact
derivatives of n and u along the path, and the assembly checks every interval against them
(gcmc.kernel.equilibrium.path_jumps): a change of several times what the fluctuations at
both ends allow is a jump, the anchor is not used, and the pore's reason names the interval.
Each state's convergence (its flags) is stored with the path.

The anchor is gcmc.kernel.equilibrium.path_grand_potential of the path's states; the
transition is gcmc.kernel.equilibrium.pore_transition with it.
"""

from __future__ import annotations

import math
import socket
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from gcmc.errors import InputError
from gcmc.kernel.eqbranch import EquilibriumBranch
from gcmc.physics.model import PoreModel
from gcmc.physics.units import activity_per_nm3, fugacity_pa_from_activity
from gcmc.pipeline.config import LJ_CRITICAL_PRESSURE, LJ_CRITICAL_TEMPERATURE, RunConfig
from gcmc.pipeline.tasks import (
    BuildPlan,
    Task,
    TemperaturePlan,
    load_task,
    pore_model,
    task_clock,
    task_path,
    task_seed,
    write_task,
)

if TYPE_CHECKING:
    from gcmc.kernel.data import KernelData
    from gcmc.pipeline.assemble import Layout

#: Boltzmann constant (J/K) and m^3 per nm^3, for p_c / (k T_c) in nm^-3
_K_B = 1.380649e-23
_M3_PER_NM3 = 1e-27
#: the fields of a path state stored in an anchor task file (prefix "path/")
PATH_FIELDS = (
    "temperature_K",
    "ln_z",
    "leg",
    "density_per_nm3",
    "density_per_nm3_stderr",
    "energy_K_per_nm3",
    "energy_K_per_nm3_stderr",
    "converged",
    # the fluctuations, per pore volume: var N / V, cov(N, U/k) / V, var(U/k) / V (the exact
    # derivatives of n and u along the path: gcmc.kernel.equilibrium.path_jumps)
    "n_variance_per_nm3",
    "nu_covariance_K_per_nm3",
    "u_variance_K2_per_nm3",
)
#: the path fields stored in the kernel's equilibrium group: (task file field, dataset)
STORED_PATH_FIELDS = (
    ("temperature_K", "path_temperature_K"),
    ("ln_z", "path_ln_z"),
    ("density_per_nm3", "path_density_per_nm3"),
    ("density_per_nm3_stderr", "path_density_per_nm3_stderr"),
    ("energy_K_per_nm3", "path_energy_K_per_nm3"),
    ("energy_K_per_nm3_stderr", "path_energy_K_per_nm3_stderr"),
    ("n_variance_per_nm3", "path_n_variance_per_nm3"),
    ("nu_covariance_K_per_nm3", "path_nu_covariance_K_per_nm3"),
    ("u_variance_K2_per_nm3", "path_u_variance_K2_per_nm3"),
)


@dataclass(frozen=True)
class AnchorPath:
    """The states of one pore's anchor path (module docstring)."""

    temperature_K: np.ndarray
    ln_z: np.ndarray  # ln(z nm^3), z = f/(kT)
    leg: np.ndarray  # 0 hot isotherm, 1 cooling, 2 liquid isotherm at T_0
    henry_density0_per_nm3: float  # K_H(T_hot) f_0 at the first state

    def __len__(self) -> int:
        return int(self.ln_z.size)


def critical_activity_per_nm3(cfg: RunConfig) -> float:
    """p_c / (k T_c) (nm^-3), an upper bound of the bulk critical activity: the larger of the
    probe's real-gas value (where given) and the LJ model fluid's (p_c*/T_c*) / sigma^3."""
    p = cfg.probe
    model = LJ_CRITICAL_PRESSURE / LJ_CRITICAL_TEMPERATURE / p.sigma_nm**3
    if math.isfinite(p.critical_pressure_Pa) and math.isfinite(p.critical_temperature_K):
        real = p.critical_pressure_Pa / (_K_B * p.critical_temperature_K) * _M3_PER_NM3
        return max(model, real)
    return model


def max_path_states(cfg: RunConfig) -> int:
    """The most states a path of this config has (legs share their end states)."""
    e = cfg.equilibrium
    if e is None:
        return 0
    return e.isotherm_states + e.cooling_states - 1 + e.liquid_states - 1


def anchor_path(cfg: RunConfig, tp: TemperaturePlan, model: PoreModel) -> AnchorPath:
    """The anchor path of one pore at one kernel temperature (module docstring)."""
    from gcmc.physics.henry import pore_limit

    e = cfg.equilibrium
    if e is None:
        raise InputError("equilibrium: the config has no [equilibrium] table")
    t0 = float(tp.temperature_K)
    t_hot = float(cfg.hot_temperature_K)
    if not t_hot > t0:
        raise InputError(
            f"equilibrium: the hot temperature {t_hot:g} K is not above the kernel's {t0:g} K"
        )
    ln_top = math.log(activity_per_nm3(float(tp.fugacities_Pa[-1]), t0))
    ln_fix = max(ln_top, math.log(critical_activity_per_nm3(cfg)))
    kh = float(pore_limit(model, t_hot).henry_per_nm3_per_pa)
    if not (math.isfinite(kh) and kh > 0):
        raise InputError(f"equilibrium: the pore H = {model.width_nm:g} nm admits no probe")
    n0 = e.dilute_density_sigma3 / cfg.probe.sigma_nm**3
    f0 = n0 / kh
    ln0 = math.log(activity_per_nm3(f0, t_hot))
    if not ln0 < ln_fix:
        raise InputError(
            f"equilibrium.dilute_density_sigma3: the dilute start (ln z = {ln0:.3g}) is not "
            f"below the cooling activity (ln z = {ln_fix:.3g})"
        )
    temps = [np.full(e.isotherm_states, t_hot)]
    # denser towards the top, where the supercritical pore fills and n d ln z is largest
    # (ln z = ln z_0 + (ln z_fix - ln z_0)(s + s(1 - s)/2), s even in [0, 1]: the steps
    # shrink linearly from 1.5 x the even step at the dilute end to 0.5 x at the top)
    s = np.linspace(0.0, 1.0, e.isotherm_states)
    up = ln0 + (ln_fix - ln0) * (s + 0.5 * s * (1.0 - s))
    up[-1] = ln_fix
    lnz = [up]
    legs = [np.zeros(e.isotherm_states, int)]
    beta = np.linspace(1.0 / t_hot, 1.0 / t0, e.cooling_states)[1:]
    temps.append(1.0 / beta)
    temps[-1][-1] = t0  # exactly the kernel's temperature
    lnz.append(np.full(beta.size, ln_fix))
    legs.append(np.ones(beta.size, int))
    if ln_fix > ln_top:
        down = np.linspace(ln_fix, ln_top, e.liquid_states)[1:]
        down[-1] = ln_top
        temps.append(np.full(down.size, t0))
        lnz.append(down)
        legs.append(np.full(down.size, 2))
    n_h = kh * fugacity_pa_from_activity(math.exp(ln0), t_hot)
    return AnchorPath(np.concatenate(temps), np.concatenate(lnz), np.concatenate(legs), n_h)


# --------------------------------------------------------------------------------------------
# planning
# --------------------------------------------------------------------------------------------
def loop_pores(data: KernelData) -> list[tuple[int, int]]:
    """(t, j) of the pores whose branches show one loop inside the grid and need an anchor
    (gcmc.kernel.equilibrium's own loop detection: the reason ``NO_ANCHOR`` without one)."""
    from gcmc.kernel import equilibrium as eq

    return [(t, j) for t, j, r in eq.kernel_transitions(data) if r.reason == eq.NO_ANCHOR]


def plan_anchor_tasks(plan: BuildPlan, data: KernelData, layout: Layout) -> list[Task]:
    """One anchor task per pore with a loop (:func:`loop_pores`) below the path's hot
    temperature, keyed by its ladder."""
    cfg = plan.config
    tasks = []
    temps = np.asarray(data.temperatures_K, float)
    for t, j in loop_pores(data):
        if not temps[t] < cfg.hot_temperature_K:
            # at or above the path's supercritical temperature no pore has a loop (what the
            # branches show there is noise); no path exists from above to it
            continue
        lad = layout.ladders[t][j]
        tasks.append(
            Task(
                lad.t_index,
                lad.w_index,
                float(max_path_states(cfg)),
                h_code=lad.h_code,
                anchor=cfg.equilibrium_tag,
            )
        )
    return tasks


# --------------------------------------------------------------------------------------------
# running
# --------------------------------------------------------------------------------------------
def run_anchor_task(plan: BuildPlan, task: Task) -> Path:
    """Simulate the anchor path of one pore, its states in order (each from the previous
    state's configuration); write the task file atomically."""
    from gcmc.physics.henry import pore_limit
    from gcmc.sampling.point import ThermoState, simulate_point

    cfg = plan.config
    tp = plan.temperatures[task.t_index]
    model = pore_model(cfg, task.w_index, task.width_H_nm(cfg))
    path = anchor_path(cfg, tp, model)
    m = len(path)
    seeds = task_seed(cfg, task).spawn(m)
    vol = model.pore_volume_nm3
    arrays = {f"path/{k}": np.full(m, np.nan) for k in PATH_FIELDS}
    flags: list[str] = []
    positions = dmax = None
    started = task_clock()
    for i in range(m):
        temp, lnz = float(path.temperature_K[i]), float(path.ln_z[i])
        state = ThermoState(
            temperature_K=temp,
            fugacity_Pa=fugacity_pa_from_activity(math.exp(lnz), temp),
            eos=cfg.eos,
        )
        out = simulate_point(
            model, state, cfg.sampling, seeds[i], start=positions, max_displacement_nm=dmax
        )
        positions, dmax = out.positions, out.max_displacement_nm or None
        r = out.result
        row = {
            "temperature_K": temp,
            "ln_z": lnz,
            "leg": float(path.leg[i]),
            "density_per_nm3": r.density_per_nm3,
            "density_per_nm3_stderr": r.density_per_nm3_stderr,
            "energy_K_per_nm3": r.energy_K / vol,
            "energy_K_per_nm3_stderr": r.energy_K_stderr / vol,
            "converged": 1.0 if r.converged else 0.0,
            "n_variance_per_nm3": r.molecules_variance / vol,
            "nu_covariance_K_per_nm3": r.molecules_energy_covariance_K / vol,
            "u_variance_K2_per_nm3": r.energy_variance_K2 / vol,
        }
        for k, v in row.items():
            arrays[f"path/{k}"][i] = v
        flags.append("; ".join(r.flags))
    meta = {
        "t_index": task.t_index,
        "w_index": task.w_index,
        "temperature_K": tp.temperature_K,
        "hot_temperature_K": cfg.hot_temperature_K,
        "width_H_nm": model.width_nm,
        "flags": flags,
        "host": socket.gethostname(),
        "equilibrium": cfg.equilibrium.to_dict() if cfg.equilibrium else None,
    }
    arrays["henry_density0_per_nm3"] = np.array(path.henry_density0_per_nm3)
    arrays["henry_hot_per_nm3_per_pa"] = np.array(
        pore_limit(model, cfg.hot_temperature_K).henry_per_nm3_per_pa
    )
    return write_task(plan, task, arrays, meta, started)


# --------------------------------------------------------------------------------------------
# assembling
# --------------------------------------------------------------------------------------------
def equilibrium_branch(
    plan: BuildPlan, data: KernelData, layout: Layout, anchors: list[Task]
) -> EquilibriumBranch:
    """The kernel's equilibrium data from its points and the anchor task files: for every
    pore, the transition with the anchor where the pore has one (else the reason why not),
    the equilibrium branch, and the path."""
    from gcmc.kernel import equilibrium as eq

    cfg = plan.config
    n_t, n_w, n_p = np.shape(data.points["adsorption"]["density_per_nm3"])
    out = EquilibriumBranch.empty(n_t, n_w, n_p, max_path_states(cfg), cfg.hot_temperature_K)
    by_key = {(a.t_index, a.width_key): a for a in anchors}
    for t in range(n_t):
        for j in range(n_w):
            anchor = jump = None
            task = by_key.get((t, layout.ladders[t][j].width_key))
            if task is not None:
                arrays, _ = load_task(task_path(plan, task))
                m = arrays["path/ln_z"].size
                nan = np.full(m, np.nan)  # fluctuations: absent from older anchor files
                f = {name: arrays.get(f"path/{name}", nan) for name, _ in STORED_PATH_FIELDS}
                for name, field in STORED_PATH_FIELDS:
                    getattr(out, field)[t, j, :m] = f[name]
                out.path_converged[t, j, :m] = arrays["path/converged"] == 1.0
                try:
                    pi = eq.path_grand_potential(
                        1.0 / arrays["path/temperature_K"],
                        arrays["path/ln_z"],
                        arrays["path/density_per_nm3"],
                        arrays["path/energy_K_per_nm3"],
                        float(arrays["henry_density0_per_nm3"]),
                        np.nan_to_num(arrays["path/density_per_nm3_stderr"]),
                        np.nan_to_num(arrays["path/energy_K_per_nm3_stderr"]),
                    )
                except InputError:
                    pi = None  # a state without a value: no anchor, the reason says so
                jump = eq.worst_path_jump(
                    eq.path_jumps(
                        1.0 / f["temperature_K"],
                        f["ln_z"],
                        f["density_per_nm3"],
                        f["density_per_nm3_stderr"],
                        f["energy_K_per_nm3"],
                        f["energy_K_per_nm3_stderr"],
                        f["n_variance_per_nm3"],
                        f["nu_covariance_K_per_nm3"],
                        f["u_variance_K2_per_nm3"],
                    )
                )
                if pi is not None and jump is None:
                    anchor = pi.anchor
                    out.anchor_beta_omega_per_nm3[t, j] = pi.beta_omega_per_nm3
                    out.anchor_stderr[t, j] = pi.stderr
                    out.anchor_integration_error[t, j] = pi.integration_error
            r = eq.pore_transition(data, t, j, anchor)
            out.has_loop[t, j] = bool(np.isfinite(r.loop_pressure_range_Pa[0]))
            out.has_transition[t, j] = r.has_transition
            out.reason[t, j] = r.reason
            if task is not None and jump is not None and r.reason == eq.NO_ANCHOR:
                # the path crossed a jump: its anchor is not trusted, and the reason says why
                out.reason[t, j] = eq.describe_path_jump(
                    jump, arrays["path/temperature_K"], arrays["path/ln_z"]
                )
            out.fugacity_Pa[t, j] = r.fugacity_Pa
            out.pressure_Pa[t, j] = r.pressure_Pa
            out.ln_f_stderr[t, j] = r.ln_f_stderr
            out.ln_f_integration_error[t, j] = r.ln_f_integration_error
            out.pressure_uncertainty_Pa[t, j] = r.pressure_uncertainty_Pa
            out.extrapolated[t, j] = r.extrapolated
            out.loop_pressure_range_Pa[t, j] = r.loop_pressure_range_Pa
            out.density_per_nm3[t, j] = r.density_per_nm3
            out.density_per_nm3_stderr[t, j] = r.density_per_nm3_stderr
    return out


def anchor_cost(plan: BuildPlan, anchors: list[Task]) -> dict:
    """Points and CPU seconds of the anchor tasks on disk (for reports and benchmarks)."""
    points, cpu = 0, 0.0
    for a in anchors:
        arrays, _ = load_task(task_path(plan, a))
        points += int(arrays["path/ln_z"].size)
        cpu += float(arrays["cpu_seconds"])
    return {"tasks": len(anchors), "points": points, "cpu_seconds": cpu}
