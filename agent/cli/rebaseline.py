"""`watchkeep rebaseline`, `watchkeep models`, `watchkeep rollback`: talk to the running daemon.

Each command finds the admin socket from `--socket`, else from `--config` (its
`rebaseline.admin_socket`), else the default state directory's. The request and its
outcome are the daemon's to log and publish; these commands only print the reply.
`watchkeep models --adopt BUNDLE` works offline: it copies a trained bundle into the
model store as the next version (with a rehearsal set sampled from `--dataset`) and
prints the `active` link to put in the asset's `bundle:`.
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path
from typing import Any, TextIO

from agent.learning.jobs import Result
from agent.learning.rebaseline import RebaselineError
from agent.ops.admin import AdminVerb, request

DEFAULT_SOCKET = "/var/lib/watchkeep/admin.sock"


def _socket(args: argparse.Namespace) -> str:
    if args.socket:
        return str(args.socket)
    if args.config:
        from agent.config.load import load_config
        from agent.config.rebaseline import RebaselineConfig

        cfg = load_config(args.config)
        rb = cfg.rebaseline or RebaselineConfig.defaults(cfg.state_dir)
        return str(rb.admin_socket)
    return DEFAULT_SOCKET


def _store_from(args: argparse.Namespace) -> Any:
    from agent.config.load import load_config
    from agent.config.rebaseline import RebaselineConfig
    from agent.models.store import ModelStore

    if args.models_dir:
        return ModelStore(args.models_dir)
    if not args.config:
        raise RebaselineError("--adopt needs --config or --models-dir to find the model store")
    cfg = load_config(args.config)
    rb = cfg.rebaseline or RebaselineConfig.defaults(cfg.state_dir)
    return ModelStore(rb.models_dir, rb.versions_kept)


def _common(p: argparse.ArgumentParser) -> None:
    p.add_argument("--asset", required=True, help="the asset, as named in the config")
    p.add_argument("--socket", help=f"the daemon's admin socket (default: from --config, "
                                    f"else {DEFAULT_SOCKET})")
    p.add_argument("--config", "-c", help="the daemon's config file (to find the socket)")
    p.add_argument("--json", action="store_true", help="print the raw reply")


def _ask(args: argparse.Namespace, doc: dict[str, Any]) -> dict[str, Any]:
    reply = request(_socket(args), doc)
    if not reply.get("ok"):
        raise RebaselineError(str(reply.get("error", "the daemon refused the request")))
    return reply


def add_rebaseline_arguments(p: argparse.ArgumentParser) -> None:
    _common(p)
    p.add_argument("--mode", help="operating mode to re-learn (default: the current one)")
    p.add_argument("--windows", type=int, help="new-normal windows to collect (default: "
                                               "rebaseline.windows)")
    p.add_argument("--reason", default="", help="why (logged and put in the events)")
    p.add_argument("--accept-shift", action="store_true",
                   help="train even if the new windows sit beyond rebaseline.max_shift "
                        "(recorded in the events)")
    p.add_argument("--cancel", action="store_true", help="cancel the asset's rebaseline")
    p.add_argument("--wait", action="store_true", help="wait for the outcome and print it")
    p.add_argument("--timeout", type=float, default=0.0,
                   help="with --wait: give up after this many seconds (default: never)")


def cmd_rebaseline(args: argparse.Namespace, *, out: TextIO | None = None) -> int:
    out = out or sys.stdout
    if args.cancel:
        reply = _ask(args, {"verb": AdminVerb.CANCEL, "asset": args.asset})
        print(f"{args.asset}: rebaseline {reply['cancelled']} cancelled", file=out)
        return 0
    doc: dict[str, Any] = {"verb": AdminVerb.REBASELINE, "asset": args.asset, "reason": args.reason,
                           "accept_shift": bool(args.accept_shift)}
    if args.mode:
        doc["mode"] = args.mode
    if args.windows is not None:
        doc["windows"] = args.windows
    reply = _ask(args, doc)
    if args.json and not args.wait:
        print(json.dumps(reply, indent=2), file=out)
        return 0
    print(f"{args.asset}: learning mode {reply['mode']} from v{reply['base_version']}; "
          f"collecting {reply['windows']} windows (request {reply['request_id']})", file=out)
    if not args.wait:
        return 0
    deadline = time.monotonic() + args.timeout if args.timeout > 0 else None
    while True:
        s = _ask(args, {"verb": AdminVerb.STATUS})["assets"].get(args.asset, {})
        last = s.get("last_rebaseline") or {}
        if s.get("learning") is None and last.get("request_id") == reply["request_id"]:
            break
        if deadline is not None and time.monotonic() > deadline:
            raise RebaselineError(f"no outcome after {args.timeout:g} s; the daemon goes on "
                                  "(see watchkeep status)")
        time.sleep(1.0)
    if args.json:
        print(json.dumps(last, indent=2), file=out)
    else:
        f = last.get("figures", {})
        figs = ", ".join(f"{k} {v}" for k, v in f.items())
        print(f"{args.asset}: {last['result']} (v{last['old_version']} -> "
              f"{'v' + str(last['new_version']) if last.get('new_version') else 'unchanged'})"
              f"{'; ' + figs if figs else ''}", file=out)
        for r in last.get("reasons", []):
            print(f"  {r}", file=out)
    return 0 if last.get("result") == Result.ACCEPTED else 8


def add_models_arguments(p: argparse.ArgumentParser) -> None:
    _common(p)
    p.add_argument("--adopt", metavar="BUNDLE",
                   help="offline: copy this bundle into the model store as the next version")
    p.add_argument("--mode", default="default", help="with --adopt: the mode slot")
    p.add_argument("--dataset", help="with --adopt: the training dataset (rehearsal set)")
    p.add_argument("--models-dir", help="with --adopt: the store (default: from --config)")


def cmd_models(args: argparse.Namespace, *, out: TextIO | None = None) -> int:
    out = out or sys.stdout
    if args.adopt:
        return _adopt(args, out)
    reply = _ask(args, {"verb": AdminVerb.MODELS, "asset": args.asset})
    if args.json:
        print(json.dumps(reply, indent=2), file=out)
        return 0
    print(f"{args.asset}: model store {reply['models_dir']}", file=out)
    for mode, versions in reply["modes"].items():
        print(f"  mode {mode}", file=out)
        for v in versions:
            lin = v.get("lineage") or {}
            how = lin.get("method", "")
            req = lin.get("request") or {}
            extra = f" from v{lin['parent']}" if "parent" in lin else ""
            why = f" ({req['reason']})" if req.get("reason") else ""
            thr = f"{v['threshold']:.4g}" if v.get("threshold") is not None else "-"
            print(f"  {'*' if v['active'] else ' '} v{v['version']:<4} {v['created']:<21} "
                  f"threshold {thr:<10} rehearsal {v['rehearsal_windows']:<5} "
                  f"{how}{extra}{why}", file=out)
    return 0


def _adopt(args: argparse.Namespace, out: TextIO) -> int:
    from agent.commission.dataset import read_dataset
    from agent.config.rebaseline import DEFAULT_REHEARSAL_SIZE
    from agent.learning.rehearsal import reservoir
    from agent.models.bundle import load_bundle

    store = _store_from(args)
    bundle = load_bundle(args.adopt)
    ds_path = args.dataset or bundle.meta.training.get("dataset")
    if not ds_path or not Path(ds_path).is_dir():
        raise RebaselineError("give the bundle's training dataset (--dataset): its rehearsal "
                              "set is sampled from it")
    ds = read_dataset(ds_path, min_windows=1)
    names = bundle.meta.feature_names
    reh = reservoir(ds.columns(names), names, DEFAULT_REHEARSAL_SIZE)
    version = store.adopt(args.asset, args.mode, args.adopt, reh)
    print(f"{args.asset}/{args.mode}: adopted as v{version} with {reh.size} rehearsal windows; "
          f"set the asset's bundle to {store.active_link(args.asset, args.mode)}", file=out)
    return 0


def add_rollback_arguments(p: argparse.ArgumentParser) -> None:
    _common(p)
    p.add_argument("--mode", help="operating mode (default: the current one)")
    p.add_argument("--to", help="version to go back to, e.g. v3 (default: the one before)")
    p.add_argument("--reason", default="", help="why (logged and put in the event)")


def cmd_rollback(args: argparse.Namespace, *, out: TextIO | None = None) -> int:
    out = out or sys.stdout
    doc: dict[str, Any] = {"verb": AdminVerb.ROLLBACK, "asset": args.asset, "reason": args.reason}
    if args.mode:
        doc["mode"] = args.mode
    if args.to:
        doc["to"] = args.to
    reply = _ask(args, doc)
    if args.json:
        print(json.dumps(reply, indent=2), file=out)
    else:
        print(f"{args.asset}/{reply['mode']}: v{reply['old_version']} -> "
              f"v{reply['new_version']}", file=out)
    return 0
