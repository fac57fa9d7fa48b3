"""The `watchkeep` command: known errors become one line on stderr and an exit code."""

from __future__ import annotations

import argparse
import sys
from collections.abc import Callable, Sequence
from typing import Any

from agent import __version__
from agent.errors import WatchkeepError

Command = Callable[[argparse.Namespace], int]


def cmd_run(args: argparse.Namespace) -> int:
    from agent.config.load import load_config
    from agent.ops.logs import setup_logging
    from agent.ops.run import run_daemon

    cfg = load_config(args.config)
    return run_daemon(cfg, setup_logging(args.log_level, args.log_format))


def _channel_checks(ch: Any) -> str:
    """A short list of what besides the features a channel is watched for."""
    parts = []
    if ch.spectrum is not None:
        sp = ch.spectrum
        bits = [f"{len(sp.bands_hz)} bands"] if sp.bands_hz else []
        bits += ["velocity"] if sp.velocity_rms else []
        bits += [f"orders {','.join(f'{o:g}x' for o in sp.orders)}"] if sp.orders else []
        bits += ["envelope"] if sp.envelope_hz else []
        parts.append("spectrum " + "/".join(bits or ["dominant line"]))
    health = [n for n, v in (("range", ch.min_value is not None or ch.max_value is not None),
                             ("stale", ch.stale_s is not None),
                             ("flatline", ch.flatline_windows is not None),
                             ("rate", ch.max_rate_per_s is not None)) if v]
    if health:
        parts.append("health " + ",".join(health))
    if ch.limits:
        parts.append(f"{len(ch.limits)} limit(s)")
    if ch.seq_field:
        parts.append(f"counter {ch.seq_field}")
    if getattr(ch, "column", None):
        parts.append(f"csv column {ch.column!r}")
    return "; ".join(parts)


def _model_line(asset: Any, path: Any, label: str) -> tuple[str, bool]:
    from agent.errors import BundleError
    from agent.models.bundle import load_bundle
    from agent.pipeline.runtime import check_bundle_fits

    if path is None:
        return f"    {label}: none (windows are not scored)", True
    if not path.exists():  # only with --allow-missing-bundles: the loader refuses it otherwise
        return (f"    {label}: not trained yet ({path} does not exist; the daemon will not "
                "start with this config until it does)"), True
    try:
        b = load_bundle(path)
        why = check_bundle_fits(asset, b)
    except BundleError as exc:
        why = str(exc)
    if why:
        return f"    {label}: ERROR {why}", False
    return (f"    {label}: {b.meta.model_id} v{b.meta.version}, {b.n_features} features, "
            f"threshold {b.meta.threshold:.4g}"), True


def _missing_bundles(asset: Any) -> int:
    """How many of the asset's bundle paths do not exist (yet)."""
    paths = [asset.bundle, *(m.bundle for m in asset.modes.states)] if asset.modes \
        else [asset.bundle]
    return sum(1 for p in paths if p is not None and not p.exists())


