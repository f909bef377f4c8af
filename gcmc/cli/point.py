"""`gcmc point`: simulate one state point, for exploring a model before a full kernel."""

from __future__ import annotations

import argparse
import json
import math
import sys

from gcmc.cli.common import DeprecatedAlias, HelpFormatter

HELP = """Simulate one state point: a probe in a graphitic slit pore of width H (or w = H -
sigma_ss; or in a periodic bulk cube) in equilibrium with a bulk gas at a given pressure
(converted to a fugacity by an equation of state) or at a given fugacity (simulated as given;
where the equation of state cannot map it to a pressure, the pressure, bulk density, excess
density and isosteric heat are reported as unavailable, with a note). Prints a summary, or one
JSON object with --json (unavailable numbers are null)."""

#: parameter names of gcmc.pipeline.state_point -> the options shown in error messages
OPTION_NAMES = {
    "probe": "--probe",
    "epsilon_k": "--epsilon-k",
    "sigma_nm": "--sigma-nm",
    "temperature_K": "--temperature",
    "pressure_Pa": "--pressure",
    "fugacity_Pa": "--fugacity",
    "eos": "--eos",
    "width_H_nm": "--width-H",
    "width_w_nm": "--width-w",
    "bulk": "--bulk",
    "box_nm": "--box",
    "cutoff_nm": "--cutoff",
    "epsilon_sf_scale": "--epsilon-sf-scale",
    "moves": "--moves",
    "replicas": "--replicas",
    "insertion_trials": "--insertion-trials",
}


