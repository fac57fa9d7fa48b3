"""The `watchkeep` command: known errors become one line on stderr and an exit code."""

from __future__ import annotations

import argparse
import sys
from collections.abc import Callable, Sequence

from agent import __version__
from agent.errors import WatchkeepError

Command = Callable[[argparse.Namespace], int]


def cmd_run(args: argparse.Namespace) -> int:
    from agent.config import load_config
    from agent.daemon import run_daemon
    from agent.logs import setup_logging

    cfg = load_config(args.config)
    return run_daemon(cfg, setup_logging(args.log_level, args.log_format))


def cmd_check_config(args: argparse.Namespace) -> int:
    from agent.bundle import load_bundle
    from agent.config import load_config
    from agent.errors import BundleError
    from agent.pipeline import check_bundle_fits

    cfg = load_config(args.config)
    print(f"config {args.config}: OK")
    print(f"  site {cfg.site}, gateway {cfg.gateway}, topic prefix {cfg.topic_prefix}")
    lb, ub = cfg.local_broker, cfg.upstream_broker
    print(f"  local broker {lb.host}:{lb.port}  upstream broker {ub.host}:{ub.port}"
          f"{' (TLS)' if ub.tls else ''}  MQTT {ub.protocol.value}")
    print(f"  state dir {cfg.state_dir}  outbox {cfg.outbox.path} "
          f"(synchronous={cfg.outbox.synchronous.value})")
    bad = 0
    for a in cfg.assets:
        w = a.window
        hop = "" if w.hop_s == w.length_s else f", hop {w.hop_s:g} s"
        print(f"  asset {a.name}: {len(a.channels)} channels, window {w.length_s:g} s{hop}, "
              f"raise {a.detector.raise_k} of {a.detector.raise_n}, "
              f"clear after {a.detector.clear_m}")
        for ch in a.channels:
            print(f"    {ch.name:<16} {ch.decoder.value:<10} {ch.rate_hz:>8g} Hz  {ch.topic}")
        if a.bundle is None:
            print("    model: none (windows are not scored)")
            continue
        try:
            b = load_bundle(a.bundle)
            why = check_bundle_fits(a, b)
        except BundleError as exc:
            why = str(exc)
        if why:
            bad += 1
            print(f"    model: ERROR {why}")
        else:
            print(f"    model: {b.meta.model_id} v{b.meta.version}, {b.n_features} features, "
                  f"threshold {b.meta.threshold:.4g}")
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

    from agent import status_cmd

    st = sub.add_parser("status", help="show the running daemon's assets as a table")
    status_cmd.add_status_arguments(st)
    st.set_defaults(func=status_cmd.cmd_status)

    from agent import rebaseline_cmd as rbc

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
    rep = sub.add_parser("replay", help="run a raw capture through the daemon pipeline")
    replay_mod.add_replay_arguments(rep)
    rep.set_defaults(func=replay_mod.cmd_replay)
    from agent import demo as demo_mod

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


if __name__ == "__main__":
    sys.exit(main())
