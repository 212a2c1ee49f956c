"""librosa 0.11.0 reference values for Weft's timbre descriptors, and the librosa side of
`cargo xtask bench-timbre`.

Two modes:

  timbre_reference.py reference MANIFEST.json OUT.json
      MANIFEST.json: {"entries": [{"name", "path", "sr", "n_fft", "hop", "rolloff_custom"}...],
                      "filters": [{"sr", "n_fft"}...]}
      Each path is a float32 WAV written by the Rust test; it is read back exactly with
      soundfile. OUT.json holds, per entry, every descriptor as librosa computes it (feature
      rows × frames, float64 lists), both with librosa's defaults (whole-clip top_db=80 floor:
      Weft's offline path) and with top_db=None (Weft's live path), plus the mel filterbanks.

  timbre_reference.py bench WAV N_FFT HOP ROLLOFF_CUSTOM REPEATS
      Extracts the full descriptor set REPEATS times, timed inside Python (interpreter start-up
      and imports excluded), sharing one STFT between features (the fastest way to script it),
      then REPEATS times calling each feature function on the samples (the usual way), and
      prints {"seconds": best shared, "per_function_seconds": best usual, "frames": n} as JSON.

Only librosa 0.11.0 does the arithmetic; this script only calls its public functions (and, for
the contrast valleys, records the arrays spectral_contrast passes to power_to_db).
"""

import os

# One core for the benchmark and repeatable BLAS sums for the reference (set before numpy loads).
for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS", "NUMBA_NUM_THREADS"):
    os.environ[_var] = "1"

import importlib  # noqa: E402
import json  # noqa: E402
import sys  # noqa: E402
import time  # noqa: E402

import librosa  # noqa: E402
import numpy as np  # noqa: E402
import soundfile  # noqa: E402

EXPECTED_LIBROSA = "0.11.0"
SPECTRAL = importlib.import_module("librosa.feature.spectral")


def contrast_with_levels(S, sr, n_fft, hop):
    """librosa.feature.spectral_contrast, also returning the peak and valley arrays it converts
    with power_to_db (recorded by wrapping the module's power_to_db for this one call)."""
    seen = []
    original = SPECTRAL.power_to_db

    def recording(x, *args, **kwargs):
        seen.append(np.array(x, copy=True))
        return original(x, *args, **kwargs)

    SPECTRAL.power_to_db = recording
    try:
        contrast = librosa.feature.spectral_contrast(S=S, sr=sr, n_fft=n_fft, hop_length=hop)
    finally:
        SPECTRAL.power_to_db = original
    if len(seen) != 2:
        raise RuntimeError(f"spectral_contrast called power_to_db {len(seen)} times, not 2")
    return contrast, seen[0], seen[1]


def rows(a):
    return np.atleast_2d(np.asarray(a, dtype=np.float64)).tolist()


def reference_entry(e):
    y, file_sr = soundfile.read(e["path"], dtype="float32")
    sr, n_fft, hop = e["sr"], e["n_fft"], e["hop"]
    if file_sr != sr:
        raise RuntimeError(f"{e['path']}: {file_sr} Hz, expected {sr}")
    kw = dict(n_fft=n_fft, hop_length=hop)
    mel = librosa.feature.melspectrogram(y=y, sr=sr, **kw)
    S = np.abs(librosa.stft(y, **kw))
    contrast, peak, valley = contrast_with_levels(S, sr, n_fft, hop)
    mel_db_live = librosa.power_to_db(mel, top_db=None)
    return {
        "frames": int(mel.shape[-1]),
        # Offline (librosa defaults).
        "mel": rows(mel),
        "mfcc": rows(librosa.feature.mfcc(y=y, sr=sr, **kw)),
        "centroid": rows(librosa.feature.spectral_centroid(y=y, sr=sr, **kw)),
        "bandwidth": rows(librosa.feature.spectral_bandwidth(y=y, sr=sr, **kw)),
        "rolloff": rows(librosa.feature.spectral_rolloff(y=y, sr=sr, **kw)),
        "rolloff_custom": rows(
            librosa.feature.spectral_rolloff(
                y=y, sr=sr, roll_percent=float(e["rolloff_custom"]), **kw
            )
        ),
        "flatness": rows(librosa.feature.spectral_flatness(y=y, **kw)),
        "contrast": rows(librosa.feature.spectral_contrast(y=y, sr=sr, **kw)),
        "contrast_from_s": rows(contrast),
        "valley": rows(librosa.power_to_db(valley)),
        "flux": rows(librosa.onset.onset_strength(y=y, sr=sr, **kw)),
        "zcr": rows(librosa.feature.zero_crossing_rate(y, frame_length=n_fft, hop_length=hop)),
        "rms": rows(librosa.feature.rms(y=y, frame_length=n_fft, hop_length=hop)),
        # Live (top_db=None): the same functions on librosa's own mel / peak / valley arrays.
        "mfcc_live": rows(librosa.feature.mfcc(S=mel_db_live)),
        "flux_live": rows(
            librosa.onset.onset_strength(S=mel_db_live, sr=sr, n_fft=n_fft, hop_length=hop)
        ),
        "contrast_live": rows(
            librosa.power_to_db(peak, top_db=None) - librosa.power_to_db(valley, top_db=None)
        ),
        "valley_live": rows(librosa.power_to_db(valley, top_db=None)),
    }


