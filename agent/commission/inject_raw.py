"""Synthetic faults written into a raw capture, then replayed through the daemon's pipeline.

`evaluate --inject KIND` uses this when the dataset has raw messages beside it
(`<dataset>.raw.jsonl`, written by `record --raw`) and a config to rebuild the
pipeline (`--config`, or the dataset manifest's window settings and `extra.channels`).
A fault then changes the *signal*, and the features the model sees are the ones the
daemon would compute from it, dispersion and shape features included — unlike the
feature-level `agent.commission.inject`, which shifts feature values directly.

Where faults go: on the dataset's own normal windows, in slots of `L + gap` windows
with a seeded jitter, exactly as the feature-level path places them (which windows
trained the model is unknowable from here, so evaluate a dataset that was not used
for training). An event of L windows covers the time span [start of its first window,
end of its last window). One channel per event, chosen from the seed among the
channels the model uses, unless the spec names one (`KIND:SIGMA:WINDOWS:CHANNEL`).

What each kind does to the channel's samples whose time lies in the span, with
sigma = the channel's standard deviation over the whole capture (its own units):

    step    +s*sigma on every sample
    drift   +s*sigma*(t - start)/(end - start): a ramp reaching s at the span's end
    noise   +N(0, (s*sigma)^2) per sample
    stuck   every sample replaced by the channel's last value before the span (s unused)
    spike   one sample, chosen from the seed among those in the span, +s*sigma; the
            event is that sample's instant, so only the windows holding it are faulty
            (with hopping windows that is length/hop windows, which a k-of-n rule
            may then raise on)

A sample's time is the decoder's: the payload's `ts` (plus i/rate within a batch) or
the arrival time when there is none (always for `text`). Every changed message is
re-encoded in its own decoder's format (json: the value field replaced in the
original document; json-batch: the values list replaced; text: the number as ASCII);
other messages keep their exact bytes. Messages the decoder rejects are left alone.

Pure except `replay_windows`, which runs the daemon's `Replayer` in memory.
"""

from __future__ import annotations

import dataclasses
import json
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from agent.commission.inject import FaultKind, InjectSpec, event_slots, parse_inject
from agent.config.load import FEATURES, ChannelConfig, Config, Decoder, parse_config
from agent.core.decode import Rejected, decode
from agent.errors import ConfigError, DatasetError

Message = tuple[float, str, bytes]


@dataclass(frozen=True)
class ChannelSpec(InjectSpec):
    """An InjectSpec that names the channel to hit (the raw path honours it)."""

    channel: str = ""


def parse_raw_inject(text: str) -> InjectSpec:
    """'KIND[:SIGMA[:WINDOWS[:CHANNEL]]]' -> InjectSpec (a ChannelSpec when a channel is named).

    Raises ValueError for a bad spec, as `parse_inject` does.
    """
    head, sep, channel = text.strip().rpartition(":")
    if sep and head.count(":") == 2:
        if not channel:
            raise ValueError(f"bad fault spec {text!r}: empty channel name")
        spec = parse_inject(head)
        return ChannelSpec(spec.kind, spec.severity, spec.length, channel)
    return parse_inject(text)


@dataclass(frozen=True)
class RawFault:
    """One injected event: a channel, a time span [start_s, end_s), a size in units."""

    kind: FaultKind
    channel: str
    start_s: float
    end_s: float
    severity: float  # in sigma
    size: float  # severity * the channel's sigma, in the channel's units


@dataclass(frozen=True)
class Samples:
    """A channel's decoded samples in capture order; `owner[i]` is the message index of
    sample i, `slices[j]` the sample range of message j (empty when rejected)."""

    t: np.ndarray
    v: np.ndarray
    owner: np.ndarray
    slices: Mapping[int, tuple[int, int]]


# --- decoding and encoding (pure) -------------------------------------------------------

