"""The `assets:` section of the config: assets, their channels, windows, detector,
spectra, limits, modes and ISO 10816-3 zones, and the checks across assets.

Read with the loader's `Reader` (agent/config/reader.py), so problems are reported
with the others, at their key paths.
"""

from __future__ import annotations

import itertools
import math
from typing import Any

from agent.config.reader import REQUIRED, Reader, finite_number, is_name, is_topic
from agent.config.schema import (
    ACCEL_UNITS,
    DEFAULT_FEATURES,
    FEATURES,
    FEW_SAMPLES_FEATURES,
    FEW_SAMPLES_PER_WINDOW,
    SPARKPLUG_DATA_VERBS,
    SPARKPLUG_NAMESPACE,
    WAVEFORM_DEFAULT_FEATURES,
    AssetConfig,
    ChannelConfig,
    Decoder,
    IsoConfig,
    LimitConfig,
    ModesConfig,
    ModeSpec,
    SpectrumConfig,
    Support,
    WindowConfig,
    sparkplug_topic,
)
from agent.core.detector_params import DetectorParams


def _window(r: Reader, node: Any, path: str) -> WindowConfig:
    n = r.mapping(node, path, ("length_s", "hop_s", "lateness_s", "timeout_s", "min_coverage"))
    pos = "a number of seconds > 0"
    length = r.get_float(n, "length_s", path, 10.0, lambda v: 0 < v <= 86400, pos)
    hop = r.get_float(n, "hop_s", path, length, lambda v: v > 0, pos)
    if hop > length:
        r.bad(f"{path}.hop_s", f"at most length_s ({length:g})", found=f"{hop:g}")
    late = r.get_float(n, "lateness_s", path, min(1.0, length),
                       lambda v: v >= 0, "a number of seconds >= 0")
    timeout = r.get_float(n, "timeout_s", path, max(5.0, late), lambda v: v > 0, pos)
    if timeout < late:
        r.bad(f"{path}.timeout_s", f"at least lateness_s ({late:g})", found=f"{timeout:g}")
    cov = r.get_float(n, "min_coverage", path, 0.8, lambda v: 0 < v <= 1,
                      "a fraction in (0, 1]")
    return WindowConfig(length, hop, late, timeout, cov)


_CHANNEL_KEYS = ("topic", "decoder", "rate_hz", "features", "unit", "ts_field", "value_field",
                 "values_field", "rate_field", "seq_field", "spectrum", "min", "max",
                 "stale_s", "flatline_windows", "max_rate_per_s", "limits", "column", "metric")


def _source(r: Reader, n: dict[str, Any], path: str
            ) -> tuple[str | None, Decoder, str | None]:
    """A channel's topic, decoder and (sparkplug-b only) metric."""
    topic = r.get_str(n, "topic", path, REQUIRED, is_topic, "a topic string without wildcards")
    dec = r.get_str(n, "decoder", path, "json", lambda v: v in {d.value for d in Decoder},
                    "one of json, json-batch, text, sparkplug-b")
    decoder = Decoder(dec) if dec in {d.value for d in Decoder} else Decoder.JSON
    metric = r.get_str(n, "metric", path, None)
    if decoder is Decoder.SPARKPLUG_B:
        if n.get("metric") is None:
            r.bad(f"{path}.metric", "the metric's name in the edge node's or device's "
                  "birth certificate (required for decoder sparkplug-b)")
        spb = sparkplug_topic(topic) if topic is not None else None
        if topic is not None and (spb is None or spb[1] not in SPARKPLUG_DATA_VERBS):
            r.bad(f"{path}.topic", "a Sparkplug B data topic: spBv1.0/<group>/NDATA/<edge "
                  "node> or spBv1.0/<group>/DDATA/<edge node>/<device>", topic)
    elif metric is not None:
        r.bad(f"{path}.metric", "no metric (only decoder sparkplug-b names one)", metric)
    return topic, decoder, metric if decoder is Decoder.SPARKPLUG_B else None


