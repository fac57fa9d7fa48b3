"""A drifting sensor is not a sick machine: the signature that tells them apart.

Pure. Checked when the detector is about to raise. A window looks like a drifting
sensor, not a machine fault, when all of these hold:

1. *one channel alone* carries the anomaly: it holds at least `ALONE_SHARE` of the
   window's squared error;
2. *the rest of the machine is reconstructed as normal*: the other features' error,
   on the score's own scale (summed and divided by the number of features), is below
   the clear threshold;
3. the error sits in that channel's *level* (`mean`, `min`, `max`, `rms`), not in its
   spread or spectrum (at least `ALONE_SHARE` of the channel's error): a sensor's
   offset or gain drift moves what it reads, not how the signal fluctuates, while a
   machine fault that shows on one channel first (a bearing defect on an accelerometer)
   changes its spread, shape and spectrum;
4. it grew *gradually*: the channel's deviation one detector span earlier (the oldest
   window the raise rule looks at) was already at least `GRADUAL_SHARE` of what it is
   now (deviations as root squared errors: a squared error grows with the square of a
   drift, so a steady creep would look like a jump). A step (a valve closing, a
   blockage, a trip) is raised: before the step the channel was normal. A creep that
   only now crossed the threshold is not.

The shares are ours (common practice, no source): 0.8 is "nearly all" and 0.5 "the
larger part". A channel reported suspect goes out as `sensor.fault` with reason
`suspect_drift` and back as `sensor.recovered` once the asset scores normal again.
While it is suspect, a raise in which it still holds `ALONE_SHARE` of the error is held
back (no second check: as a drift grows, the model's reconstruction of the other
features bends towards it, so condition 2 cannot be asked again); a raise that other
channels carry at least a fifth of is raised as usual. So a large drift can mask a
small fault elsewhere: replace or recalibrate a suspect sensor.
"""

from __future__ import annotations

import numpy as np

LEVEL_FEATURES = frozenset({"mean", "min", "max", "rms"})
ALONE_SHARE = 0.8
GRADUAL_SHARE = 0.5


def channel_of(feature: str) -> str:
    return feature.rsplit(".", 1)[0]


def dominant_channel(names: tuple[str, ...], sq: np.ndarray) -> tuple[str, float]:
    """The channel with the largest share of the window's squared error, and its share."""
    e = np.asarray(sq, dtype=np.float64)
    total = float(e.sum())
    per: dict[str, float] = {}
    for n, v in zip(names, e, strict=True):
        c = channel_of(n)
        per[c] = per.get(c, 0.0) + float(v)
    ch, err = max(per.items(), key=lambda kv: kv[1])
    return ch, (err / total if total > 0 else 0.0)


def drifting_channel(names: tuple[str, ...], sq: np.ndarray, clear_threshold: float,
                     earlier_sq: np.ndarray | None,
                     candidates: frozenset[str] | None = None) -> str | None:
    """The channel whose drift explains this window (see the module docstring), or None.

    `sq` is the window's per-feature squared error (its mean is the score); `earlier_sq`
    the same for the window one detector span before (None when there is none).
    `candidates`: the channels that read a level (scalar readings); a waveform's rms is
    the machine's vibration, not a sensor's offset, so waveforms are never suspects."""
    e = np.asarray(sq, dtype=np.float64)
    total = float(e.sum())
    if not total > 0.0:
        return None
    chans = [channel_of(n) for n in names]
    per: dict[str, float] = {}
    for c, v in zip(chans, e, strict=True):
        per[c] = per.get(c, 0.0) + float(v)
    ch, err = max(per.items(), key=lambda kv: kv[1])
    if candidates is not None and ch not in candidates:
        return None
    if err < ALONE_SHARE * total:
        return None
    if (total - err) / len(names) >= clear_threshold:
        return None
    level = sum(float(v) for n, c, v in zip(names, chans, e, strict=True)
                if c == ch and n.rsplit(".", 1)[1] in LEVEL_FEATURES)
    if level < ALONE_SHARE * err:
        return None
    if earlier_sq is None:
        return None
    before = sum(float(v) for c, v in zip(chans, np.asarray(earlier_sq, np.float64),
                                          strict=True) if c == ch)
    if np.sqrt(before) < GRADUAL_SHARE * np.sqrt(err):
        return None
    return ch
