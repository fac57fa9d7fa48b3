"""The output of `watchkeep discover` (pure): the topic table and the starter config.

Usable topics are grouped into assets by prefix (the topic without its last level);
each becomes a channel named after its last level, with the decoder, field names and
`rate_hz` of its `Proposal` and a YAML comment for everything that was guessed.
"""

from __future__ import annotations

import json
import re
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

from agent.commission.discover import Proposal, Shape, fmt

_NAME_BAD = re.compile(r"[^A-Za-z0-9_.-]+")


def safe_name(text: str, fallback: str) -> str:
    """A config name (letters, digits, '_', '.', '-'; at most 64) made from `text`."""
    s = _NAME_BAD.sub("_", text).strip("_")[:64]
    return s or fallback


@dataclass(frozen=True)
class AssetGroup:
    name: str
    prefix: str
    channels: tuple[tuple[str, Proposal], ...]  # (channel name, proposal)
    notes: tuple[str, ...] = ()


def group_assets(proposals: Sequence[Proposal]) -> list[AssetGroup]:
    """Usable topics grouped by their prefix (the topic without its last level).

    The asset is named after the prefix's last level (more levels joined with '-' where
    two prefixes end alike), each channel after the topic's last level.
    """
    by_prefix: dict[str, list[Proposal]] = {}
    for p in proposals:
        if p.usable:
            prefix, _, _ = p.topic.rpartition("/")
            by_prefix.setdefault(prefix, []).append(p)
    prefixes = sorted(by_prefix)
    names: dict[str, str] = {}
    depth = 1
    while True:
        names = {pf: safe_name("-".join(pf.split("/")[-depth:]) if pf else "unsorted",
                               f"asset{i + 1}") for i, pf in enumerate(prefixes)}
        if len(set(names.values())) == len(names) or depth > 16:
            break
        depth += 1
    out = []
    seen: set[str] = set()
    for i, pf in enumerate(prefixes):
        name = names[pf]
        if name in seen:
            name = f"{name}-{i + 1}"
        seen.add(name)
        notes = []
        if not pf:
            notes.append("topics with one level: no prefix to group them by")
        chans: list[tuple[str, Proposal]] = []
        used: set[str] = set()
        for j, p in enumerate(sorted(by_prefix[pf], key=lambda q: q.topic)):
            cname = safe_name(p.topic.rpartition("/")[2], f"ch{j + 1}")
            if cname in used:
                cname = f"{cname}_{j + 1}"
            used.add(cname)
            chans.append((cname, p))
        out.append(AssetGroup(name, pf, tuple(chans), tuple(notes)))
    return out


def _window_s(group: AssetGroup) -> float:
    """10 s, or long enough for 5 samples of the slowest channel (a window needs samples
    on every channel to be covered; common practice, no source)."""
    slowest = min(p.sample_rate_hz or 1.0 for _, p in group.channels)
    need = 5.0 / slowest
    if need <= 10:
        return 10.0
    for nice in (15, 20, 30, 60, 120, 300, 600, 900, 1800, 3600, 7200, 21600, 43200, 86400):
        if need <= nice:
            return float(nice)
    return 86400.0


def _q(v: Any) -> str:
    """A YAML scalar (JSON's double-quoted strings and numbers are valid YAML)."""
    if isinstance(v, str):
        plain = re.fullmatch(r"[A-Za-z0-9_][A-Za-z0-9_./-]*", v)
        reserved = v.lower() in ("yes", "no", "on", "off", "true", "false", "null", "y", "n")
        return v if plain and not reserved and not re.fullmatch(r"[0-9._e+-]+", v) \
            else json.dumps(v)
    if isinstance(v, float) and v.is_integer():
        return str(int(v))
    return repr(v) if isinstance(v, float) else str(v)