def _features(r: Reader, n: dict[str, Any], path: str, decoder: Decoder, rate: float | None,
              window_length_s: float | None) -> tuple[str, ...]:
    """A channel's time-domain features; the defaults depend on its samples per window."""
    default_feats: tuple[str, ...] = WAVEFORM_DEFAULT_FEATURES \
        if decoder is Decoder.JSON_BATCH else DEFAULT_FEATURES
    if (decoder is not Decoder.JSON_BATCH and rate is not None
            and window_length_s is not None and rate * window_length_s < FEW_SAMPLES_PER_WINDOW):
        default_feats = FEW_SAMPLES_FEATURES
    feats = r.get_list(n, "features", path, list(default_feats))
    for i, f in enumerate(feats):
        if f not in FEATURES:
            r.bad(f"{path}.features[{i}]", f"one of {', '.join(FEATURES)}", f)
    dupes = sorted({f for i, f in enumerate(feats) if isinstance(f, str) and f in feats[:i]})
    if dupes:
        r.bad(f"{path}.features", "each feature once", found=f"{', '.join(dupes)} repeated")
    if not feats:
        r.bad(f"{path}.features", "at least one feature", feats)
    return tuple(f for f in feats if isinstance(f, str))


def _channel(r: Reader, name: Any, node: Any, path: str,
             window_length_s: float | None = None) -> ChannelConfig | None:
    if not is_name(name):
        r.bad(path, "a channel name of letters, digits, '_', '.', '-' (at most 64)", name)
    if not isinstance(node, dict):
        r.bad(path, "a mapping of channel settings (topic, decoder, rate_hz, ...)", node)
        return None
    n = r.mapping(node, path, _CHANNEL_KEYS)
    topic, decoder, metric = _source(r, n, path)
    rate = r.get_float(n, "rate_hz", path, REQUIRED, lambda v: 0 < v <= 1e6,
                       "a sample rate in Hz, > 0 and at most 1000000")
    feats = _features(r, n, path, decoder, rate, window_length_s)
    unit = r.get_str(n, "unit", path, "")
    spectrum = _spectrum(r, n.get("spectrum"), f"{path}.spectrum", rate, unit) \
        if n.get("spectrum") is not None else None
    lo = r.get_float(n, "min", path, None)
    hi = r.get_float(n, "max", path, None)
    if lo is not None and hi is not None and lo >= hi:
        r.bad(f"{path}.max", f"more than min ({lo:g})", hi)
    stale = r.get_float(n, "stale_s", path, None, lambda v: v > 0, "a number of seconds > 0")
    flat = r.get_int(n, "flatline_windows", path, None, lambda v: v >= 1, "an integer >= 1")
    max_rate = r.get_float(n, "max_rate_per_s", path, None, lambda v: v > 0,
                           "a rate of change > 0 (channel units per second)")
    if topic is None or rate is None:
        return None
    computed = feats + (spectrum.feature_names() if spectrum is not None else ())
    limits = _limits(r, n.get("limits"), f"{path}.limits", computed)
    return ChannelConfig(
        name=str(name), topic=topic, decoder=decoder, rate_hz=rate, features=feats,
        unit=unit,
        ts_field=r.get_str(n, "ts_field", path, "ts"),
        value_field=r.get_str(n, "value_field", path, "value"),
        values_field=r.get_str(n, "values_field", path, "values"),
        rate_field=r.get_str(n, "rate_field", path, "rate_hz"),
        seq_field=r.get_str(n, "seq_field", path, None),
        spectrum=spectrum, min_value=lo, max_value=hi, stale_s=stale, flatline_windows=flat,
        max_rate_per_s=max_rate, limits=limits,
        column=r.get_str(n, "column", path, None, expected="the header of the channel's "
                         "column in a CSV export (a non-empty string)"),
        metric=metric)


