"""Compare two kernel files object by object: every group, dataset and attribute (names,
dtypes, shapes, storage, attached dimension scales and labels, values).

Used to show that a change to the code leaves the kernels it writes the same: build the same
config before and after, then

    python3 scripts/compare_kernel_files.py before.h5 after.h5

Only what must differ between two runs is skipped: the timings (``points/*/seconds``,
``provenance/task_seconds``), the creation time (``@created``, ``created_utc`` in the
provenance JSON) and the checksums that cover them. Exit code 0 when identical, 1 otherwise.
"""

from __future__ import annotations

import json
import sys

import h5py
import numpy as np

SKIP_ATTRS = {"checksum_sha256", "created"}
BOOKKEEPING = {"DIMENSION_LIST", "REFERENCE_LIST"}  # file addresses; dims compared instead
TIMINGS = {"provenance/task_seconds", "points/adsorption/seconds", "points/desorption/seconds"}


def _objects(f: h5py.File) -> dict[str, h5py.HLObject]:
    out: dict[str, h5py.HLObject] = {}
    f.visititems(lambda name, obj: out.__setitem__(name, obj))
    return out


def _same(a: object, b: object) -> bool:
    a, b = np.asarray(a), np.asarray(b)
    if a.dtype.kind in "OSU" or b.dtype.kind in "OSU":
        return a.shape == b.shape and a.astype(str).tolist() == b.astype(str).tolist()
    return a.dtype == b.dtype and a.shape == b.shape and np.array_equal(a, b, equal_nan=True)


def _dims(ds: h5py.Dataset) -> list[tuple[str, list[str]]]:
    return [(d.label, [s.name for s in d.values()]) for d in ds.dims]


def compare(path_a: str, path_b: str) -> tuple[list[str], int, int]:
    """(differences, datasets compared, attributes compared)."""
    bad: list[str] = []
    n_ds = n_attr = 0
    with h5py.File(path_a, "r") as a, h5py.File(path_b, "r") as b:
        oa_all, ob_all = _objects(a), _objects(b)
        if set(oa_all) != set(ob_all):
            bad.append(f"objects differ: {sorted(set(oa_all) ^ set(ob_all))}")
        for path in ["/", *sorted(set(oa_all) & set(ob_all))]:
            oa, ob = (a, b) if path == "/" else (oa_all[path], ob_all[path])
            ka, kb = set(oa.attrs) - BOOKKEEPING, set(ob.attrs) - BOOKKEEPING
            if ka != kb:
                bad.append(f"{path}: attribute names differ {sorted(ka ^ kb)}")
            for k in sorted(ka & kb):
                n_attr += 1
                if k not in SKIP_ATTRS and not _same(oa.attrs[k], ob.attrs[k]):
                    bad.append(f"{path}@{k}: {oa.attrs[k]!r} != {ob.attrs[k]!r}")
            if type(oa) is not type(ob):
                bad.append(f"{path}: group in one file, dataset in the other")
                continue
            if not isinstance(oa, h5py.Dataset):
                continue
            n_ds += 1
            if (oa.dtype, oa.shape) != (ob.dtype, ob.shape):
                bad.append(f"{path}: {oa.dtype}{oa.shape} != {ob.dtype}{ob.shape}")
            if (oa.compression, oa.chunks) != (ob.compression, ob.chunks):
                bad.append(f"{path}: storage differs")
            if _dims(oa) != _dims(ob):
                bad.append(f"{path}: dimension scales or labels differ")
            if path in TIMINGS:
                continue
            if path == "provenance/provenance_json":
                ja, jb = json.loads(oa[()]), json.loads(ob[()])
                ja.pop("created_utc", None)
                jb.pop("created_utc", None)
                if ja != jb:
                    bad.append(f"{path}: provenance differs")
            elif not _same(oa[()], ob[()]):
                bad.append(f"{path}: values differ")
    return bad, n_ds, n_attr


def main(argv: list[str]) -> int:
    """Compare the two files named in ``argv``; print the result; the exit code."""
    if len(argv) != 2:
        print("usage: compare_kernel_files.py A.h5 B.h5", file=sys.stderr)
        return 2
    bad, n_ds, n_attr = compare(*argv)
    print(f"compared {n_ds} datasets and {n_attr} attributes")
    print("\n".join(bad) if bad else "identical (timings, creation time, checksums skipped)")
    return 1 if bad else 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
