"""Write the demo study's first subjects as NWB files with pynwb (for the NWB-vs-EDF test).

Usage: python nwb_demo.py DEMO_DATA OUT [--subjects 2]

For each subject sub-XX, reads demo-data/sub-XX/eeg/sub-XX_task-cue_eeg.edf with pyEDFlib
(physical values in uV) and writes OUT/sub-XX/ieeg/sub-XX_task-cue_ieeg.nwb: one ElectricalSeries
`eeg` in /acquisition, float32 volts (conversion 1, offset 0) at the EDF's rate, an electrodes table
with a `label` column (x, y, z from the demo's electrodes.tsv, NaN for the EOG channel), and a
trials table whose `trial_type` column and start times are the rows of the demo's events.tsv. The
demo's channels.tsv is copied beside it (BIDS: the VEOG channel's type). No events.tsv is copied:
the NWB pipeline reads its events from the trials table (`events: annotations`).

Not a fixture: the files are large and pynwb's HDF5 bytes differ from run to run (random
object_ids). CI runs this script and then the ignored Rust test that reads them
(tests/it/demo.rs, demo_study_as_nwb_gives_the_edf_results).
"""
import argparse
import csv
import datetime
import pathlib
import shutil

import numpy as np
import pyedflib
from pynwb import NWBHDF5IO, NWBFile
from pynwb.ecephys import ElectricalSeries

START = datetime.datetime(2026, 1, 1, 10, 0, 0, tzinfo=datetime.timezone.utc)


def rows(path):
    with open(path, newline="") as f:
        return list(csv.DictReader(f, delimiter="\t"))


def convert(demo, out, subject):
    base = demo / subject / "eeg" / f"{subject}_task-cue"
    reader = pyedflib.EdfReader(str(base) + "_eeg.edf")
    try:
        labels = [reader.getLabel(i) for i in range(reader.signals_in_file)]
        rate = float(reader.getSampleFrequency(0))
        # Physical values in uV (the demo's unit), to volts.
        data = np.stack([reader.readSignal(i) for i in range(len(labels))], axis=1) * 1e-6
    finally:
        reader.close()
    names = [label.split(" ", 1)[1] if " " in label else label for label in labels]
    where = {r["name"]: r for r in rows(str(base) + "_electrodes.tsv")}
    nwb = NWBFile(session_description="phasewise demo subject as NWB",
                  identifier=f"phasewise-demo-{subject}", session_start_time=START,
                  file_create_date=[START])
    device = nwb.create_device(name="cap")
    group = nwb.create_electrode_group(name="scalp", description="scalp electrodes",
                                       location="scalp", device=device)
    nwb.add_electrode_column(name="label", description="channel label")
    for name in names:
        row = where.get(name)
        x, y, z = (float(row[c]) for c in "xyz") if row else (np.nan, np.nan, np.nan)
        nwb.add_electrode(location="scalp", group=group, x=x, y=y, z=z, label=name)
    region = nwb.create_electrode_table_region(region=list(range(len(names))),
                                               description="all channels")
    nwb.add_acquisition(ElectricalSeries(name="eeg", data=data.astype(np.float32),
                                         electrodes=region, rate=rate, starting_time=0.0))
    nwb.add_trial_column(name="trial_type", description="the cue shown")
    for event in rows(str(base) + "_events.tsv"):
        onset = float(event["onset"])
        nwb.add_trial(start_time=onset, stop_time=onset, trial_type=event["trial_type"])
    target = out / subject / "ieeg"
    target.mkdir(parents=True, exist_ok=True)
    with NWBHDF5IO(str(target / f"{subject}_task-cue_ieeg.nwb"), "w") as io:
        io.write(nwb, cache_spec=False)
    shutil.copy(str(base) + "_channels.tsv", target / f"{subject}_task-cue_channels.tsv")


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("demo")
    ap.add_argument("out")
    ap.add_argument("--subjects", type=int, default=2)
    args = ap.parse_args()
    demo, out = pathlib.Path(args.demo), pathlib.Path(args.out)
    for s in range(1, args.subjects + 1):
        convert(demo, out, f"sub-{s:02d}")


if __name__ == "__main__":
    main()
