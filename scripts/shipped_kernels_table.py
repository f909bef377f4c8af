"""The table of shipped kernels in kernels/README.md ("Shipped kernels"): for every kernel file
given, its probe, temperature, widths, pressures, the verdict of `gcmc check` against the
target stored in it (the criteria that warn or fail), the build's CPU time and the file size.

    python3 scripts/shipped_kernels_table.py kernels/*.v1.h5

Prints a Markdown table on standard output; reads the kernels, writes nothing."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import numpy as np


def row(path: Path) -> str:
    from gcmc.kernel.reader import open_kernel
    from gcmc.quality.criteria import run_checks
    from gcmc.quality.target import QualityTarget, check_settings

    k = open_kernel(path)
    d = k.data
    target = QualityTarget.from_dict(d.provenance.get("target") or QualityTarget().to_dict())
    rep = run_checks(d, check_settings(target))
    notes = [f"{c.key} {c.verdict}" for c in rep.criteria if c.verdict in ("warn", "fail")]
    ref = d.provenance.get("refinement") or {}
    cpu = ref.get("cpu_seconds", float("nan"))
    p = np.asarray(d.pressures_Pa, float)
    rel = np.asarray(d.relative_pressures, float)
    prange = f"{np.nanmin(p):.3g}-{np.nanmax(p):.3g} Pa"
    if np.any(np.isfinite(rel)):
        prange += f" (p/p0 {np.nanmin(rel):.2g}-{np.nanmax(rel):.2g})"
    acc = np.asarray(d.accessible, bool)[0]
    h = np.asarray(d.widths_H_nm, float)
    return (
        f"| [`{path.name}`]({path.name}) | {d.probe['name']} | "
        f"{', '.join(f'{t:g}' for t in d.temperatures_K)} | "
        f"{h.size} ({h[0]:.4g}-{h[-1]:.4g}; accessible from {h[acc][0]:.4g}) | "
        f"{prange} | **{rep.verdict}** (exit {rep.exit_code}){': ' if notes else ''}"
        f"{', '.join(notes)} | {len(ref.get('rounds', []))} | {cpu:.0f} | "
        f"{path.stat().st_size / 1e6:.2f} |"
    )


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("kernels", nargs="+", type=Path, help="kernel files")
    args = ap.parse_args(argv)
    print(
        "| file | probe | T (K) | widths H (nm) | pressures | `gcmc check` (own target) | "
        "rounds | CPU s | MB |"
    )
    print("|---|---|---|---|---|---|---:|---:|---:|")
    for path in args.kernels:
        print(row(path))
    return 0


if __name__ == "__main__":
    sys.exit(main())
