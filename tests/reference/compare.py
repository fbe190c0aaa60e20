"""Compare two fixture trees written by tests/reference/gen_*.py.

Usage: python compare.py COMMITTED_DIR REGENERATED_DIR

Every file must exist on both sides. JSON files and non-float arrays must be equal exactly; float
arrays must be equal bit for bit unless --tolerance is given. Exit status 1 on any difference,
with one line per differing file.
"""
import argparse
import json
import pathlib
import sys

import numpy as np


def hdf5_difference(a, b):
    """How two HDF5 (NWB) files differ in content, or None: the same groups and datasets, equal
    dataset values and equal attributes, except `object_id`, the random UUID that hdmf gives
    every object it writes (so pynwb's files never match byte for byte)."""
    import h5py  # installed with pynwb (tests/reference/requirements.txt)

    def contents(path):
        items = {}
        with h5py.File(path, "r") as f:
            def visit(name, obj):
                attrs = {k: repr(v.tolist() if hasattr(v, "tolist") else v)
                         for k, v in obj.attrs.items()
                         if k != "object_id" and not isinstance(v, h5py.Reference)}
                value = None
                if isinstance(obj, h5py.Dataset):
                    data = obj[()]
                    value = repr(data.tolist() if hasattr(data, "tolist") else data)
                items[name] = (attrs, value)
            f.visititems(visit)
        return items

    ca, cb = contents(a), contents(b)
    if ca.keys() != cb.keys():
        return f"objects differ: {sorted(ca.keys() ^ cb.keys())[:5]}"
    for name in sorted(ca):
        if ca[name] != cb[name]:
            return f"{name} differs"
    return None


def main() -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("committed")
    ap.add_argument("regenerated")
    ap.add_argument("--tolerance", type=float, default=0.0,
                    help="largest allowed |a - b| / max(1, |a|) for float arrays (default: exact)")
    args = ap.parse_args()
    a_root, b_root = pathlib.Path(args.committed), pathlib.Path(args.regenerated)
    a_files = {p.relative_to(a_root) for p in a_root.rglob("*") if p.is_file()}
    b_files = {p.relative_to(b_root) for p in b_root.rglob("*") if p.is_file()}
    bad = []
    for rel in sorted(a_files ^ b_files):
        bad.append(f"{rel}: present on one side only")
    for rel in sorted(a_files & b_files):
        pa, pb = a_root / rel, b_root / rel
        if pa.read_bytes() == pb.read_bytes():
            continue
        if rel.suffix == ".npy":
            xa, xb = np.load(pa), np.load(pb)
            if xa.shape != xb.shape or xa.dtype != xb.dtype:
                bad.append(f"{rel}: shape/dtype {xa.shape}/{xa.dtype} vs {xb.shape}/{xb.dtype}")
                continue
            if np.issubdtype(xa.dtype, np.inexact) and args.tolerance > 0:
                err = np.nanmax(np.abs(xa - xb) / np.maximum(1.0, np.abs(xa))) if xa.size else 0.0
                if err <= args.tolerance:
                    continue
                bad.append(f"{rel}: largest relative difference {err:.3e}")
                continue
            bad.append(f"{rel}: values differ")
        elif rel.suffix == ".json":
            if json.loads(pa.read_text()) != json.loads(pb.read_text()):
                bad.append(f"{rel}: JSON differs")
        elif rel.suffix == ".nwb":
            difference = hdf5_difference(pa, pb)
            if difference:
                bad.append(f"{rel}: {difference}")
        else:
            bad.append(f"{rel}: bytes differ")
    for line in bad:
        print(line)
    print(f"compared {len(a_files & b_files)} fixture files: {len(bad)} differences")
    return 1 if bad else 0


if __name__ == "__main__":
    sys.exit(main())
