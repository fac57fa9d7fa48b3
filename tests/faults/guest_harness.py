"""Inside the power-cut VM: check the outbox as the cut left it, then run the daemon and
report every event whose commit has returned, on the journal port, before going on.

The report is made after `Outbox.submit` returned with its transaction committed
(`last_write_ok`), so a line the host holds names an event that was committed; an
event committed in the last instant before a cut may be missing from the journal (the
check then does not ask for it), never the other way round. The write goes to a
virtio-serial port: the guest's driver returns from write() only once QEMU has taken
the buffer (Linux drivers/char/virtio_console.c, __send_to_port waits for the host to
use it), and QEMU writes it straight into the host's journal file, which survives the
SIGKILL of QEMU (the host's page cache is not lost: only the guest's is).

Lines (space-separated; one `write` per committed transaction):
  B <boot> fsck=<rc> quick_check=<result> files=<state dir listing>   at start
  S <boot> <asset> <seq>     the sequences stored in the outbox, at start
  C <boot> <id> <asset> <seq> <type>   an event committed by this boot
  X <boot> <what>            the harness or the daemon stopped
"""

from __future__ import annotations

import argparse
import os
import sqlite3
import sys
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

import orjson
import yaml


def boot_number() -> str:
    for tok in Path("/proc/cmdline").read_text().split():
        if tok.startswith("wk.boot="):
            return tok.split("=", 1)[1]
    return "?"


class Journal:
    def __init__(self, path: str) -> None:
        self.fd = os.open(path, os.O_WRONLY)

    def write(self, text: str) -> None:
        data = text.encode()
        while data:  # the console driver takes at most 32 KiB per write
            n = os.write(self.fd, data)
            data = data[n:]


def check_outbox(path: Path) -> tuple[str, dict[str, int]]:
    """(quick_check result, stored sequences) of the outbox as the cut left it."""
    if not path.exists():
        return "absent", {}
    db = sqlite3.connect(path, isolation_level=None)
    try:
        res = [str(r[0]) for r in db.execute("PRAGMA quick_check").fetchall()]
        try:
            seqs = {str(a): int(s) for a, s in db.execute("SELECT asset, seq FROM sequences")}
        except sqlite3.Error:
            seqs = {}
    finally:
        db.close()
    return ("ok" if res == ["ok"] else "|".join(res[:3]).replace(" ", "_")), seqs


def main(argv: Sequence[str] | None = None) -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--journal", required=True)
    ap.add_argument("--config", required=True)
    ap.add_argument("--fsck-rc", default="?")
    args = ap.parse_args(argv)
    boot = boot_number()
    journal = Journal(args.journal)
    cfg = yaml.safe_load(Path(args.config).read_text())
    state = Path(cfg["state_dir"])
    qc, seqs = check_outbox(state / "outbox.sqlite")
    files = ",".join(sorted(p.name for p in state.iterdir() if p.name != "lost+found"))
    journal.write(f"B {boot} fsck={args.fsck_rc} quick_check={qc} files={files or '-'}\n"
                  + "".join(f"S {boot} {a} {s}\n" for a, s in sorted(seqs.items())))

    from agent.cli import main as cli
    from agent.delivery.outbox import Outbox
    from agent.pipeline.messages import Kind

    reported = (Kind.EVENT, Kind.ANOMALY)
    submit = Outbox.submit

    def reporting_submit(self: Outbox, msgs: Sequence[Any],
                         sequences: Mapping[str, int] | None = None) -> None:
        # What this call commits: rows kept from a failed write first, then these.
        batch = [m for m, _ in self._pending] + list(msgs)
        submit(self, msgs, sequences)
        if not self.last_write_ok:
            return
        lines = []
        for m in batch:
            if m.kind in reported:
                ev = orjson.loads(m.payload)
                d = ev.get("data") or {}
                lines.append(f"C {boot} {ev['id']} {d.get('asset')} {d.get('sequence')} "
                             f"{ev['type'].rsplit('.', 2)[-2]}.{ev['type'].rsplit('.', 1)[-1]}\n")
        if lines:
            journal.write("".join(lines))

    Outbox.submit = reporting_submit  # type: ignore[method-assign]
    try:
        rc = cli.main(["run", "--config", args.config, "--log-level", "WARNING"])
    except BaseException as exc:  # report, then let the VM power off
        journal.write(f"X {boot} {type(exc).__name__}\n")
        raise
    journal.write(f"X {boot} exit={rc}\n")
    return rc


if __name__ == "__main__":
    sys.exit(main())