def _hz_pair(r: Reader, v: Any, where: str, nyquist: float) -> tuple[float, float] | None:
    """[lo, hi] in Hz with 0 <= lo < hi <= the Nyquist frequency."""
    if (not isinstance(v, list) or len(v) != 2 or not all(finite_number(x) for x in v)
            or not 0 <= v[0] < v[1] <= nyquist):
        r.bad(where, f"[low, high] in Hz with 0 <= low < high <= {nyquist:g} (half the "
              "sample rate)", v)
        return None
    return float(v[0]), float(v[1])


def _spectrum(r: Reader, node: Any, path: str, rate: float | None, unit: str
              ) -> SpectrumConfig | None:
    n = r.mapping(node, path, ("bands_hz", "velocity_rms", "orders", "envelope_hz"))
    nyq = (rate or 2.0) / 2.0
    bands: list[tuple[float, float]] = []
    for i, b in enumerate(r.get_list(n, "bands_hz", path, [])):
        pair = _hz_pair(r, b, f"{path}.bands_hz[{i}]", nyq)
        if pair is not None:
            bands.append(pair)
    if len(set(bands)) != len(bands):
        r.bad(f"{path}.bands_hz", "each band once", found="a band repeated")
    orders: list[float] = []
    for i, o in enumerate(r.get_list(n, "orders", path, [])):
        if not finite_number(o) or not 0 < o <= 64:
            r.bad(f"{path}.orders[{i}]", "a multiple of running speed in (0, 64]", o)
        else:
            orders.append(float(o))
    if len(set(orders)) != len(orders):
        r.bad(f"{path}.orders", "each order once", found="an order repeated")
    env = None
    if n.get("envelope_hz") is not None:
        env = _hz_pair(r, n["envelope_hz"], f"{path}.envelope_hz", nyq)
    vel = r.get_bool(n, "velocity_rms", path, False)
    factor = 1.0
    if vel:
        if unit not in ACCEL_UNITS:
            r.bad(f"{path}.velocity_rms", "an acceleration channel (its unit one of "
                  f"{', '.join(ACCEL_UNITS)})", found=f"unit {unit!r}")
        else:
            factor = ACCEL_UNITS[unit]
        if rate is not None and rate < 2 * 20.0:
            r.bad(f"{path}.velocity_rms", "a sample rate of at least 40 Hz (the band starts "
                  "at 10 Hz)", found=f"{rate:g} Hz")
    return SpectrumConfig(tuple(bands), vel, tuple(orders), env, factor)


LIMIT_KEYS = ("alert", "alarm", "alert_low", "alarm_low", "deadband", "on_delay")


def _limits(r: Reader, node: Any, path: str, computed: tuple[str, ...]
            ) -> tuple[LimitConfig, ...]:
    if node is None:
        return ()
    if not isinstance(node, dict) or not node:
        r.bad(path, "a mapping of feature name to limits (alert, alarm, ...)", node)
        return ()
    out: list[LimitConfig] = []
    for feat, lnode in node.items():
        where = f"{path}.{feat}"
        if feat not in computed:
            r.bad(where, f"a feature this channel computes ({', '.join(computed)})",
                  found=repr(feat))
            continue
        ln = r.mapping(lnode, where, LIMIT_KEYS)
        vals = {k: r.get_float(ln, k, where, None) for k in LIMIT_KEYS[:4]}
        if all(v is None for v in vals.values()):
            r.bad(where, "at least one of alert, alarm, alert_low, alarm_low")
        if vals["alert"] is not None and vals["alarm"] is not None \
                and vals["alarm"] < vals["alert"]:
            r.bad(f"{where}.alarm", f"at least alert ({vals['alert']:g})", vals["alarm"])
        if vals["alert_low"] is not None and vals["alarm_low"] is not None \
                and vals["alarm_low"] > vals["alert_low"]:
            r.bad(f"{where}.alarm_low", f"at most alert_low ({vals['alert_low']:g})",
                  vals["alarm_low"])
        dead = r.get_float(ln, "deadband", where, 0.0, lambda v: v >= 0, "a number >= 0")
        delay = r.get_int(ln, "on_delay", where, 2, lambda v: v >= 1,
                          "a number of windows >= 1")
        out.append(LimitConfig(str(feat), vals["alert"], vals["alarm"], vals["alert_low"],
                               vals["alarm_low"], dead, delay))
    return tuple(out)


