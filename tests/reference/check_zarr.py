"""Check phasewise's Zarr exports (`format: zarr`) with the pinned zarr and xarray.

Usage: python check_zarr.py --phasewise BIN --pipeline PIPELINE --npy OUTPUT_DIR --pair A B

Writes a copy of PIPELINE in a temporary folder whose exported stages say `format: zarr`
(recordings and output redirected, read and written with the pinned ruamel.yaml), runs it with
BIN into a fresh cache, and then, for every NPY export of OUTPUT_DIR (a run of the same
pipeline with the default format), opens the store of the same stage in one line,
`xarray.open_zarr(store)` (no warning: the metadata is consolidated), and checks that

- every value equals the NPY's bit for bit (NaN where the NPY has NaN);
- the dims, and every coordinate, equal the NPY's sidecar (format 2): freq in Hz and time in s
  with their units, the pair axis as `channel_a`/`channel_b`, subjects as BIDS names;
- the attributes hold `format: phasewise-array`, `format_version: 2`, the values' units, the
  stage and the key; the pair A-B can be selected by `channel_a`/`channel_b`;
- the array's Zarr v3 metadata (read by zarr itself) has `dimension_names` and compresses
  with gzip behind a crc32c checksum.

Exit status 1 with one line per failure.
"""
import argparse
import json
import pathlib
import subprocess
import sys
import tempfile
import warnings

import numpy
import xarray
import zarr
from ruamel.yaml import YAML


def zarr_pipeline(pipeline: pathlib.Path, work: pathlib.Path) -> pathlib.Path:
    yaml = YAML()
    doc = yaml.load(pipeline.read_text())
    base = pipeline.parent.resolve()
    doc["data"]["recordings"] = str(base / doc["data"]["recordings"])
    doc["output"] = "results"
    for stage in doc["stages"].values():
        if stage.get("export"):
            stage["format"] = "zarr"
    out = work / "pipeline.yaml"
    with open(out, "w") as f:
        yaml.dump(doc, f)
    return out


def same_bits(a: numpy.ndarray, b: numpy.ndarray) -> bool:
    if a.shape != b.shape or a.dtype != b.dtype:
        return False
    nan_a, nan_b = numpy.isnan(a), numpy.isnan(b)
    if not numpy.array_equal(nan_a, nan_b):
        return False
    width = {4: numpy.uint32, 8: numpy.uint64}[a.dtype.itemsize]
    return numpy.array_equal(a[~nan_a].view(width), b[~nan_b].view(width))


def check(npy: pathlib.Path, store: pathlib.Path, pair, bad):
    sidecar = json.loads(npy.with_suffix(".json").read_text())
    stage = sidecar["name"]
    if not store.is_dir():
        bad.append(f"{store}: no store for {npy}")
        return
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        try:
            ds = xarray.open_zarr(store)
        except Warning as w:
            bad.append(f"{store}: opening warns: {w}")
            return
    da = ds[stage]
    if list(da.dims) != sidecar["dims"]:
        bad.append(f"{store}: dims {list(da.dims)}, sidecar {sidecar['dims']}")
        return
    values = da.values
    if not same_bits(values, numpy.load(npy)):
        bad.append(f"{store}: values differ from {npy}")
    for name, coord in sidecar["coords"].items():
        if name not in da.coords:
            bad.append(f"{store}: coordinate {name} missing")
            continue
        got = da.coords[name]
        if list(got.dims) != coord["dims"]:
            bad.append(f"{store}: coordinate {name} along {list(got.dims)}")
        if [x for x in got.values.tolist()] != coord["data"]:
            bad.append(f"{store}: coordinate {name} differs from the sidecar's")
        if got.attrs.get("units") != coord["attrs"].get("units"):
            bad.append(f"{store}: coordinate {name} units {got.attrs.get('units')!r}")
    for dim, unit in (("freq", "Hz"), ("time", "s")):
        if dim in da.dims and da[dim].attrs.get("units") != unit:
            bad.append(f"{store}: {dim} has units {da[dim].attrs.get('units')!r}")
    for key in ("format", "format_version", "units", "stage", "key", "subject"):
        if da.attrs.get(key) != sidecar["attrs"].get(key) or ds.attrs.get(key) != sidecar["attrs"].get(key):
            bad.append(f"{store}: attribute {key} {da.attrs.get(key)!r}, sidecar {sidecar['attrs'].get(key)!r}")
    if da.attrs.get("format") != "phasewise-array" or da.attrs.get("format_version") != 2:
        bad.append(f"{store}: not phasewise-array format 2")
    if "pair" in da.dims:
        a, b = pair
        one = da.isel(pair=((da.channel_a == a) & (da.channel_b == b)).values.nonzero()[0])
        if one.sizes["pair"] != 1:
            bad.append(f"{store}: pair {a}-{b} found {one.sizes['pair']} times")
    meta = zarr.open_array(store=str(store), path=stage, mode="r").metadata
    if list(meta.dimension_names or []) != sidecar["dims"]:
        bad.append(f"{store}: dimension_names {meta.dimension_names}")
    codecs = [type(c).__name__ for c in meta.codecs]
    if "GzipCodec" not in codecs or "Crc32cCodec" not in codecs:
        bad.append(f"{store}: codecs {codecs}")


def main() -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--phasewise", required=True)
    ap.add_argument("--pipeline", required=True)
    ap.add_argument("--npy", required=True)
    ap.add_argument("--pair", nargs=2, required=True)
    args = ap.parse_args()
    root = pathlib.Path(args.npy)
    bad = []
    with tempfile.TemporaryDirectory() as tmp:
        work = pathlib.Path(tmp)
        pipeline = zarr_pipeline(pathlib.Path(args.pipeline), work)
        subprocess.run([args.phasewise, "run", str(pipeline), "--cache", str(work / "cache")],
                       check=True)
        npys = sorted(root.rglob("*.npy"))
        if not npys:
            bad.append(f"{root}: no NPY exports to compare with")
        for npy in npys:
            rel = npy.relative_to(root).with_suffix(".zarr")
            check(npy, work / "results" / rel, args.pair, bad)
        left = sorted(p.relative_to(work / "results") for p in (work / "results").rglob("*.npy"))
        if left:
            bad.append(f"format: zarr still wrote NPY files: {left}")
    for line in bad:
        print(line)
    print(f"checked {len(npys)} Zarr stores against their NPY exports: "
          f"{'ok' if not bad else f'{len(bad)} failures'}")
    return 1 if bad else 0


if __name__ == "__main__":
    sys.exit(main())