def channel_samples(messages: Sequence[Message], ch: ChannelConfig, *,
                    max_payload_bytes: int, max_skew_s: float) -> Samples:
    """Every sample of channel `ch` in `messages`, decoded as the daemon decodes them."""
    ts: list[np.ndarray] = []
    vs: list[np.ndarray] = []
    owner: list[np.ndarray] = []
    slices: dict[int, tuple[int, int]] = {}
    n = 0
    for j, (t, topic, payload) in enumerate(messages):
        if topic != ch.topic:
            continue
        try:
            st, sv = decode(payload, ch, t, max_payload_bytes=max_payload_bytes,
                            max_skew_s=max_skew_s)
        except Rejected:
            continue
        st_a = np.atleast_1d(np.asarray(st, np.float64))
        sv_a = np.atleast_1d(np.asarray(sv, np.float64))
        ts.append(st_a)
        vs.append(sv_a)
        owner.append(np.full(sv_a.size, j, np.int64))
        slices[j] = (n, n + sv_a.size)
        n += sv_a.size
    if not ts:
        return Samples(np.zeros(0), np.zeros(0), np.zeros(0, np.int64), {})
    return Samples(np.concatenate(ts), np.concatenate(vs), np.concatenate(owner), slices)


def _set_field(doc: dict[str, Any], dotted: str, value: Any) -> None:
    cur = doc
    parts = dotted.split(".")
    for part in parts[:-1]:
        cur = cur[part]
    cur[parts[-1]] = value


def encode_payload(payload: bytes, ch: ChannelConfig, values: np.ndarray, *,
                   max_payload_bytes: int) -> bytes:
    """`payload` (which decoded fine) with its value(s) replaced by `values`, in the same
    format: the rest of a JSON document is kept; numbers are written exactly (shortest
    repr), or to 9 significant digits if that would exceed `max_payload_bytes`."""
    floats = [float(x) for x in np.asarray(values, np.float64).reshape(-1)]
    if ch.decoder is Decoder.TEXT:
        return repr(floats[0]).encode("ascii")
    doc = json.loads(payload)
    if ch.decoder is Decoder.JSON:
        if not isinstance(doc, dict):  # a bare number is a reading too (see decode)
            return json.dumps(floats[0]).encode()
        _set_field(doc, ch.value_field, floats[0])
    else:
        _set_field(doc, ch.values_field, floats)
    out = json.dumps(doc, separators=(",", ":")).encode()
    if len(out) > max_payload_bytes and ch.decoder is Decoder.JSON_BATCH:
        _set_field(doc, ch.values_field, [float(f"{x:.9g}") for x in floats])
        out = json.dumps(doc, separators=(",", ":")).encode()
    return out


# --- planning and rewriting (pure) ------------------------------------------------------

def _channel_of(feature: str) -> str:
    return feature.split(".", 1)[0]


def plan_faults(window_start: np.ndarray, window_end: np.ndarray, channels: Sequence[str],
                sigma: Mapping[str, float], spec: InjectSpec, *, seed: int = 0,
                gap: int | None = None) -> list[RawFault]:
    """Events on the windows given (the dataset's normal windows, in time order): slots
    of `L + gap` windows, one event per slot at a seeded offset, as `inject.inject`
    places them; each becomes the time span of its windows on a seeded channel (or the
    ChannelSpec's). DatasetError when there is no room or the channel is unknown."""
    n = len(window_start)
    length = spec.length
    n_events, slot = event_slots(n, spec, gap)
    named = spec.channel if isinstance(spec, ChannelSpec) else ""
    if named and named not in channels:
        raise DatasetError(f"--inject {spec.name}: channel {named!r} is not one the model "
                           f"uses ({', '.join(channels)})")
    if not channels:
        raise DatasetError("no channel to inject faults into")
    rng = np.random.default_rng([seed, list(FaultKind).index(spec.kind)])
    faults: list[RawFault] = []
    for e in range(n_events):
        room = slot - length
        first = e * slot + 1 + int(rng.integers(0, max(1, room - 1)))
        last = min(first + length, n) - 1
        pick = channels[int(rng.integers(0, len(channels)))]
        channel = named or pick
        s = float(sigma.get(channel, 0.0))
        faults.append(RawFault(spec.kind, channel, float(window_start[first]),
                               float(window_end[last]), spec.severity, spec.severity * s))
    return faults