def cmd_check_config(args: argparse.Namespace) -> int:
    from agent.config.load import load_config

    allow = bool(getattr(args, "allow_missing_bundles", False))
    cfg = load_config(args.config, require_bundles=not allow)
    print(f"config {args.config}: OK")
    print(f"  site {cfg.site}, gateway {cfg.gateway}, topic prefix {cfg.topic_prefix}")
    lb, ub = cfg.local_broker, cfg.upstream_broker
    ups = ", ".join(str(e) for e in ub.targets())
    print(f"  local broker {lb.host}:{lb.port}  upstream broker"
          f"{' endpoints' if len(ub.targets()) > 1 else ''} {ups}"
          f"{' (TLS)' if ub.tls else ''}  MQTT {ub.protocol.value}")
    print(f"  state dir {cfg.state_dir}  outbox {cfg.outbox.path} "
          f"(synchronous={cfg.outbox.synchronous.value})")
    rb = getattr(cfg, "rebaseline", None)
    if rb is not None:
        print(f"  rebaseline: admin socket {'on' if rb.enabled else 'off'}, "
              f"MQTT commands {'on' if rb.mqtt_commands else 'off'}")
    bad = 0
    missing = 0
    for a in cfg.assets:
        w = a.window
        hop = "" if w.hop_s == w.length_s else f", hop {w.hop_s:g} s"
        print(f"  asset {a.name}: {len(a.channels)} channels, window {w.length_s:g} s{hop}, "
              f"raise {a.detector.raise_k} of {a.detector.raise_n}, "
              f"clear after {a.detector.clear_m}")
        for ch in a.channels:
            where = ch.topic if ch.metric is None else f"metric {ch.metric!r} of {ch.topic}"
            print(f"    {ch.name:<16} {ch.decoder.value:<10} {ch.rate_hz:>8g} Hz  {where}")
            checks = _channel_checks(ch)
            if checks:
                print(f"      {checks}")
        if a.iso10816 is not None:
            iso = a.iso10816
            print(f"    ISO 10816-3 zones: group {iso.group}, {iso.support} support"
                  + (f", baseline {iso.baseline_mm_s:g} mm/s" if iso.baseline_mm_s else ""))
        missing += _missing_bundles(a)
        if a.modes is None:
            line, ok = _model_line(a, a.bundle, "model")
            print(line)
            bad += not ok
            continue
        print(f"    modes from {a.modes.channel}: "
              + ", ".join(m.name + ("" if m.scored else " (not scored)")
                          for m in a.modes.states))
        for m in a.modes.states:
            if not m.scored:
                continue
            line, ok = _model_line(a, m.bundle or a.bundle, f"model [{m.name}]")
            print(line)
            bad += not ok
    if missing:
        print(f"warning: {missing} model bundle(s) not trained yet: fine for `record`, "
              "not for `run`", file=sys.stderr)
    if bad:
        print(f"{bad} model bundle(s) cannot be used", file=sys.stderr)
        return 3
    return 0


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="watchkeep", description=(
        "Condition-monitoring daemon and commissioning toolkit (advisory only: "
        "not a machine protection or safety function)."))
    p.add_argument("--version", action="version", version=f"watchkeep {__version__}")
    sub = p.add_subparsers(dest="command", required=True)

    run = sub.add_parser("run", help="run the daemon in the foreground")
    run.add_argument("--config", "-c", required=True)
    run.add_argument("--log-level", default="INFO",
                     choices=["DEBUG", "INFO", "WARNING", "ERROR"])
    run.add_argument("--log-format", default="kv", choices=["kv", "json"],
                     help="one line per record: key=value (default) or JSON")
    run.set_defaults(func=cmd_run)

    from agent.cli import status as status_cmd

    st = sub.add_parser("status", help="show the running daemon's assets as a table")
    status_cmd.add_status_arguments(st)
    st.set_defaults(func=status_cmd.cmd_status)

    from agent.cli import rebaseline as rbc

    for name, helptext, add, handler in (
            ("rebaseline", "re-learn an asset's normal in the running daemon",
             rbc.add_rebaseline_arguments, rbc.cmd_rebaseline),
            ("models", "list an asset's model versions (or --adopt a bundle)",
             rbc.add_models_arguments, rbc.cmd_models),
            ("rollback", "switch an asset back to an earlier model version",
             rbc.add_rollback_arguments, rbc.cmd_rollback)):
        cp = sub.add_parser(name, help=helptext)
        add(cp)
        cp.set_defaults(func=handler)

    chk = sub.add_parser("check-config", help="check a config file and summarise it")
    chk.add_argument("config")
    chk.add_argument("--allow-missing-bundles", action="store_true",
                     help="accept model bundle paths not trained yet (a config to record "
                          "with), with a warning")
    chk.set_defaults(func=cmd_check_config)

    _add_optional_commands(sub)
    return p


def _add_optional_commands(sub: argparse._SubParsersAction) -> None:
    """Commands whose modules are imported only when they run."""
    try:
        from agent.commission import train as train_mod

        t = sub.add_parser("train", help="train a model bundle from a recorded dataset")
        train_mod.add_train_arguments(t)
        t.set_defaults(func=train_mod.cmd_train)
    except ImportError:
        pass
    from agent.commission import record as record_mod
    from agent.commission import replay as replay_mod

    rec = sub.add_parser("record", help="record an asset's feature windows from live topics")
    record_mod.add_record_arguments(rec)
    rec.set_defaults(func=record_mod.cmd_record)
    from agent.commission import discover_cmd

    dis = sub.add_parser("discover", help="listen to a broker's topics and write a starter "
                         "config for them")
    discover_cmd.add_discover_arguments(dis)
    dis.set_defaults(func=discover_cmd.cmd_discover)
    rep = sub.add_parser("replay", help="run a raw capture through the daemon pipeline")
    replay_mod.add_replay_arguments(rep)
    rep.set_defaults(func=replay_mod.cmd_replay)
    from agent.cli import demo as demo_mod

    d = sub.add_parser("demo", help="run the simulated demo plant with a live view")
    demo_mod.add_demo_arguments(d)
    d.set_defaults(func=demo_mod.cmd_demo)
    try:
        from agent.commission import evaluate as eval_mod

        e = sub.add_parser("evaluate", help="score a dataset and report detection figures")
        eval_mod.add_evaluate_arguments(e)
        e.set_defaults(func=eval_mod.cmd_evaluate)
    except ImportError:
        pass


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return int(args.func(args))
    except WatchkeepError as exc:
        print(f"watchkeep: {exc}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        return 130
    except BrokenPipeError:  # e.g. `watchkeep check-config x.yaml | head`
        import os

        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 141
    except OSError as exc:  # the machine said no (a port in use, a path not writable)
        where = f" ({exc.filename})" if exc.filename else ""
        print(f"watchkeep: {exc.strerror or exc}{where}", file=sys.stderr)
        return 1


if __name__ == "__main__":
    sys.exit(main())
