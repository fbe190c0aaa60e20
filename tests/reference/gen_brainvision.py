"""Reference BrainVision recordings written by pybv, with the values they hold.

pybv (pinned in requirements.txt) writes the BrainVision Core Data Format with MULTIPLEXED data
in INT_16 or IEEE_FLOAT_32 only. Writes into OUT/brainvision/:
  int16_mux.{vhdr,vmrk,eeg}    pybv, INT_16, per-channel resolutions, a measurement date (so a
                               "New Segment" marker), Stimulus/Response/Comment markers, one
                               marker written once per channel for two channels
  float32_mux.{vhdr,vmrk,eeg}  pybv, IEEE_FLOAT_32, per-channel units (uV, mV, V), no date
  int16_vec.*                  int16_mux reordered channel by channel (VECTORIZED)
  float32_vec.*                float32_mux reordered channel by channel (VECTORIZED)
  int32_mux.*                  int16_mux's stored integers widened to INT_32 (same resolutions)
The three derived files are made here with numpy from pybv's bytes, following the format's
definitions of the orientations (MULTIPLEXED: channel 1 point 1, channel 2 point 1, ...;
VECTORIZED: all points of channel 1, then channel 2, ...) and of INT_32 (little-endian 32-bit
integers), because pybv cannot write them; their header and marker texts are pybv's with only
the file names, the orientation and the format changed. They hold the same physical values.
For each recording NAME:
  NAME_values.npy  float64 [channel, sample]: the data handed to pybv, in volts
  NAME.json        channel names, reference names, units, resolutions, rate, format,
                   orientation, and the events pybv was asked to write (onsets and durations in
                   samples and seconds, labels as pybv documents them)
Data come from a seeded numpy generator and the measurement date is fixed, so every byte is the
same on every run. The Rust tests in stages/src/io/brainvision.rs read them back.
"""
import argparse
import datetime
import json
import pathlib

import numpy as np
import pybv

SEED = 20251203
NAMES = ["Fz", "Cz", "VEOG"]
REFS = ["FCz", "FCz", "AFz"]
DATE = datetime.datetime(2024, 5, 17, 10, 30, 0, 125000)


def data(rate, seconds, rng):
    """Three channels in volts: sinusoids plus noise, tens of microvolts (scalp EEG; common
    practice), the third larger (an eye channel)."""
    t = np.arange(int(rate * seconds)) / rate
    rows = []
    for k, (amp, freq) in enumerate([(20e-6, 6.0), (35e-6, 10.0), (150e-6, 1.5)]):
        rows.append(amp * np.sin(2 * np.pi * freq * t + k) + 0.2 * amp * rng.standard_normal(t.size))
    return np.stack(rows)


def events():
    """Markers in pybv's list-of-dict form (onsets 0-based in samples)."""
    return [
        {"onset": 100, "duration": 1, "description": 1, "type": "Stimulus"},
        {"onset": 250, "duration": 1, "description": 2, "type": "Response"},
        {"onset": 400, "duration": 25, "description": "cue-left", "type": "Comment"},
        {"onset": 600, "duration": 1, "description": 12, "type": "Stimulus",
         "channels": ["Fz", "Cz"]},
    ]


def label(ev):
    """The marker description as pybv's documentation says it writes it: Stimulus and Response
    numbers as "S" or "R" followed by the number right-aligned in 3 characters."""
    if ev["type"] == "Stimulus":
        return f"S{ev['description']:>3}"
    if ev["type"] == "Response":
        return f"R{ev['description']:>3}"
    return str(ev["description"])


def meta(rate, units, resolutions, fmt, orientation, evs):
    return {
        "names": NAMES, "references": REFS, "units": units,
        "resolutions": [float(r) for r in resolutions], "rate": rate,
        "format": fmt, "orientation": orientation,
        "events": [
            {"onset_sample": ev["onset"], "duration_samples": ev["duration"],
             "onset": ev["onset"] / rate, "duration": ev["duration"] / rate,
             "label": label(ev)}
            for ev in evs
        ],
    }