def apply_fault(samples: Samples, fault: RawFault, *, seed: int = 0, index: int = 0
                ) -> tuple[np.ndarray, RawFault]:
    """New values for `samples` with `fault` applied, and the fault as applied (a spike's
    span narrows to its sample's instant). Samples outside the span are unchanged; the
    generator is seeded from (seed, kind, index) so each event draws its own numbers."""
    v = samples.v.copy()
    t = samples.t
    inside = (t >= fault.start_s) & (t < fault.end_s)
    idx = np.nonzero(inside)[0]
    rng = np.random.default_rng([seed, list(FaultKind).index(fault.kind), index, 7])
    if idx.size == 0:
        return v, fault
    k = fault.kind
    if k is FaultKind.STEP:
        v[idx] += fault.size
    elif k is FaultKind.DRIFT:
        v[idx] += fault.size * (t[idx] - fault.start_s) / (fault.end_s - fault.start_s)
    elif k is FaultKind.NOISE:
        v[idx] += rng.normal(0.0, 1.0, idx.size) * fault.size
    elif k is FaultKind.STUCK:
        before = np.nonzero(t < fault.start_s)[0]
        if before.size == 0:
            return v, fault  # nothing to freeze at; the event is left out by the caller
        # the last value before the span in time (capture order breaks ties)
        last = before[np.flatnonzero(t[before] == t[before].max())[-1]]
        v[idx] = samples.v[last]
    elif k is FaultKind.SPIKE:
        j = int(idx[int(rng.integers(0, idx.size))])
        v[j] += fault.size
        at = float(t[j])
        return v, dataclasses.replace(fault, start_s=at, end_s=math.nextafter(at, math.inf))
    return v, fault


def rewrite_messages(messages: Sequence[Message], ch: ChannelConfig, samples: Samples,
                     values: np.ndarray, *, max_payload_bytes: int) -> list[Message]:
    """`messages` with every message of `ch` whose samples changed re-encoded; every
    other message is the same object as before."""
    out = list(messages)
    changed = np.unique(samples.owner[values != samples.v])
    for j in changed.tolist():
        a, b = samples.slices[j]
        t, topic, payload = out[j]
        out[j] = (t, topic, encode_payload(payload, ch, values[a:b],
                                           max_payload_bytes=max_payload_bytes))
    return out


def inject_capture(messages: Sequence[Message], channels: Mapping[str, ChannelConfig],
                   faults: Sequence[RawFault], *, max_payload_bytes: int, max_skew_s: float,
                   seed: int = 0) -> tuple[list[Message], list[RawFault]]:
    """The capture with every fault written into its channel's messages, and the faults as
    applied (events that found no sample, or a stuck event with nothing before it to
    freeze at, are dropped). Pure; deterministic for a seed."""
    out = list(messages)
    applied: list[RawFault] = []
    by_channel: dict[str, list[tuple[int, RawFault]]] = {}
    for i, f in enumerate(faults):
        by_channel.setdefault(f.channel, []).append((i, f))
    for name, items in by_channel.items():
        ch = channels[name]
        smp = channel_samples(out, ch, max_payload_bytes=max_payload_bytes,
                              max_skew_s=max_skew_s)
        values = smp.v.copy()
        for i, f in items:
            cur = Samples(smp.t, values, smp.owner, smp.slices)
            new, done = apply_fault(cur, f, seed=seed, index=i)
            inside = (smp.t >= f.start_s) & (smp.t < f.end_s)
            if not inside.any() or (f.kind is FaultKind.STUCK and not (smp.t < f.start_s).any()):
                continue
            values = new
            applied.append(done)
        out = rewrite_messages(out, ch, smp, values, max_payload_bytes=max_payload_bytes)
    applied.sort(key=lambda f: f.start_s)
    return out, applied


def channel_sigma(messages: Sequence[Message], ch: ChannelConfig, *, max_payload_bytes: int,
                  max_skew_s: float) -> float:
    """The channel's standard deviation over the whole capture (0 without samples)."""
    smp = channel_samples(messages, ch, max_payload_bytes=max_payload_bytes,
                          max_skew_s=max_skew_s)
    return float(np.std(smp.v)) if smp.v.size else 0.0


# --- the pipeline to replay through -----------------------------------------------------