MODE_KEYS = ("min", "max", "code", "bundle", "scored", "settling_s")


def _modes(r: Reader, node: Any, path: str, channels: dict[str, ChannelConfig]
           ) -> ModesConfig | None:
    n = r.mapping(node, path, ("channel", "hysteresis", "settling_s", "states"))
    chan = r.get_str(n, "channel", path, REQUIRED, expected="the channel that decides "
                     "the mode")
    if chan is not None and channels and chan not in channels:
        r.bad(f"{path}.channel", f"one of the asset's channels ({', '.join(channels)})", chan)
    hyst = r.get_float(n, "hysteresis", path, 0.0, lambda v: v >= 0,
                       "a number >= 0 in the mode channel's unit")
    settle = r.get_float(n, "settling_s", path, 0.0, lambda v: v >= 0,
                         "a number of seconds >= 0")
    snode = n.get("states")
    states: list[ModeSpec] = []
    if not isinstance(snode, dict) or not snode:
        r.bad(f"{path}.states", "a mapping of mode name to its band or code", snode)
        snode = {}
    for mname, mnode in snode.items():
        where = f"{path}.states.{mname}"
        if not is_name(mname):
            r.bad(where, "a mode name of letters, digits, '_', '.', '-' (at most 64)", mname)
            continue
        m = r.mapping(mnode, where, MODE_KEYS)
        lo = r.get_float(m, "min", where, None)
        hi = r.get_float(m, "max", where, None)
        code = r.get_float(m, "code", where, None)
        if code is not None and (lo is not None or hi is not None):
            r.bad(f"{where}.code", "either code or a min/max band, not both", code)
        if lo is not None and hi is not None and lo >= hi:
            r.bad(f"{where}.max", f"more than min ({lo:g})", hi)
        bundle = r.path(r.get_str(m, "bundle", where, None), f"{where}.bundle")
        r.bundle_dir(bundle, f"{where}.bundle")
        states.append(ModeSpec(str(mname), lo, hi, code, bundle,
                               r.get_bool(m, "scored", where, True),
                               r.get_float(m, "settling_s", where, settle, lambda v: v >= 0,
                                           "a number of seconds >= 0")))
    coded = {s.code is not None for s in states}
    if len(coded) > 1:
        r.bad(f"{path}.states", "every mode by code or every mode by a min/max band")
    if chan is None or not states:
        return None
    by_code = coded == {True}
    if not by_code:
        bands = sorted((s.min_value if s.min_value is not None else -math.inf,
                        s.max_value if s.max_value is not None else math.inf, s.name)
                       for s in states)
        for (_, hi1, a), (lo2, _, b) in itertools.pairwise(bands):
            if lo2 < hi1:
                r.bad(f"{path}.states.{b}", f"a band that does not overlap mode {a}")
    return ModesConfig(chan, tuple(states), hyst, by_code)


