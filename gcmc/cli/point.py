"""`gcmc point`: simulate one state point, for exploring a model before a full kernel."""

from __future__ import annotations

import argparse
import json
import math
import sys

from gcmc.errors import InputError

HELP = """Simulate one state point: a probe in a graphitic slit pore of width H (or in a
periodic bulk cube) in equilibrium with a bulk gas at a given pressure (converted to
fugacity by an equation of state) or at a given fugacity. Prints a summary, or one JSON
object with --json."""


def register(sub: argparse._SubParsersAction) -> None:
    """Register the ``point`` subcommand."""
    p = sub.add_parser(
        "point",
        help="simulate one state point",
        description=HELP,
        formatter_class=argparse.ArgumentDefaultsHelpFormatter,
    )
    g = p.add_argument_group("probe")
    g.add_argument(
        "--probe", help="a probe of the library (gcmc/physics/data/probes.toml), e.g. argon"
    )
    g.add_argument("--epsilon-k", type=float, help="inline probe: LJ epsilon/k in K")
    g.add_argument("--sigma-nm", type=float, help="inline probe: LJ sigma in nm")
    g.add_argument("--probe-file", help="a TOML probe library of your own (default: the project's)")
    s = p.add_argument_group("state")
    s.add_argument("--temperature", type=float, required=True, metavar="K", help="temperature in K")
    s.add_argument(
        "--pressure", type=float, metavar="PA", help="bulk pressure in Pa (through --eos)"
    )
    s.add_argument(
        "--fugacity", type=float, metavar="PA", help="bulk fugacity in Pa (no EOS needed)"
    )
    s.add_argument(
        "--eos",
        default=None,
        help="reference | peng-robinson | lennard-jones | ideal (default: reference "
        "where the probe has one, else lennard-jones)",
    )
    geo = p.add_argument_group("geometry")
    geo.add_argument(
        "--width",
        type=float,
        metavar="NM",
        help="slit width H in nm, between the planes of carbon nuclei",
    )
    geo.add_argument("--bulk", action="store_true", help="a periodic cube of bulk fluid instead")
    geo.add_argument(
        "--box",
        type=float,
        metavar="NM",
        help="periodic edge in nm (default: max(2 x cutoff, 10 sigma))",
    )
    geo.add_argument("--cutoff", type=float, metavar="NM", help="LJ cutoff in nm (default 3 sigma)")
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
        help="trial moves in all (the first fifth equilibrates)",
    )
    m.add_argument(
        "--replicas",
        type=int,
        default=2,
        help="independent replicas (default 2: the second starts over-filled; a point whose "
        "replicas disagree is flagged as unconverged; 1 skips that check)",
    )
    m.add_argument(
        "--insertion-trials",
        type=int,
        default=0,
        help="trial positions per insertion (1 plain, k > 1 biased, 0 automatic)",
    )
    m.add_argument("--seed", type=int, default=12345, help="random seed")
    p.add_argument("--json", action="store_true", help="print one JSON object")
    p.set_defaults(func=run)


def _finite(name: str, value: float | None, positive: bool = True) -> None:
    if value is None:
        return
    if not math.isfinite(value):
        raise InputError(f"--{name}: must be a finite number, got {value}")
    if positive and value <= 0:
        raise InputError(f"--{name}: must be > 0, got {value}")