def config_from_manifest(manifest: Mapping[str, Any], feature_names: Sequence[str]) -> Config:
    """A one-asset Config rebuilt from what `record` wrote into the dataset manifest:
    window settings, `extra.channels` (topic, decoder, rate_hz) and, per channel, the
    time-domain features among `feature_names`. Field names (ts/value) are the
    defaults, and sensor-health checks, modes and spectra are absent — pass the
    daemon's config (`--config`) when the asset has them. DatasetError when the
    manifest cannot say enough."""
    chans = (manifest.get("extra") or {}).get("channels")
    asset = str(manifest.get("asset") or "")
    if not isinstance(chans, dict) or not chans or not asset:
        raise DatasetError("the dataset manifest has no extra.channels (it was not written "
                           "by `watchkeep record`); pass --config")
    feats: dict[str, list[str]] = {c: [] for c in chans}
    for name in feature_names:
        c, _, f = name.partition(".")
        if c not in feats or f not in FEATURES:
            raise DatasetError(f"feature {name!r} cannot be rebuilt from the manifest (only "
                               f"time-domain features of its channels); pass --config")
        feats[c].append(f)
    doc = {
        "site": "evaluate", "gateway": "replay", "state_dir": ".",
        "http": {"enabled": False},
        "assets": [{
            "name": asset, "window": dict(manifest.get("window") or {}),
            "channels": {c: {"topic": (spec or {}).get("topic"),
                             "decoder": (spec or {}).get("decoder"),
                             "rate_hz": (spec or {}).get("rate_hz"),
                             "features": feats[c] or ["mean"]}
                         for c, spec in chans.items()},
        }],
    }
    try:
        return parse_config(doc, Path("."))
    except ConfigError as exc:
        raise DatasetError(f"the dataset manifest cannot rebuild the pipeline ({exc}); "
                           "pass --config") from None


def replay_config(cfg: Config, asset: str) -> Config:
    """`cfg` reduced to one asset with no bundles (replay computes features only)."""
    try:
        a = cfg.asset(asset)
    except KeyError:
        raise DatasetError(f"the config has no asset {asset!r} (its assets: "
                           f"{', '.join(x.name for x in cfg.assets)})") from None
    modes = a.modes
    if modes is not None:
        modes = dataclasses.replace(modes, states=tuple(
            dataclasses.replace(m, bundle=None) for m in modes.states))
    return dataclasses.replace(cfg, assets=(dataclasses.replace(a, bundle=None, modes=modes),))


@dataclass(frozen=True)
class ReplayedWindows:
    """Complete windows of one asset from a replay: feature rows in `names` order."""

    names: tuple[str, ...]
    features: np.ndarray
    window_start: np.ndarray
    window_end: np.ndarray
    mode: np.ndarray
    skipped: int  # windows the pipeline did not score (incomplete, faulty sensor, ...)


def replay_windows(cfg: Config, messages: Sequence[Message]) -> ReplayedWindows:
    """Run `messages` through the daemon's ingest -> windows -> features on a simulated
    clock (`Replayer`) and collect every window the observer sees. `cfg` has one asset."""
    from agent.commission.replay import Replayer

    rows: list[np.ndarray] = []
    starts: list[float] = []
    ends: list[float] = []
    modes: list[str] = []
    seen: list[tuple[str, ...]] = []

    def observe(asset: str, mode: str, w: Any, row: np.ndarray,
                names: tuple[str, ...]) -> None:
        rows.append(np.asarray(row, np.float64))
        starts.append(float(w.start))
        ends.append(float(w.end))
        modes.append(mode)
        if not seen:
            seen.append(names)

    r = Replayer.build(cfg, observer=observe)
    topics = {ch.topic for a in cfg.assets for ch in a.channels}
    for t, topic, payload in messages:
        if topic in topics:
            r.feed(t, topic, payload)
    r.finish()
    reg = r.metrics.registry
    closed = sum(reg.get_sample_value("watchkeep_windows_closed_total", {"asset": a.name})
                 or 0 for a in cfg.assets)
    names = seen[0] if seen else ()
    feats = np.vstack(rows) if rows else np.zeros((0, len(names)))
    return ReplayedWindows(names, feats, np.asarray(starts), np.asarray(ends),
                           np.asarray(modes, dtype=object), max(0, int(closed) - len(rows)))