def reference(manifest_path, out_path):
    with open(manifest_path) as f:
        manifest = json.load(f)
    out = {"librosa_version": librosa.__version__, "entries": {}, "filters": []}
    for e in manifest["entries"]:
        out["entries"][e["name"]] = reference_entry(e)
    for spec in manifest["filters"]:
        sr, n_fft = spec["sr"], spec["n_fft"]
        out["filters"].append(
            {
                "sr": sr,
                "n_fft": n_fft,
                "slaney": rows(librosa.filters.mel(sr=sr, n_fft=n_fft)),
                "htk": rows(librosa.filters.mel(sr=sr, n_fft=n_fft, htk=True)),
            }
        )
    with open(out_path, "w") as f:
        json.dump(out, f)


def full_set(y, sr, n_fft, hop, rolloff_custom):
    """Every Weft descriptor with librosa, sharing one STFT between the features that accept a
    spectrogram (the fastest way to script librosa for this set)."""
    kw = dict(n_fft=n_fft, hop_length=hop)
    S = np.abs(librosa.stft(y, **kw))
    mel = librosa.feature.melspectrogram(S=S**2, sr=sr)
    mel_db = librosa.power_to_db(mel)
    centroid = librosa.feature.spectral_centroid(S=S, sr=sr)
    return [
        mel,
        librosa.feature.mfcc(S=mel_db, n_mfcc=20),
        centroid,
        librosa.feature.spectral_bandwidth(S=S, sr=sr, centroid=centroid),
        librosa.feature.spectral_rolloff(S=S, sr=sr),
        librosa.feature.spectral_rolloff(S=S, sr=sr, roll_percent=rolloff_custom),
        librosa.feature.spectral_flatness(S=S),
        contrast_with_levels(S, sr, n_fft, hop),
        librosa.onset.onset_strength(S=mel_db, sr=sr, **kw),
        librosa.feature.zero_crossing_rate(y, frame_length=n_fft, hop_length=hop),
        librosa.feature.rms(y=y, frame_length=n_fft, hop_length=hop),
    ]


def per_function(y, sr, n_fft, hop, rolloff_custom):
    """The same set the way scripts usually call librosa: each feature function on the samples
    (each computes its own STFT)."""
    kw = dict(n_fft=n_fft, hop_length=hop)
    return [
        librosa.feature.melspectrogram(y=y, sr=sr, **kw),
        librosa.feature.mfcc(y=y, sr=sr, **kw),
        librosa.feature.spectral_centroid(y=y, sr=sr, **kw),
        librosa.feature.spectral_bandwidth(y=y, sr=sr, **kw),
        librosa.feature.spectral_rolloff(y=y, sr=sr, **kw),
        librosa.feature.spectral_rolloff(y=y, sr=sr, roll_percent=rolloff_custom, **kw),
        librosa.feature.spectral_flatness(y=y, **kw),
        librosa.feature.spectral_contrast(y=y, sr=sr, **kw),
        librosa.onset.onset_strength(y=y, sr=sr, **kw),
        librosa.feature.zero_crossing_rate(y, frame_length=n_fft, hop_length=hop),
        librosa.feature.rms(y=y, frame_length=n_fft, hop_length=hop),
    ]


def best_time(fn, y, sr, n_fft, hop, rolloff_custom, repeats):
    best = float("inf")
    frames = 0
    for _ in range(repeats):
        start = time.perf_counter()
        out = fn(y, sr, n_fft, hop, rolloff_custom)
        best = min(best, time.perf_counter() - start)
        frames = out[0].shape[-1]
    return best, frames


def bench(path, n_fft, hop, rolloff_custom, repeats):
    y, sr = soundfile.read(path, dtype="float32")
    # Warm up (numba compiles librosa's zero-crossing kernel on first use).
    full_set(y[: sr * 2], sr, n_fft, hop, rolloff_custom)
    per_function(y[: sr * 2], sr, n_fft, hop, rolloff_custom)
    seconds, frames = best_time(full_set, y, sr, n_fft, hop, rolloff_custom, repeats)
    per_function_seconds, _ = best_time(per_function, y, sr, n_fft, hop, rolloff_custom, repeats)
    print(
        json.dumps(
            {
                "seconds": seconds,
                "per_function_seconds": per_function_seconds,
                "frames": frames,
                "librosa_version": librosa.__version__,
            }
        )
    )


def main(argv):
    if librosa.__version__ != EXPECTED_LIBROSA:
        raise SystemExit(f"librosa {librosa.__version__} found, {EXPECTED_LIBROSA} expected")
    if len(argv) == 3 and argv[0] == "reference":
        reference(argv[1], argv[2])
    elif len(argv) == 6 and argv[0] == "bench":
        bench(argv[1], int(argv[2]), int(argv[3]), float(argv[4]), int(argv[5]))
    else:
        raise SystemExit(__doc__)


if __name__ == "__main__":
    main(sys.argv[1:])
