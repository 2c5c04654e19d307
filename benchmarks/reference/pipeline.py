#!/usr/bin/env python3
"""The same method as spikeyard's default pipeline, written the way a lab
writes it in a notebook: numpy + scipy for filtering and detection,
scikit-learn for PCA and Gaussian mixtures. Used only by the benchmark
(spikeyard-bench runs it on the same file and compares times and sortings).

    python3 pipeline.py RECORDING.toml OUT_DIR

Writes OUT_DIR/spikes.csv (unit_id,sample) and OUT_DIR/timings.json
(seconds per step). Needs numpy, scipy and scikit-learn.

Steps, with spikeyard's default parameters:
  filter:   3rd-order Butterworth band-pass 300-6000 Hz, scipy sosfiltfilt,
            in 10 s chunks with 0.1 s of overlap; median reference across
            channels (numpy.median per sample)
  detect:   MAD noise per channel (median(|x|)/0.6745 on the first 10 s),
            negative crossings of -5 sigma, 1 ms dead time, trough within it
  features: 0.5 ms before / 1.0 ms after the trough on the detection
            channel, PCA to 3 components per channel (sklearn PCA)
  cluster:  sklearn GaussianMixture (full covariance) per channel, k = 1..4
            by BIC, seed 1, 3 initialisations
"""

import json
import sys
import time
import tomllib
from pathlib import Path

import numpy as np
from scipy import signal
from sklearn.decomposition import PCA
from sklearn.mixture import GaussianMixture

DTYPES = {"i16": np.int16, "u16": np.uint16, "i32": np.int32, "f32": np.float32, "f64": np.float64}


def open_recording(description):
    meta = tomllib.loads(Path(description).read_text())
    base = Path(description).parent
    data = base / meta["data"]
    n_channels = int(meta["channels"])
    dtype = np.dtype(DTYPES[meta["dtype"]]).newbyteorder("<")
    raw = np.memmap(data, dtype=dtype, mode="r")
    n_frames = raw.size // n_channels
    if meta.get("layout", "time-major") == "time-major":
        raw = raw[: n_frames * n_channels].reshape(n_frames, n_channels)
    else:
        raw = raw[: n_frames * n_channels].reshape(n_channels, n_frames).T
    gain = float(meta.get("microvolts_per_unit", 1.0))
    offset = float(meta.get("offset", 0.0))
    return raw, float(meta["sample_rate_hz"]), gain, offset


def main():
    description, out = sys.argv[1], Path(sys.argv[2])
    out.mkdir(parents=True, exist_ok=True)
    raw, fs, gain, offset = open_recording(description)
    n_frames, n_channels = raw.shape
    timings = {}

    started = time.perf_counter()
    sos = signal.butter(3, [300.0, min(6000.0, 0.95 * fs / 2)], btype="bandpass", fs=fs, output="sos")
    chunk, margin = int(10 * fs), int(0.1 * fs)
    filtered = np.lib.format.open_memmap(out / "filtered.npy", mode="w+", dtype=np.float32, shape=(n_frames, n_channels))
    for start in range(0, n_frames, chunk):
        lo, hi = max(0, start - margin), min(n_frames, start + chunk + margin)
        block = (raw[lo:hi].astype(np.float64) - offset) * gain
        block = signal.sosfiltfilt(sos, block, axis=0)
        block -= np.median(block, axis=1, keepdims=True)
        filtered[start : min(n_frames, start + chunk)] = block[start - lo : start - lo + min(chunk, n_frames - start)]
    filtered.flush()
    timings["filter"] = time.perf_counter() - started

    started = time.perf_counter()
    head = filtered[: min(n_frames, int(10 * fs))]
    sigma = np.median(np.abs(head), axis=0) / 0.6745
    dead = int(round(1e-3 * fs))
    events = []  # (sample, channel)
    for start in range(0, n_frames, chunk):
        block = filtered[start : min(n_frames, start + chunk)]
        below = block < -5.0 * sigma
        for channel in range(n_channels):
            crossings = np.flatnonzero(below[1:, channel] & ~below[:-1, channel]) + 1
            last = -(10**12)
            for c in crossings:
                if start + c - last <= dead:
                    continue
                window = block[c : c + dead, channel]
                trough = start + c + int(np.argmin(window))
                events.append((trough, channel))
                last = start + c
    events.sort()
    timings["detect"] = time.perf_counter() - started

    started = time.perf_counter()
    before, after = int(round(0.5e-3 * fs)), int(round(1.0e-3 * fs))
    by_channel = {}
    for sample, channel in events:
        if before <= sample < n_frames - after:
            by_channel.setdefault(channel, []).append(sample)
    features = {}
    for channel, samples in by_channel.items():
        snippets = np.stack([filtered[s - before : s + after, channel] for s in samples]).astype(np.float64)
        if len(samples) >= 4:
            features[channel] = (samples, PCA(n_components=3, random_state=1).fit_transform(snippets))
    timings["features"] = time.perf_counter() - started

    started = time.perf_counter()
    rows = []
    next_unit = 0
    for channel in sorted(features):
        samples, x = features[channel]
        best = None
        for k in range(1, 5):
            if len(samples) < 10 * k:
                break
            model = GaussianMixture(n_components=k, covariance_type="full", n_init=3, random_state=1).fit(x)
            bic = model.bic(x)
            if best is None or bic < best[0]:
                best = (bic, model)
        labels = best[1].predict(x) if best else np.zeros(len(samples), dtype=int)
        for label in np.unique(labels):
            for s in np.asarray(samples)[labels == label]:
                rows.append((next_unit, int(s)))
            next_unit += 1
    timings["cluster"] = time.perf_counter() - started

    with open(out / "spikes.csv", "w") as f:
        f.write("unit_id,sample\n")
        for unit, sample in rows:
            f.write(f"{unit},{sample}\n")
    (out / "timings.json").write_text(json.dumps(timings, indent=2))
    (out / "filtered.npy").unlink()


if __name__ == "__main__":
    main()