def model_channels(feature_names: Sequence[str], cfg: Config) -> dict[str, ChannelConfig]:
    """The config's channels that the model's features come from, in feature order."""
    a = cfg.assets[0]
    out: dict[str, ChannelConfig] = {}
    for name in feature_names:
        c = _channel_of(name)
        if c not in out:
            try:
                out[c] = a.channel(c)
            except KeyError:
                raise DatasetError(f"the model's feature {name!r} has no channel {c!r} in "
                                   "the replay config") from None
    return out


def time_keys(t: np.ndarray) -> np.ndarray:
    """Window start times as integer milliseconds, to match windows across replays."""
    return np.round(np.asarray(t, np.float64) * 1000.0).astype(np.int64)


@dataclass(frozen=True)
class RawCapture:
    """What the raw path needs: the pipeline to replay through and the capture."""

    cfg: Config  # one asset, no bundles (see `replay_config`)
    messages: Sequence[Message]
    path: str
    config_source: str  # the --config path, or "dataset manifest"

    @property
    def asset(self) -> str:
        return self.cfg.assets[0].name


@dataclass(frozen=True)
class RawInjection:
    """One fault kind injected into the capture and replayed, on the dataset's windows."""

    features: np.ndarray  # [N, F] in the model's feature order
    window_start: np.ndarray
    window_end: np.ndarray
    kinds: np.ndarray  # per window: the kind's name, or "" (normal)
    events: list[tuple[int, int, float]]  # (first window, last window, onset unix s)
    faults: list[RawFault]
    missing: int  # windows of the dataset the replay did not produce (not scored)


def capture_sigma(raw: RawCapture, channels: Sequence[str]) -> dict[str, float]:
    """Each channel's standard deviation over the whole capture."""
    a = raw.cfg.assets[0]
    ing = raw.cfg.ingest
    return {c: channel_sigma(raw.messages, a.channel(c), max_payload_bytes=ing.max_payload_bytes,
                             max_skew_s=ing.max_clock_skew_s) for c in channels}


def inject_and_replay(raw: RawCapture, feature_names: Sequence[str], window_start: np.ndarray,
                      window_end: np.ndarray, spec: InjectSpec, sigma: Mapping[str, float], *,
                      seed: int = 0) -> RawInjection:
    """Plan `spec` events on the given (normal, time-ordered) windows, write them into the
    capture, replay it, and return the replayed features of those same windows (matched
    by start time) with the truth: a window overlapping an applied fault's span is
    faulty; each fault is one event over the windows it overlaps."""
    channels = model_channels(feature_names, raw.cfg)
    ing = raw.cfg.ingest
    faults = plan_faults(window_start, window_end, list(channels), sigma, spec, seed=seed)
    msgs, applied = inject_capture(raw.messages, channels, faults,
                                   max_payload_bytes=ing.max_payload_bytes,
                                   max_skew_s=ing.max_clock_skew_s, seed=seed)
    rw = replay_windows(raw.cfg, msgs)
    pos = {n: i for i, n in enumerate(rw.names)}
    lost = [n for n in feature_names if n not in pos]
    if lost:
        raise DatasetError(f"the replay config does not compute the model's feature(s) "
                           f"{', '.join(lost[:5])}")
    got = {k: i for i, k in enumerate(time_keys(rw.window_start).tolist())}
    want = time_keys(window_start).tolist()
    rows = np.asarray([got[k] for k in want if k in got], np.int64)
    if rows.size == 0:
        raise DatasetError(f"capture {raw.path}: its replay produced none of the dataset's "
                           "windows (is it the capture recorded with this dataset?)")
    ws, we = rw.window_start[rows], rw.window_end[rows]
    x = rw.features[rows][:, [pos[n] for n in feature_names]]
    kinds = np.full(rows.size, "", dtype=object)
    events: list[tuple[int, int, float]] = []
    kept: list[RawFault] = []
    for f in applied:
        hit = np.nonzero((ws < f.end_s) & (we > f.start_s))[0]
        if hit.size == 0:
            continue  # its windows were not scored (e.g. a sensor-health check)
        kinds[hit] = spec.name
        events.append((int(hit[0]), int(hit[-1]), f.start_s))
        kept.append(f)
    return RawInjection(x, ws, we, kinds, events, kept, len(want) - int(rows.size))