def register(sub: argparse._SubParsersAction) -> None:
    """Register the ``point`` subcommand."""
    p = sub.add_parser(
        "point",
        help="simulate one state point",
        description=HELP,
        formatter_class=HelpFormatter,
    )
    g = p.add_argument_group("probe")
    g.add_argument(
        "--probe", help="a probe of the library (gcmc/physics/data/probes.toml), e.g. argon"
    )
    g.add_argument("--epsilon-k", type=float, help="inline probe: LJ epsilon/k in K")
    g.add_argument("--sigma-nm", type=float, help="inline probe: LJ sigma in nm")
    g.add_argument(
        "--probe-library",
        metavar="FILE",
        help="a TOML probe library of your own (the run config's [probe] library; "
        "default: the package's)",
    )
    g.add_argument(
        "--probe-file", dest="probe_library", action=DeprecatedAlias, new="--probe-library"
    )
    s = p.add_argument_group("state")
    s.add_argument("--temperature", type=float, required=True, metavar="K", help="temperature in K")
    s.add_argument(
        "--pressure", type=float, metavar="PA", help="bulk pressure in Pa (through --eos)"
    )
    s.add_argument(
        "--fugacity",
        type=float,
        metavar="PA",
        help="bulk fugacity in Pa (simulated as given; --eos only reports the pressure)",
    )
    s.add_argument(
        "--eos",
        default=None,
        help="reference | peng-robinson | lennard-jones | ideal (default: reference "
        "where the probe has one, else lennard-jones)",
    )
    geo = p.add_argument_group("geometry (give one of --width-H, --width-w, --bulk)")
    geo.add_argument(
        "--width-H",
        "--width",
        dest="width_H",
        type=float,
        metavar="NM",
        help="slit width H in nm, between the planes of carbon nuclei",
    )
    geo.add_argument(
        "--width-w",
        dest="width_w",
        type=float,
        metavar="NM",
        help="internal slit width w = H - sigma_ss in nm (the width of gcmc check and plots)",
    )
    geo.add_argument("--bulk", action="store_true", help="a periodic cube of bulk fluid instead")
    geo.add_argument(
        "--box",
        type=float,
        metavar="NM",
        help="periodic edge in nm (default: max(2 x cutoff, 10 sigma))",
    )
    geo.add_argument(
        "--cutoff", type=float, metavar="NM", help="LJ cutoff in nm (default: 3 sigma)"
    )
    geo.add_argument(
        "--lateral-box",
        choices=("square", "hexagonal"),
        default=None,
        help="square: max(2 x cutoff, 10 sigma) on both sides; hexagonal: a rectangle holding "
        "whole rows of a close-packed layer (row spacing 1.1115 sigma); default square, "
        "hexagonal on the certified path",
    )
    geo.add_argument(
        "--epsilon-sf-scale",
        type=float,
        default=None,
        help="scale the Lorentz-Berthelot solid-fluid epsilon",
    )
    m = p.add_argument_group("sampling")
    m.add_argument(
        "--moves",
        type=int,
        default=1_000_000,
        help="trial moves per replica (the first fifth equilibrates)",
    )
    m.add_argument(
        "--replicas",
        type=int,
        default=2,
        help="independent replicas (default: 2, the second starting over-filled; a point whose "
        "replicas disagree is flagged as unconverged; 1 skips that check)",
    )
    m.add_argument(
        "--insertion-trials",
        type=int,
        default=0,
        help="trial positions per insertion (1 plain, k > 1 biased, 0 automatic)",
    )
    m.add_argument(
        "--method",
        choices=("auto", "point", "certified"),
        default="auto",
        help="point: the point-wise sampler only; certified: certify the point (hyper-parallel "
        "tempering preparations and a box-size check, gcmc.sampling.certificate); auto: the "
        "point-wise sampler, then the certified path when the state is a dense subcritical one "
        "(slit, T <= 0.82 T_c of the probe, pore density rho sigma^3 > 0.5)",
    )
    m.add_argument(
        "--certify-budget",
        type=float,
        default=600.0,
        metavar="S",
        help="CPU seconds the certified path may spend",
    )
    m.add_argument(
        "--certify-moves",
        type=int,
        default=1_000_000,
        metavar="N",
        help="production moves per rung of each tempering chain (first attempt; doubled "
        "while the certificate fails and the budget allows)",
    )
    m.add_argument("--seed", type=int, default=12345, help="random seed")
    p.add_argument("--json", action="store_true", help="print one JSON object")
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    """Run ``gcmc point``: simulate one state point and print it; the exit code."""
    from gcmc.api import PointRun
    from gcmc.pipeline.state_point import (
        bulk_reservoir,
        point_model,
        point_settings,
        resolve_probe,
        simulate,
        total_moves,
    )
    from gcmc.sampling.box import warm_up

    names = OPTION_NAMES
    probe = resolve_probe(
        args.probe,
        epsilon_k=args.epsilon_k,
        sigma_nm=args.sigma_nm,
        probe_library=args.probe_library,
        names=names,
    )
    reservoir = bulk_reservoir(
        probe,
        args.temperature,
        pressure_Pa=args.pressure,
        fugacity_Pa=args.fugacity,
        eos=args.eos,
        names=names,
    )
    model = point_model(
        probe,
        width_H_nm=args.width_H,
        width_w_nm=args.width_w,
        bulk=args.bulk,
        box_nm=args.box,
        cutoff_nm=args.cutoff,
        epsilon_sf_scale=args.epsilon_sf_scale,
        names=names,
    )
    settings = point_settings(args.moves, args.replicas, args.insertion_trials, names=names)
    _check_certified_options(args)
    if args.lateral_box == "hexagonal" or (
        args.lateral_box is None and args.method == "certified" and args.box is None
    ):
        from gcmc.physics.potentials import with_lateral_box

        model = with_lateral_box(model, "hexagonal")
    load_s = warm_up()
    from tqdm import tqdm

    with tqdm(
        total=total_moves(settings),
        unit="move",
        unit_scale=True,
        desc="point",
        file=sys.stderr,
        disable=None,
        leave=False,
    ) as bar:
        result = None
        if args.method != "certified":
            result = simulate(model, reservoir, settings, args.seed, progress=bar.update).result
    certificate = None
    if args.method == "certified" or (args.method == "auto" and _dense(model, result)):
        from dataclasses import replace

        from gcmc.physics.potentials import with_lateral_box
        from gcmc.sampling.certificate import CertifySettings, certify_filled_point

        cs = replace(
            CertifySettings(),
            budget_cpu_s=args.certify_budget,
            production_moves=args.certify_moves,
            equilibration_moves=max(args.certify_moves // 5, 1000),
            insertion_trials=args.insertion_trials,
        )
        with tqdm(
            unit="move", unit_scale=True, desc="certify", file=sys.stderr, disable=None, leave=False
        ) as bar2:
            certificate = certify_filled_point(
                model, reservoir.state, args.seed, cs, progress=bar2.update
            )
        result = certificate.result
        model = with_lateral_box(model, "hexagonal")
    assert result is not None
    run_ = PointRun(
        result=result,
        model=model,
        state=reservoir.state,
        eos=reservoir.eos,
        settings=settings,
        seed=args.seed,
        notes=list(reservoir.notes),
        compile_or_cache_load_seconds=load_s,
    )
    if args.json:
        from gcmc.api import _jsonable

        payload = run_.to_dict()
        if certificate is not None:
            cert = certificate.to_dict()
            cert.pop("result")
            payload["certificate"] = _jsonable(cert)
        print(json.dumps(payload, allow_nan=False))
        return 0
    _print_summary(run_)
    if certificate is not None:
        _print_certificate(certificate)
    return 0


def _check_certified_options(args: argparse.Namespace) -> None:
    from gcmc.errors import InputError

    if args.lateral_box is not None and args.bulk:
        raise InputError("--lateral-box: only for a slit (--width), not with --bulk")
    if args.lateral_box == "hexagonal" and args.box is not None:
        raise InputError("--box: not used with --lateral-box hexagonal (the box follows sigma)")
    if args.method == "certified" and args.bulk:
        raise InputError("--method certified: only for a slit (--width), not with --bulk")
    if args.certify_moves < 10_000:
        raise InputError(f"--certify-moves: at least 10000, got {args.certify_moves}")
    if not (math.isfinite(args.certify_budget) and args.certify_budget > 0):
        raise InputError(f"--certify-budget: must be > 0, got {args.certify_budget}")


def _dense(model, r) -> bool:  # noqa: ANN001
    """A dense subcritical slit point: the certified path applies (gcmc.sampling.certificate)."""
    from gcmc.sampling.certificate import is_dense_subcritical

    if r is None:
        return False
    return is_dense_subcritical(model, r.temperature_K, r.density_per_nm3)


def _print_certificate(c) -> None:  # noqa: ANN001 - a gcmc.sampling.certificate.Certificate
    lines = [
        "",
        f"  certificate          {'CERTIFIED' if c.certified else 'not certified'}: "
        f"spread {100 * c.density_spread_rel:.2f} % over {len(c.preparations)} preparations, "
        f"box check {100 * c.box_difference_rel:+.2f} %, {c.cpu_s:.0f} CPU s, "
        f"{c.production_moves} production moves per rung, renewals needed {c.min_renewals}",
    ]
    for p in c.preparations + ([c.box_check] if c.box_check else []):
        lines.append(
            f"    {p.name:<18} box {p.box_nm[0]:.3f} x {p.box_nm[1]:.3f} nm  "
            f"N {p.molecules_mean:9.2f}  density {p.density_per_nm3:8.4f} /nm^3  "
            f"drift z {p.drift_z:5.1f}  renewals {p.renewals:6.1f}"
        )
    print("\n".join(lines))


def _num(value: float, spec: str, unit: str = "") -> str:
    """A number for the summary, or "unavailable" for NaN."""
    if not math.isfinite(value):
        return "unavailable"
    return f"{value:{spec}}{unit}"


def _print_summary(run_) -> None:  # noqa: ANN001 - a gcmc.api.PointRun
    model, r = run_.model, run_.result
    geo = (
        f"slit pore H = {model.width_nm:g} nm (w = {model.internal_width_nm:.3f} nm)"
        if model.geometry == "slit"
        else "bulk cube"
    )
    lx, ly, lz = model.box_lengths_nm
    err = r.isosteric_heat_kJ_per_mol_stderr
    lines = [
        f"{model.probe.name} (eps/k = {model.probe.epsilon_k} K, sigma = {model.probe.sigma_nm} nm)"
        f" in a {geo}; box {lx:g} x {ly:g} x {lz:g} nm, cutoff {model.cutoff_nm:g} nm",
        f"T = {r.temperature_K:g} K   p = {_num(r.pressure_Pa, '.6g', ' Pa')}   "
        f"f = {r.fugacity_Pa:.6g} Pa   ({run_.eos} EOS; bulk density "
        f"{_num(r.bulk_density_per_nm3, '.5g', ' /nm^3')})",
        "",
        f"  molecules            {r.molecules_mean:12.4f} +- {r.molecules_stderr:.4f}",
        f"  density              {r.density_per_nm3:12.5f} +- {r.density_per_nm3_stderr:.5f} /nm^3"
        f"   ({r.density_mmol_per_cm3:.4f} mmol/cm^3)",
        f"  excess density       {_num(r.excess_density_per_nm3, '12.5f', ' /nm^3')}"
        + (
            f"   ({r.excess_density_mmol_per_cm3:.4f} mmol/cm^3)"
            if math.isfinite(r.excess_density_mmol_per_cm3)
            else ""
        ),
        f"  fluid-fluid energy   {r.fluid_fluid_energy_kJ_per_mol:12.4f} kJ/mol per molecule",
        f"  fluid-solid energy   {r.fluid_solid_energy_kJ_per_mol:12.4f} kJ/mol per molecule",
        f"  isosteric heat       {_num(r.isosteric_heat_kJ_per_mol, '12.4f')}"
        + (f" +- {err:.4f} kJ/mol" if math.isfinite(r.isosteric_heat_kJ_per_mol) else ""),
        f"  stat. inefficiency   {r.statistical_inefficiency:12.1f} samples",
        "  acceptance           " + ", ".join(f"{k} {v:.3g}" for k, v in r.acceptance.items()),
        f"  moves                {r.moves:12d} in {r.seconds:.2f} s "
        f"({r.moves / max(r.seconds, 1e-9):.3g} moves/s; engine compile or cache load "
        f"{run_.compile_or_cache_load_seconds:.1f} s)",
        f"  converged            {'yes' if r.converged else 'NO'}   (method {r.method})",
    ]
    if r.flags:
        lines.append("  flags: " + "; ".join(r.flags))
    for note in run_.notes:
        lines.append("  note: " + note)
    print("\n".join(lines))