def run(args: argparse.Namespace) -> int:
    """Run ``gcmc point``: simulate one state point and print (or write) it; the exit code."""
    from gcmc.physics.eos import make_eos
    from gcmc.physics.model import BULK, SLIT, PoreModel, Probe, default_solid, get_probe
    from gcmc.physics.potentials import default_box_nm, default_cutoff_nm
    from gcmc.sampling.point import SamplingSettings, ThermoState, simulate_point

    for name in (
        "temperature",
        "pressure",
        "fugacity",
        "box",
        "cutoff",
        "epsilon_k",
        "sigma_nm",
        "epsilon_sf_scale",
    ):
        _finite(name.replace("_", "-"), getattr(args, name))
    if args.width is not None and not math.isfinite(args.width):
        raise InputError(f"--width: must be a finite number, got {args.width}")
    if args.width is not None and args.width <= 0:
        raise InputError(f"--width: must be > 0 nm, got {args.width}")
    if (args.width is None) == (not args.bulk):
        raise InputError("--width NM or --bulk: give exactly one")
    if (args.pressure is None) == (args.fugacity is None):
        raise InputError("--pressure PA or --fugacity PA: give exactly one")
    if args.moves < 10_000:
        raise InputError(f"--moves: at least 10000, got {args.moves}")
    if args.replicas < 1:
        raise InputError(f"--replicas: at least 1, got {args.replicas}")
    if args.probe:
        if args.epsilon_k is not None or args.sigma_nm is not None:
            raise InputError("--probe and --epsilon-k/--sigma-nm: give one or the other")
        probe = get_probe(args.probe, args.probe_file)
    elif args.epsilon_k is not None and args.sigma_nm is not None:
        probe = Probe(name="inline", epsilon_k=args.epsilon_k, sigma_nm=args.sigma_nm)
    else:
        raise InputError("--probe NAME, or --epsilon-k K with --sigma-nm NM: a probe is needed")
    solid = default_solid()
    if args.epsilon_sf_scale is not None:
        from dataclasses import replace

        solid = replace(solid, epsilon_sf_scale=args.epsilon_sf_scale)
    cutoff = args.cutoff if args.cutoff is not None else default_cutoff_nm(probe)
    box = args.box if args.box is not None else default_box_nm(cutoff, probe.sigma_nm)
    if cutoff > 0.5 * box:
        raise InputError(f"--cutoff: {cutoff:g} nm is larger than half the box ({box:g} nm)")
    geometry = BULK if args.bulk else SLIT
    model = PoreModel(
        probe=probe,
        solid=solid,
        geometry=geometry,
        cutoff_nm=cutoff,
        box_nm=box,
        width_nm=args.width or 0.0,
    )
    if geometry == SLIT and model.internal_width_nm <= 0:
        raise InputError(
            f"--width: H = {args.width} nm is not wider than sigma_ss "
            f"({solid.sigma_nm} nm): no pore volume"
        )
    eos_name = args.eos or ("reference" if probe.reference_eos else "lennard-jones")
    eos = make_eos(eos_name, probe)
    if args.pressure is not None:
        bulk = eos.state(args.temperature, args.pressure)
    else:
        bulk = eos.state_from_fugacity(args.temperature, args.fugacity)
    state = ThermoState(
        temperature_K=args.temperature,
        fugacity_Pa=bulk.fugacity_Pa,
        pressure_Pa=bulk.pressure_Pa,
        bulk_density_per_nm3=bulk.density_per_nm3,
        residual_enthalpy_K=bulk.residual_enthalpy_K,
        eos=eos.name,
    )
    eq = args.moves // 5
    settings = SamplingSettings(
        equilibration_moves=eq,
        production_moves=args.moves - eq,
        replicas=args.replicas,
        insertion_trials=args.insertion_trials,
    )
    settings.validate()
    from gcmc.sampling.box import warm_up

    compile_s = warm_up()
    total = args.moves * args.replicas + (eq // 2 if args.replicas > 1 else 0)
    from tqdm import tqdm

    with tqdm(
        total=total,
        unit="move",
        unit_scale=True,
        desc="point",
        file=sys.stderr,
        disable=None,
        leave=False,
    ) as bar:
        outcome = simulate_point(model, state, settings, args.seed, progress=bar.update)
    r = outcome.result
    payload = r.to_dict()
    payload["model"] = model.describe(slab_tail=settings.slab_tail)
    payload["compile_or_cache_load_seconds"] = compile_s
    if args.json:
        print(json.dumps(payload, default=_json_default))
        return 0
    _print_summary(model, r, eos.name, compile_s)
    return 0


def _json_default(o: object) -> object:
    try:
        return float(o)  # numpy scalars
    except (TypeError, ValueError):
        return str(o)


def _print_summary(model, r, eos_name: str, compile_s: float) -> None:
    geo = (
        f"slit pore H = {model.width_nm:g} nm (w = {model.internal_width_nm:.3f} nm)"
        if model.geometry == "slit"
        else "bulk cube"
    )
    lx, ly, lz = model.box_lengths_nm
    lines = [
        f"{model.probe.name} (eps/k = {model.probe.epsilon_k} K, sigma = {model.probe.sigma_nm} nm)"
        f" in a {geo}; box {lx:g} x {ly:g} x {lz:g} nm, cutoff {model.cutoff_nm:g} nm",
        f"T = {r.temperature_K:g} K   p = {r.pressure_Pa:.6g} Pa   f = {r.fugacity_Pa:.6g} Pa"
        f"   ({eos_name} EOS; bulk density {r.bulk_density_per_nm3:.5g} /nm^3)",
        "",
        f"  molecules            {r.molecules_mean:12.4f} +- {r.molecules_stderr:.4f}",
        f"  density              {r.density_per_nm3:12.5f} +- {r.density_per_nm3_stderr:.5f} /nm^3"
        f"   ({r.density_mmol_per_cm3:.4f} mmol/cm^3)",
        f"  excess density       {r.excess_density_per_nm3:12.5f} /nm^3"
        f"   ({r.excess_density_mmol_per_cm3:.4f} mmol/cm^3)",
        f"  fluid-fluid energy   {r.fluid_fluid_energy_kJ_per_mol:12.4f} kJ/mol per molecule",
        f"  fluid-solid energy   {r.fluid_solid_energy_kJ_per_mol:12.4f} kJ/mol per molecule",
        f"  isosteric heat       {r.isosteric_heat_kJ_per_mol:12.4f} +- "
        f"{r.isosteric_heat_kJ_per_mol_stderr:.4f} kJ/mol",
        f"  stat. inefficiency   {r.statistical_inefficiency:12.1f} samples",
        "  acceptance           " + ", ".join(f"{k} {v:.3g}" for k, v in r.acceptance.items()),
        f"  moves                {r.moves:12d} in {r.seconds:.2f} s "
        f"({r.moves / max(r.seconds, 1e-9):.3g} moves/s; engine load {compile_s:.1f} s)",
        f"  converged            {'yes' if r.converged else 'NO'}",
    ]
    if r.flags:
        lines.append("  flags: " + "; ".join(r.flags))
    print("\n".join(lines))
