"""``watchkeep-sim``: run a scenario against a broker and/or into a capture file.

Known errors print one line on stderr and exit non-zero, without a traceback.
"""

from __future__ import annotations

import argparse
import datetime as dt
import signal
import sys
import threading
import time
from collections.abc import Sequence
from typing import NoReturn

import yaml

from agent.commission.capture import CaptureError, CaptureWriter, write_capture
from simulator.config import watchkeep_assets
from simulator.errors import SimulatorError
from simulator.plant import simulate
from simulator.publish import parse_broker, publish
from simulator.scenario import labels, load_scenario, with_overrides, write_labels


def _speed(text: str) -> float | None:
    if text.lower() in ("max", "0"):
        return None
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(
            f"expected a positive number or 'max', got {text!r}") from None
    if not v > 0:
        raise argparse.ArgumentTypeError(f"expected a positive number or 'max', got {text!r}")
    return v


def _start(text: str) -> float:
    try:
        return float(text)
    except ValueError:
        pass
    try:
        d = dt.datetime.fromisoformat(text.replace("Z", "+00:00"))
    except ValueError:
        raise argparse.ArgumentTypeError(
            f"expected ISO 8601 or unix seconds, got {text!r}") from None
    return (d if d.tzinfo else d.replace(tzinfo=dt.UTC)).timestamp()


class _Parser(argparse.ArgumentParser):
    """argparse, but usage errors are one line too."""

    def error(self, message: str) -> NoReturn:
        self.exit(2, f"{self.prog}: {message} (see --help)\n")


class _Terminated(BaseException):
    """SIGTERM, raised in the main thread so `finally` blocks close broker and files."""


def _on_sigterm(_signum: int, _frame: object) -> None:
    raise _Terminated


def _parser() -> argparse.ArgumentParser:
    p = _Parser(prog="watchkeep-sim",
                                description="Simulate the Fernbrook plant's sensors.")
    sub = p.add_subparsers(dest="command", required=True, parser_class=_Parser)
    run = sub.add_parser("run", help="publish a scenario's messages")
    run.add_argument("--scenario", required=True, help="scenario YAML file")
    run.add_argument("--broker", help="HOST:PORT of the MQTT broker")
    run.add_argument("--no-broker", action="store_true",
                     help="only write --out, as fast as possible")
    run.add_argument("--speed", type=_speed, default=1.0,
                     help="simulated seconds per wall second, or 'max' (default 1)")
    run.add_argument("--out", help="also write the messages to this capture file (JSON lines)")
    run.add_argument("--labels", help="write ground-truth labels here (.csv for CSV, else JSON)")
    run.add_argument("--qos", type=int, choices=(0, 1), default=0)
    run.add_argument("--duration", type=float, help="override the scenario's duration_s")
    run.add_argument("--scale-timeline", action="store_true",
                     help="with --duration, scale the timeline to the new duration")
    run.add_argument("--seed", type=int, help="override the scenario's seed")
    run.add_argument("--start", type=_start,
                     help="simulated start (ISO 8601 or unix seconds); default: the "
                     "scenario's, else now")
    cfg = sub.add_parser("config", help="print the matching watchkeep assets: section")
    cfg.add_argument("--scenario", required=True, help="scenario YAML file")
    return p


def _run(args: argparse.Namespace) -> int:
    if args.no_broker and not args.out:
        raise SimulatorError("--no-broker needs --out: there would be nowhere to send data")
    if not args.no_broker and not args.broker:
        raise SimulatorError("give --broker HOST:PORT, or --no-broker with --out")
    scenario = with_overrides(load_scenario(args.scenario), duration_s=args.duration,
                              seed=args.seed, start_unix=args.start,
                              scale_timeline=args.scale_timeline)
    start = scenario.start_unix if scenario.start_unix is not None else time.time()
    if args.labels:
        write_labels(args.labels, labels(scenario, start), scenario)
    messages = simulate(scenario, start)
    if args.no_broker:
        n = write_capture(args.out, messages)
        print(f"watchkeep-sim: wrote {n} messages to {args.out}", file=sys.stderr)
        return 0
    try:
        host, port = parse_broker(args.broker)
    except ValueError as e:
        raise SimulatorError(str(e)) from None
    writer = CaptureWriter(args.out, append=False) if args.out else None
    try:
        stats = publish(messages, host=host, port=port, speed=args.speed, qos=args.qos,
                        sim_origin=start,
                        on_sent=(lambda m: writer.append(*m)) if writer else None)
    finally:
        if writer is not None:
            writer.close()
    print(f"watchkeep-sim: published {stats.sent} messages to {host}:{port} "
          f"({stats.dropped} dropped while disconnected) in {stats.wall_s:.1f} s",
          file=sys.stderr)
    return 0 if stats.dropped == 0 else 1


def _config(args: argparse.Namespace) -> int:
    scenario = load_scenario(args.scenario)
    sys.stdout.write(yaml.safe_dump({"assets": watchkeep_assets(scenario)}, sort_keys=False))
    return 0


def main(argv: Sequence[str] | None = None) -> int:
    args = _parser().parse_args(argv)
    if threading.current_thread() is threading.main_thread():
        signal.signal(signal.SIGTERM, _on_sigterm)
    try:
        return _run(args) if args.command == "run" else _config(args)
    except (SimulatorError, CaptureError) as e:
        print(f"watchkeep-sim: {e}", file=sys.stderr)
        return getattr(e, "exit_code", 1)
    except OSError as e:
        print(f"watchkeep-sim: {e.filename or ''}: {e.strerror or e}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        print("watchkeep-sim: interrupted", file=sys.stderr)
        return 130
    except _Terminated:
        print("watchkeep-sim: terminated", file=sys.stderr)
        return 143


if __name__ == "__main__":
    sys.exit(main())