def _iso(r: Reader, node: Any, path: str, channels: dict[str, ChannelConfig]
         ) -> IsoConfig | None:
    n = r.mapping(node, path, ("group", "support", "baseline_mm_s", "channels",
                               "deadband_mm_s", "on_delay"))
    group = r.get_int(n, "group", path, REQUIRED, lambda v: v in (1, 2),
                      "machine group 1 (300 kW to 50 MW) or 2 (15 kW to 300 kW)")
    support = r.get_str(n, "support", path, REQUIRED, lambda v: v in ("rigid", "flexible"),
                        "rigid or flexible")
    base = r.get_float(n, "baseline_mm_s", path, None, lambda v: v > 0,
                       "the machine's normal velocity RMS in mm/s, > 0")
    with_vel = [c.name for c in channels.values()
                if c.spectrum is not None and c.spectrum.velocity_rms]
    chans = r.get_list(n, "channels", path, list(with_vel))
    for i, c in enumerate(chans):
        if c not in with_vel:
            r.bad(f"{path}.channels[{i}]", "a channel with spectrum.velocity_rms: true", c)
    if not chans and channels:
        r.bad(path, "a channel with spectrum.velocity_rms: true to evaluate")
    dead = r.get_float(n, "deadband_mm_s", path, 0.1, lambda v: v >= 0, "a number >= 0")
    delay = r.get_int(n, "on_delay", path, 2, lambda v: v >= 1, "a number of windows >= 1")
    if group is None or support is None:
        return None
    return IsoConfig(group, Support(support), base, tuple(str(c) for c in chans), dead, delay)


def _asset(r: Reader, node: Any, path: str) -> AssetConfig | None:
    if not isinstance(node, dict):
        r.bad(path, "an asset mapping (name, channels, window, detector, bundle)", node)
        return None
    n = r.mapping(node, path, ("name", "channels", "window", "detector", "bundle",
                               "speed_channel", "modes", "iso10816"))
    name = r.get_str(n, "name", path, REQUIRED, is_name,
                     "an asset name of letters, digits, '_', '.', '-' (at most 64)")
    window = _window(r, n.get("window"), f"{path}.window")
    chans_node = n.get("channels")
    channels: list[ChannelConfig] = []
    if not isinstance(chans_node, dict) or not chans_node:
        r.bad(f"{path}.channels", "a mapping of channel name to channel settings", chans_node)
    else:
        for cname, cnode in chans_node.items():
            ch = _channel(r, cname, cnode, f"{path}.channels.{cname}", window.length_s)
            if ch is not None:
                channels.append(ch)
    dpath = f"{path}.detector"
    d = r.mapping(n.get("detector"), dpath, ("raise_k", "raise_n", "clear_m"))
    pos = "an integer >= 1"
    k = r.get_int(d, "raise_k", dpath, 2, lambda v: v >= 1, pos)
    nn = r.get_int(d, "raise_n", dpath, max(3, k), lambda v: v >= 1, pos)
    m = r.get_int(d, "clear_m", dpath, 3, lambda v: v >= 1, pos)
    if k > nn:
        r.bad(f"{dpath}.raise_k", f"at most raise_n ({nn})", k)
        k = nn
    bundle = r.path(r.get_str(n, "bundle", path, None), f"{path}.bundle")
    r.bundle_dir(bundle, f"{path}.bundle")
    by_name = {c.name: c for c in channels}
    speed = r.get_str(n, "speed_channel", path, None)
    if speed is not None and by_name and speed not in by_name:
        r.bad(f"{path}.speed_channel", f"one of the asset's channels ({', '.join(by_name)})",
              speed)
    for c in channels:
        if c.spectrum is not None and c.spectrum.orders and speed is None:
            r.bad(f"{path}.channels.{c.name}.spectrum.orders",
                  "the asset's speed_channel (rpm) to find running speed")
    modes = _modes(r, n["modes"], f"{path}.modes", by_name) \
        if n.get("modes") is not None else None
    iso = _iso(r, n["iso10816"], f"{path}.iso10816", by_name) \
        if n.get("iso10816") is not None else None
    if name is None:
        return None
    return AssetConfig(name, tuple(channels), window, DetectorParams(k, nn, m), bundle,
                       speed, modes, iso)



