"""Reference NWB files written by pynwb, and the values pynwb reads back from them.

Usage: python gen_nwb.py [--out DIR]   (default: tests/reference/fixtures)

Writes DIR/nwb/:
  lfp.nwb           one ElectricalSeries `lfp` in the LFP container of processing/ecephys:
                    int16 data [time, channel] at 1000 Hz from starting_time 0.5 s, conversion
                    2.5e-7 and offset -1e-4 (volts = data * conversion + offset); an electrodes
                    table with a `label` column, locations and x, y, z; a trials table with a
                    `trial_type` column
  two.nwb           two ElectricalSeries in acquisition (`raw` float32 at 2000 Hz with a
                    channel_conversion per channel, and `hp`), for the choice by data.series
  none.nwb          an NWB file with no ElectricalSeries (a TimeSeries only)
  lfp.json, two.json  what pynwb reads: labels, locations, positions, rate, starting_time,
                    conversion, offset, channel_conversion, trials (start, stop, trial_type)
  lfp_volts.npy, two_raw_volts.npy  float64 [channel, time]: the series' data in volts as
                    pynwb's ElectricalSeries.get_data_in_units() gives them (its formula:
                    data * conversion * channel_conversion + offset)

HDF5 files written by pynwb are not byte-identical from run to run (every object gets a random
object_id UUID, which hdmf generates itself). compare.py therefore compares .nwb files by their
contents — every dataset's values and every attribute but object_id — not their bytes. The
values (data, times, labels) come from a fixed seed; identifiers and dates are fixed.
"""
import argparse
import datetime
import json
import pathlib

import numpy as np
from pynwb import NWBHDF5IO, NWBFile, TimeSeries
from pynwb.ecephys import LFP, ElectricalSeries

SEED = 20261203
START = datetime.datetime(2025, 6, 2, 9, 30, 0, tzinfo=datetime.timezone.utc)


def new_file(identifier):
    return NWBFile(session_description="phasewise reader fixture", identifier=identifier,
                   session_start_time=START, file_create_date=[START])


def electrodes(nwb, labels, locations, positions):
    device = nwb.create_device(name="probe")
    group = nwb.create_electrode_group(name="shank", description="a linear probe",
                                       location=locations[0], device=device)
    nwb.add_electrode_column(name="label", description="channel label")
    for label, location, (x, y, z) in zip(labels, locations, positions):
        nwb.add_electrode(location=location, group=group, x=x, y=y, z=z, label=label)
    return nwb.create_electrode_table_region(region=list(range(len(labels))),
                                             description="all channels")


def write(path, nwb):
    with NWBHDF5IO(str(path), "w") as io:
        io.write(nwb, cache_spec=False)


def read_back(path, name):
    """What pynwb makes of the file: the series in volts, its electrodes and the trials."""
    with NWBHDF5IO(str(path), "r") as io:
        nwb = io.read()
        series = nwb.acquisition.get(name) or nwb.processing["ecephys"]["LFP"][name]
        volts = np.asarray(series.get_data_in_units(), dtype=np.float64).T
        table = series.electrodes.table
        rows = list(series.electrodes.data[:])
        meta = {
            "labels": [str(table["label"][i]) for i in rows],
            "locations": [str(table["location"][i]) for i in rows],
            "positions": [[float(table[c][i]) for c in "xyz"] for i in rows],
            "rate": float(series.rate),
            "starting_time": float(series.starting_time),
            "conversion": float(series.conversion),
            "offset": float(series.offset),
            "channel_conversion": None if series.channel_conversion is None
            else [float(v) for v in series.channel_conversion[:]],
            "trials": [],
        }
        if nwb.trials is not None:
            trials = nwb.trials
            for i in range(len(trials)):
                meta["trials"].append({
                    "start_time": float(trials["start_time"][i]),
                    "stop_time": float(trials["stop_time"][i]),
                    "trial_type": str(trials["trial_type"][i]),
                })
    return volts, meta


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--out", default=str(pathlib.Path(__file__).parent / "fixtures"))
    out = pathlib.Path(ap.parse_args().out) / "nwb"
    out.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(SEED)

    # lfp.nwb: processed LFP, int16 with conversion and offset, trials.
    nwb = new_file("phasewise-fixture-lfp")
    labels = ["CA1-a", "CA1-b", "DG-a", "DG-b"]
    locations = ["CA1", "CA1", "DG", "DG"]
    positions = [(-2.0, 1.5, 1.2), (-2.0, 1.5, 1.4), (-2.1, 1.9, 2.0), (-2.1, 1.9, 2.2)]
    region = electrodes(nwb, labels, locations, positions)
    n = 2000
    t = np.arange(n) / 1000.0
    data = np.stack([3000 * np.sin(2 * np.pi * (6 + c) * t + c) + 200 * rng.standard_normal(n)
                     for c in range(4)], axis=1)
    lfp = ElectricalSeries(name="lfp", data=np.round(data).astype(np.int16), electrodes=region,
                           rate=1000.0, starting_time=0.5, conversion=2.5e-7, offset=-1e-4,
                           filtering="low-pass 300 Hz")
    module = nwb.create_processing_module(name="ecephys", description="processed ephys")
    module.add(LFP(electrical_series=lfp))
    nwb.add_trial_column(name="trial_type", description="the cue shown")
    for start, kind in [(0.7, "cue-a"), (1.25, "cue-b"), (1.9, "cue-a")]:
        nwb.add_trial(start_time=start, stop_time=start + 0.3, trial_type=kind)
    write(out / "lfp.nwb", nwb)

    # two.nwb: two raw series, float32 with a per-channel conversion; no trials.
    nwb = new_file("phasewise-fixture-two")
    region = electrodes(nwb, ["e1", "e2", "e3"], ["CTX", "CTX", "CTX"],
                        [(0.0, 0.0, 0.0), (0.0, 0.0, 0.1), (0.0, 0.0, 0.2)])
    raw = rng.standard_normal((1000, 3)).astype(np.float32) * 50
    nwb.add_acquisition(ElectricalSeries(name="raw", data=raw, electrodes=region, rate=2000.0,
                                         conversion=1e-6, channel_conversion=[1.0, 0.5, 2.0]))
    nwb.add_acquisition(ElectricalSeries(name="hp", data=raw[:, :2] * 0.5, electrodes=
                                         nwb.create_electrode_table_region(region=[0, 1],
                                                                           description="two"),
                                         rate=2000.0, conversion=1e-6))
    write(out / "two.nwb", nwb)

    # none.nwb: no ElectricalSeries at all.
    nwb = new_file("phasewise-fixture-none")
    nwb.add_acquisition(TimeSeries(name="speed", data=np.arange(10.0), unit="m/s", rate=10.0))
    write(out / "none.nwb", nwb)

    for stem, name, npy in [("lfp", "lfp", "lfp_volts"), ("two", "raw", "two_raw_volts")]:
        volts, meta = read_back(out / f"{stem}.nwb", name)
        np.save(out / f"{npy}.npy", volts)
        (out / f"{stem}.json").write_text(json.dumps(meta, indent=1, sort_keys=True) + "\n")


if __name__ == "__main__":
    main()
