"""`watchkeep status [--url]`: the running daemon's `/status` as a terminal table.

`render_status(doc)` is pure (a `/status` document in, text out); `fetch_status`
is the only I/O. A daemon that cannot be reached is one line on stderr and exit
code 6, as for every other known error.
"""

from __future__ import annotations

import argparse
import json
import urllib.error
import urllib.request
from collections.abc import Mapping, Sequence
from typing import Any

from agent.errors import WatchkeepError

DEFAULT_URL = "http://127.0.0.1:9310"
COLUMNS = ("ASSET", "MODE", "STATE", "SCORE", "THRESHOLD", "MODEL", "REBASELINE", "LAST EVENT")


class StatusUnavailable(WatchkeepError):
    """The daemon's HTTP endpoint cannot be reached or answers with something else."""

    exit_code = 6


def status_url(url: str) -> str:
    """A base URL (`http://host:port`) or a full `/status` URL -> the `/status` URL."""
    url = url.rstrip("/")
    return url if url.endswith("/status") else url + "/status"


def fetch_status(url: str, timeout_s: float = 5.0) -> dict[str, Any]:
    target = status_url(url)
    try:
        with urllib.request.urlopen(target, timeout=timeout_s) as resp:
            body = resp.read()
    except urllib.error.HTTPError as exc:
        raise StatusUnavailable(f"{target} answered HTTP {exc.code}") from exc
    except (urllib.error.URLError, OSError) as exc:
        reason = getattr(exc, "reason", exc)
        raise StatusUnavailable(f"cannot reach {target} ({reason}); is watchkeep running "
                                "with http enabled?") from exc
    try:
        doc = json.loads(body)
    except json.JSONDecodeError as exc:
        raise StatusUnavailable(f"{target} did not answer with JSON") from exc
    if not isinstance(doc, dict) or not isinstance(doc.get("assets"), list):
        raise StatusUnavailable(f"{target} did not answer with a watchkeep status document")
    return doc


def _num(v: Any) -> str:
    if isinstance(v, bool) or not isinstance(v, int | float):
        return "-"
    return f"{v:.4g}"


def _model(m: Any, error: Any) -> str:
    if isinstance(m, Mapping):
        return f"{m.get('id', '?')} v{m.get('version', '?')}"
    return "ERROR" if error else "none"


def _event(ev: Any) -> str:
    if not isinstance(ev, Mapping):
        return "-"
    kind = str(ev.get("type", "?")).rsplit(".", 2)
    short = ".".join(kind[-2:]) if len(kind) >= 2 else kind[0]
    return f"{short} {ev.get('time', '')}".strip()


def _rebaseline(learning: Any, last: Any) -> str:
    """`collecting 12/60 (3 held)` while learning (anomaly events held back), else the
    last outcome (`last accepted v1->v2`), else `-`."""
    if isinstance(learning, Mapping):
        out = (f"{learning.get('phase', 'learning')} "
               f"{learning.get('collected', '?')}/{learning.get('target', '?')}")
        held = learning.get("held_events")
        return out + (f" ({held} held)" if isinstance(held, int) and held > 0 else "")
    if isinstance(last, Mapping):
        out = f"last {last.get('result', '?')}"
        if last.get("new_version") is not None:
            out += f" v{last.get('old_version', '?')}->v{last['new_version']}"
        return out
    return "-"


def table(rows: Sequence[Sequence[str]]) -> list[str]:
    """Left-aligned columns two spaces apart; the last column is not padded."""
    widths = [max(len(r[i]) for r in rows) for i in range(len(rows[0]))]
    return ["  ".join(c.ljust(w) for c, w in zip(r[:-1], widths, strict=False)) + "  " + r[-1]
            for r in rows]


def render_status(doc: Mapping[str, Any]) -> str:
    """The status document as text: a header line, the asset table, model errors."""
    head = (f"watchkeep {doc.get('version', '?')}  site {doc.get('site', '?')}  "
            f"gateway {doc.get('gateway', '?')}")
    conn = []
    for key, name in (("local_connected", "local broker"), ("upstream_connected", "upstream")):
        if key in doc:
            conn.append(f"{name} {'connected' if doc[key] else 'DISCONNECTED'}")
    up = doc.get("upstream")
    if isinstance(up, Mapping) and up.get("endpoint") and "upstream_connected" in doc:
        conn[-1] += f" ({up['endpoint']})"  # which node of the upstream cluster
    outbox = doc.get("outbox")
    if isinstance(outbox, Mapping) and "rows" in outbox:
        conn.append(f"outbox {outbox['rows']} rows")
    lines = [head] + (["  ".join(conn)] if conn else []) + [""]
    assets = [a for a in doc.get("assets", []) if isinstance(a, Mapping)]
    if not assets:
        return "\n".join([*lines, "no assets configured"]) + "\n"
    rows = [list(COLUMNS)]
    errors = []
    for a in assets:
        state = str(a.get("state", "?"))
        rows.append([str(a.get("asset", "?")), str(a.get("mode", "-")),
                     state.upper() if state == "anomalous" else state,
                     _num(a.get("score")), _num(a.get("threshold")),
                     _model(a.get("model"), a.get("model_error")),
                     _rebaseline(a.get("learning"), a.get("last_rebaseline")),
                     _event(a.get("last_event"))])
        if a.get("model_error"):
            errors.append(f"{a.get('asset', '?')}: {a['model_error']}")
    lines += table(rows)
    if errors:
        lines += ["", "model errors:"] + [f"  {e}" for e in errors]
    return "\n".join(lines) + "\n"


def add_status_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--url", default=DEFAULT_URL,
                   help=f"the daemon's HTTP address (default {DEFAULT_URL})")
    p.add_argument("--json", action="store_true", help="print the raw /status document")


def cmd_status(args: argparse.Namespace) -> int:
    doc = fetch_status(args.url)
    if args.json:
        print(json.dumps(doc, indent=2))
    else:
        print(render_status(doc), end="")
    return 0
