"""Reference EDF, EDF+ and BDF files written and read back by pyEDFlib.

Writes into OUT/edf/:
  plain.edf     EDF (16-bit), three signals with different physical ranges and units
  plus.edf      EDF+C with annotations, a sub-second start, and one signal at another rate
  bio.bdf       BDF (24-bit, 0xFF BIOSEMI header)
  bioplus.bdf   BDF+C with annotations
and for each file NAME:
  NAME_values.npy   float64 [signal, sample]: pyEDFlib's EdfReader.readSignal(i) (physical
                    values in the file's units) of the signals at the file's main rate, in order
  NAME.json         labels, units, rates, annotations as pyEDFlib reads them, and which signals
                    the NPY holds
Data come from a seeded numpy generator; the start date is fixed, so output is byte-identical
on every run. The Rust tests in stages/src/io read the same files with phasewise's reader.
"""
import argparse
import datetime
import json
import pathlib

import numpy as np
import pyedflib

SEED = 20240611
SECONDS = 4
START = datetime.datetime(2021, 3, 14, 9, 26, 53)


def signal(label, unit, fs, pmax, digital, amplitude, freq, rng):
    """A header dict and data: a sinusoid plus noise kept inside the physical range."""
    t = np.arange(SECONDS * fs) / fs
    data = amplitude * np.sin(2 * np.pi * freq * t) + 0.1 * amplitude * rng.standard_normal(t.size)
    data = np.clip(data, -pmax, pmax)
    header = {
        "label": label, "dimension": unit, "sample_frequency": fs,
        "physical_max": pmax, "physical_min": -pmax,
        "digital_max": digital, "digital_min": -digital - 1,
        "transducer": "AgAgCl electrode" if unit != "degC" else "thermistor", "prefilter": "HP:0.1Hz",
    }
    return header, data


def write(path, file_type, signals, annotations, start):
    writer = pyedflib.EdfWriter(str(path), len(signals), file_type=file_type)
    writer.setStartdatetime(start)
    writer.setPatientCode("X")
    writer.setSignalHeaders([h for h, _ in signals])
    writer.writeSamples([d for _, d in signals])
    for onset, duration, text in annotations:
        writer.writeAnnotation(onset, duration, text)
    writer.close()


def read_back(path, main_rate):
    reader = pyedflib.EdfReader(str(path))
    try:
        n = reader.signals_in_file
        labels = [reader.getLabel(i) for i in range(n)]
        rates = [float(reader.getSampleFrequency(i)) for i in range(n)]
        units = [reader.getPhysicalDimension(i) for i in range(n)]
        kept = [i for i in range(n) if rates[i] == main_rate]
        values = np.stack([reader.readSignal(i) for i in kept]).astype(np.float64)
        onsets, durations, texts = reader.readAnnotations()
        meta = {
            "labels": labels, "rates": rates, "units": units, "kept": kept,
            "annotations": [
                {"onset": float(o), "duration": float(d), "text": str(t)}
                for o, d, t in zip(onsets, durations, texts)
            ],
            "file_duration": float(reader.getFileDuration()),
        }
    finally:
        reader.close()
    return values, meta


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--out", default=str(pathlib.Path(__file__).parent / "fixtures"))
    out = pathlib.Path(ap.parse_args().out) / "edf"
    out.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(SEED)

    files = {
        "plain.edf": (pyedflib.FILETYPE_EDF, START, 256.0, [
            signal("Fz", "uV", 256, 200.0, 32767, 40.0, 10.0, rng),
            signal("Cz", "uV", 256, 512.5, 32767, 120.0, 6.0, rng),
            signal("EOG left", "mV", 256, 1.5, 32767, 0.6, 0.5, rng),
        ], []),
        # A sub-second start: pyEDFlib 0.1.38 passes microsecond * 100 to edflib, which counts
        # in units of 100 ns, so microsecond=25000 gives a 0.25 s offset (first record stamped
        # +0.25). readAnnotations still returns onsets relative to the first sample.
        "plus.edf": (pyedflib.FILETYPE_EDFPLUS, START.replace(microsecond=25000), 256.0, [
            signal("EEG Fz", "uV", 256, 250.0, 32767, 30.0, 7.0, rng),
            signal("EEG Pz", "uV", 256, 300.0, 32767, 50.0, 11.0, rng),
            signal("ECG", "mV", 256, 5.0, 32767, 1.2, 1.1, rng),
            signal("Temp rectal", "degC", 32, 40.0, 32767, 37.0, 0.05, rng),
        ], [(0.5, 0.0, "cue-a"), (1.75, 0.25, "cue-b"), (2.5, -1, "cue-a"), (3.125, 0.5, "Lights off")]),
        "bio.bdf": (pyedflib.FILETYPE_BDF, START, 128.0, [
            signal("A1", "uV", 128, 200000.0, 8388607, 9000.0, 9.0, rng),
            signal("A2", "uV", 128, 1000.0, 8388607, 80.0, 13.0, rng),
        ], []),
        "bioplus.bdf": (pyedflib.FILETYPE_BDFPLUS, START, 128.0, [
            signal("EEG Oz", "uV", 128, 400.0, 8388607, 60.0, 10.0, rng),
            signal("EOG right", "uV", 128, 2000.0, 8388607, 300.0, 0.7, rng),
        ], [(1.0, 0.0, "cue-b"), (3.0, 0.2, "cue-a")]),
    }
    for name, (file_type, start, main_rate, signals, annotations) in files.items():
        path = out / name
        write(path, file_type, signals, annotations, start)
        values, meta = read_back(path, main_rate)
        stem = name.replace(".", "_")
        np.save(out / f"{stem}_values.npy", values)
        (out / f"{stem}.json").write_text(json.dumps(meta, indent=1, sort_keys=True) + "\n")


if __name__ == "__main__":
    main()