def topics_needed(ch: ChannelConfig) -> tuple[str, ...]:
    """The topics a channel's samples depend on: its own, and for sparkplug-b also the
    births and deaths of its edge node (and device)."""
    spb = sparkplug_topic(ch.topic) if ch.decoder is Decoder.SPARKPLUG_B else None
    if spb is None:
        return (ch.topic,)
    group, _, node, device = spb
    base = f"{SPARKPLUG_NAMESPACE}/{group}"
    out = [ch.topic, f"{base}/NBIRTH/{node}", f"{base}/NDEATH/{node}"]
    if device is not None:
        out += [f"{base}/DBIRTH/{node}/{device}", f"{base}/DDEATH/{node}/{device}"]
    return tuple(out)



def _cross_checks(r: Reader, assets: list[tuple[int, AssetConfig]]) -> None:
    """Asset names are unique and no two channels share a topic, except sparkplug-b
    channels, which share their edge node's or device's topic but not a metric there;
    `idx` is the list index."""
    seen_names: dict[str, int] = {}
    seen_topics: dict[str, str] = {}
    spb_topics: dict[str, str] = {}  # sparkplug-b topic -> the first channel using it
    seen_metrics: dict[tuple[str, str], str] = {}
    for idx, a in assets:
        if a.name in seen_names:
            r.bad(f"assets[{idx}].name", "a name no other asset has",
                  found=f"{a.name!r}, also assets[{seen_names[a.name]}]")
        seen_names.setdefault(a.name, idx)
        for ch in a.channels:
            where = f"assets[{idx}].channels.{ch.name}.topic"
            if ch.decoder is Decoder.SPARKPLUG_B:
                if ch.topic in seen_topics:
                    r.bad(where, "a topic no channel of another decoder uses",
                          found=f"{ch.topic!r}, also {seen_topics[ch.topic]}")
                spb_topics.setdefault(ch.topic, where)
                key = (ch.topic, ch.metric or "")
                mwhere = f"assets[{idx}].channels.{ch.name}.metric"
                if key in seen_metrics:
                    r.bad(mwhere, "a metric no other channel of this topic reads",
                          found=f"{ch.metric!r}, also {seen_metrics[key]}")
                else:
                    seen_metrics[key] = mwhere
            elif ch.topic in seen_topics or ch.topic in spb_topics:
                r.bad(where, "a topic no other channel uses",
                      found=f"{ch.topic!r}, also "
                            f"{seen_topics.get(ch.topic) or spb_topics[ch.topic]}")
            else:
                seen_topics[ch.topic] = where



def _matches(flt: str, topic: str) -> bool:
    """MQTT 3.1.1 section 4.7 topic matching of a filter against a topic name."""
    fl, tl = flt.split("/"), topic.split("/")
    for i, f in enumerate(fl):
        if f == "#":
            return True
        if i >= len(tl) or (f != "+" and f != tl[i]):
            return False
    return len(fl) == len(tl)


def parse_assets(r: Reader, node: Any) -> list[AssetConfig]:
    """The `assets:` list, with the checks across assets (`_cross_checks`)."""
    indexed: list[tuple[int, AssetConfig]] = []
    if not isinstance(node, list) or not node:
        r.bad("assets", "a non-empty list of assets", node)
    else:
        for i, a in enumerate(node):
            ac = _asset(r, a, f"assets[{i}]")
            if ac is not None:
                indexed.append((i, ac))
    _cross_checks(r, indexed)
    return [a for _, a in indexed]


def check_subscriptions(r: Reader, subscriptions: tuple[str, ...],
                        assets: list[AssetConfig]) -> None:
    """`ingest.subscriptions`, when given, must cover every topic a channel needs."""
    if not subscriptions:
        return
    for a in assets:
        for ch in a.channels:
            for t in topics_needed(ch):
                if not any(_matches(f, t) for f in subscriptions):
                    r.bad("ingest.subscriptions", f"filters that cover every channel "
                          f"topic (none covers {t!r} of asset {a.name})")
                    break