def render_config(proposals: Sequence[Proposal], *, broker_host: str, broker_port: int,
                  duration_s: float, site: str | None = None, gateway: str | None = None,
                  header: str = "") -> str:
    """A starter config: every usable topic as a channel, assets grouped by prefix."""
    groups = group_assets(proposals)
    lines = [f"# A starter config written by `watchkeep discover` after listening "
             f"{duration_s:g} s to {broker_host}:{broker_port}.",
             "# Every rate and field below was measured or guessed from that sample: "
             "read the comments,",
             "# then `watchkeep check-config` it, record normal running and train "
             "a bundle per asset.",
             "# Assets have no `bundle:` yet: their windows are not scored until one "
             "is added."]
    if header:
        lines += [f"# {h}" for h in header.splitlines()]
    first_levels = sorted({p.topic.split("/")[0] for p in proposals if p.usable})
    guessed_site = safe_name(first_levels[0], "site") if first_levels else "site"
    if site is None:
        lines.append("# site: guessed from the first topic level; set it to your site's name")
    lines.append(f"site: {_q(site or guessed_site)}")
    if gateway is None:
        lines.append("# gateway: a placeholder; set it to this gateway's name")
    lines.append(f"gateway: {_q(gateway or 'gw-01')}")
    lines += [f"local_broker: {{host: {_q(broker_host)}, port: {broker_port}}}",
              "# upstream_broker: where events go; set it to the maintenance side's broker",
              f"upstream_broker: {{host: {_q(broker_host)}, port: {broker_port}}}"]
    if not groups:
        lines += ["# No topic carried numbers watchkeep can decode: nothing to configure.",
                  "assets: []"]
    else:
        lines.append("assets:")
    for g in groups:
        lines.append(f"  # topics under {g.prefix or '(top level)'}/")
        lines += [f"  # {n}" for n in g.notes]
        lines.append(f"  - name: {_q(g.name)}")
        w = _window_s(g)
        if w != 10.0:
            lines.append("    # long enough for 5 samples of the slowest channel")
        lines.append(f"    window: {{length_s: {_q(w)}}}")
        lines.append("    channels:")
        for cname, p in g.channels:
            assert p.decoder is not None and p.sample_rate_hz is not None
            for n in p.notes:
                lines.append(f"      # {n}")
            lines.append(f"      {_q(cname)}:")
            lines.append(f"        topic: {_q(p.topic)}")
            lines.append(f"        decoder: {p.decoder.value}")
            lines.append(f"        rate_hz: {_q(p.sample_rate_hz)}")
            for k, v in p.settings.items():
                lines.append(f"        {k}: {_q(v)}")
    skipped = [p for p in proposals if not p.usable]
    if skipped:
        lines.append("# Topics not configured:")
        for p in sorted(skipped, key=lambda q: q.topic):
            lines.append(f"#   {p.topic}: {p.shape.value}, {p.count} messages; "
                         + "; ".join(p.notes))
    return "\n".join(lines) + "\n"


COLUMNS = ("TOPIC", "MSG/S", "SHAPE", "NUMERIC FIELDS", "SAMPLE HZ", "FIRST", "LAST")


def render_table(proposals: Sequence[Proposal]) -> str:
    """One row per topic: rate, payload shape, fields, block sample rate, first/last."""
    rows = [COLUMNS]
    for p in sorted(proposals, key=lambda q: q.topic):
        fields = ",".join(p.numeric_fields) or "-"
        if len(fields) > 40:
            fields = fields[:37] + "..."
        rows.append((p.topic, fmt(p.msg_rate_hz), p.shape.value, fields,
                     fmt(p.sample_rate_hz) if p.shape is Shape.JSON_BLOCK else "-",
                     fmt(p.first_value), fmt(p.last_value)))
    widths = [max(len(r[i]) for r in rows) for i in range(len(COLUMNS))]
    return "\n".join("  ".join(c.ljust(w) for c, w in zip(r, widths, strict=True)).rstrip()
                     for r in rows) + "\n"