def derive(out, source, target, dtype_in, dtype_out, nchan, vectorize, header_edits):
    """Write TARGET.* from SOURCE.*: samples reordered and/or widened, texts renamed."""
    raw = np.fromfile(out / f"{source}.eeg", dtype=np.dtype(dtype_in).newbyteorder("<"))
    points = raw.size // nchan
    mux = raw.reshape(points, nchan)
    stored = mux.T if vectorize else mux
    stored.astype(np.dtype(dtype_out).newbyteorder("<")).tofile(out / f"{target}.eeg")
    for ext in ("vhdr", "vmrk"):
        text = (out / f"{source}.{ext}").read_text(encoding="utf-8")
        text = text.replace(f"{source}.eeg", f"{target}.eeg").replace(f"{source}.vmrk", f"{target}.vmrk")
        if ext == "vhdr":
            for old, new in header_edits:
                assert old in text, old
                text = text.replace(old, new)
        (out / f"{target}.{ext}").write_text(text, encoding="utf-8")


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--out", default=str(pathlib.Path(__file__).parent / "fixtures"))
    out = pathlib.Path(ap.parse_args().out) / "brainvision"
    out.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(SEED)

    rate16, res16, units16 = 256.0, np.array([0.1, 0.5, 1.0]), ["µV"] * 3
    x16 = data(rate16, 4, rng)
    pybv.write_brainvision(
        data=x16, sfreq=rate16, ch_names=NAMES, ref_ch_names=REFS, fname_base="int16_mux",
        folder_out=out, overwrite=True, events=events(), resolution=res16, unit=units16,
        fmt="binary_int16", meas_date=DATE,
    )
    rate32, res32, units32 = 500.0, np.array([0.1, 0.001, 1e-6]), ["µV", "mV", "V"]
    x32 = data(rate32, 3, rng)
    pybv.write_brainvision(
        data=x32, sfreq=rate32, ch_names=NAMES, ref_ch_names=REFS, fname_base="float32_mux",
        folder_out=out, overwrite=True, events=events(), resolution=res32, unit=units32,
        fmt="binary_float32", meas_date=None,
    )
    vec = [("DataOrientation=MULTIPLEXED", "DataOrientation=VECTORIZED"),
           ("MULTIPLEXED=ch1,pt1, ch2,pt1 ...", "VECTORIZED=ch1,pt1, ch1,pt2 ...")]
    derive(out, "int16_mux", "int16_vec", "i2", "i2", 3, True, vec)
    derive(out, "float32_mux", "float32_vec", "f4", "f4", 3, True, vec)
    derive(out, "int16_mux", "int32_mux", "i2", "i4", 3, False,
           [("BinaryFormat=INT_16", "BinaryFormat=INT_32")])

    cases = [
        ("int16_mux", x16, rate16, units16, res16, "INT_16", "MULTIPLEXED"),
        ("int16_vec", x16, rate16, units16, res16, "INT_16", "VECTORIZED"),
        ("int32_mux", x16, rate16, units16, res16, "INT_32", "MULTIPLEXED"),
        ("float32_mux", x32, rate32, units32, res32, "IEEE_FLOAT_32", "MULTIPLEXED"),
        ("float32_vec", x32, rate32, units32, res32, "IEEE_FLOAT_32", "VECTORIZED"),
    ]
    for name, x, rate, units, res, fmt, orientation in cases:
        np.save(out / f"{name}_values.npy", x.astype(np.float64))
        with open(out / f"{name}.json", "w", encoding="utf-8") as f:
            json.dump(meta(rate, units, res, fmt, orientation, events()), f, indent=1,
                      sort_keys=True, ensure_ascii=False)
            f.write("\n")


if __name__ == "__main__":
    main()
