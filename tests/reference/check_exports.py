"""Check that a phasewise output folder opens in one line with the pinned xarray and pandas.

Usage: python check_exports.py OUTPUT_DIR --pair A B

Every exported array (`**/*.npy` with its sidecar, format 2) is loaded exactly as the README
says, `xarray.DataArray.from_dict({**json.load(f), "data": numpy.load(npy)})`; freq and time
must carry their units (Hz, s); the pair A-B is selected by its `channel_a`/`channel_b`
coordinates. Every table (`**/*.tsv`) is read by pandas with warnings turned into errors: the
subject column must hold strings (`sub-01`, `group`), pairs two columns, and the column dictionary
`<stage>.json` (beside the table, or above a subject's table) must name every column. A value
of the group table is compared with the same cell of the group array, so the two agree.
Exit status 1 with one line per failure.
"""
import argparse
import json
import pathlib
import sys
import warnings

import numpy
import pandas
import xarray


def load(npy: pathlib.Path) -> xarray.DataArray:
    with open(npy.with_suffix(".json")) as f:
        return xarray.DataArray.from_dict({**json.load(f), "data": numpy.load(npy)})


def check_array(npy, pair, bad):
    da = load(npy)
    attrs = da.attrs
    if attrs.get("format") != "phasewise-array" or attrs.get("format_version") != 2:
        bad.append(f"{npy}: sidecar is not phasewise-array format 2")
    if tuple(da.shape) != tuple(json.load(open(npy.with_suffix(".json")))["shape"]):
        bad.append(f"{npy}: shape differs from the sidecar's")
    for dim, unit in (("freq", "Hz"), ("time", "s")):
        if dim in da.dims and da[dim].attrs.get("units") != unit:
            bad.append(f"{npy}: coordinate {dim} has units {da[dim].attrs.get('units')!r}")
    if "pair" in da.dims:
        a, b = pair
        one = da.isel(pair=((da.channel_a == a) & (da.channel_b == b)).values.nonzero()[0])
        if one.sizes["pair"] != 1:
            bad.append(f"{npy}: pair {a}-{b} found {one.sizes['pair']} times")
        # The same pair through a pandas MultiIndex, as a user would select it.
        indexed = da.set_index(pair=["channel_a", "channel_b"]).sel(channel_a=a, channel_b=b)
        if not numpy.array_equal(indexed.values, one.squeeze("pair").values, equal_nan=True):
            bad.append(f"{npy}: the two selections of {a}-{b} differ")
    if "subject" in da.dims:
        names = [str(s) for s in da.subject.values]
        if not all(s == "group" or s.startswith("sub-") for s in names):
            bad.append(f"{npy}: subjects {names} are not BIDS names")
    return da


def check_table(tsv, root, bad):
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("error")
            table = pandas.read_csv(tsv, sep="\t", na_values="n/a", keep_default_na=False)
    except Warning as w:
        bad.append(f"{tsv}: pandas warns: {w}")
        return None
    if "subject" in table:
        if table["subject"].dtype != object or not all(isinstance(s, str) for s in table["subject"]):
            bad.append(f"{tsv}: subject column read as {table['subject'].dtype}")
        elif not table["subject"].str.match(r"^(sub-.+|group)$").all():
            bad.append(f"{tsv}: subjects are not BIDS names")
    if "pair" in table:
        bad.append(f"{tsv}: pairs in one joined column")
    dictionary = tsv.with_suffix(".json")
    if not dictionary.is_file():
        dictionary = root / dictionary.name
    columns = json.load(open(dictionary))
    missing = [c for c in table.columns if c not in columns]
    if missing:
        bad.append(f"{tsv}: columns {missing} not in {dictionary}")
    for name, entry in columns.items():
        if not entry.get("Description"):
            bad.append(f"{dictionary}: column {name} has no Description")
    return table


def main() -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("output")
    ap.add_argument("--pair", nargs=2, required=True)
    args = ap.parse_args()
    root = pathlib.Path(args.output)
    bad = []
    arrays = {npy: check_array(npy, args.pair, bad) for npy in sorted(root.rglob("*.npy"))}
    tables = {tsv: check_table(tsv, root, bad) for tsv in sorted(root.rglob("*.tsv"))}
    if not arrays:
        bad.append(f"{root}: no exported arrays")
    if not any("freq" in da.dims and "time" in da.dims for da in arrays.values()):
        bad.append(f"{root}: no exported array has both freq and time")
    # A group table's cell equals the group array's: `mean` of the planted pair, first of
    # everything else.
    for tsv, table in tables.items():
        npy = root / "group" / (tsv.stem + ".npy")
        if npy not in arrays or table is None or "mean" not in table:
            continue
        da = arrays[npy]
        a, b = args.pair
        rows = table[(table.subject == "group") & (table.channel_a == a) & (table.channel_b == b)]
        if rows.empty:
            bad.append(f"{tsv}: no group row of {a}-{b}")
            continue
        row = rows.iloc[0]
        cell = da.set_index(pair=["channel_a", "channel_b"]).sel(
            statistic="mean", subject="group", channel_a=a, channel_b=b,
            **{d: row[d] for d in da.dims if d not in ("statistic", "subject", "pair")})
        if numpy.float32(row["mean"]) != numpy.float32(cell.item()):
            bad.append(f"{tsv}: group mean of {a}-{b} {row['mean']} but array {cell.item()}")
    for line in bad:
        print(line)
    print(f"checked {len(arrays)} arrays and {len(tables)} tables: "
          f"{'ok' if not bad else f'{len(bad)} failures'}")
    return 1 if bad else 0


if __name__ == "__main__":
    sys.exit(main())
