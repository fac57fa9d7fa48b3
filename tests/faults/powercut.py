"""Power cuts under a running daemon: a KVM guest built from Debian's packages is killed
(SIGKILL of QEMU) at random moments while events are being committed, rebooted from
the same disks, and checked after every cut.

Layout (see tests/faults/image.py for the cached boot files):

* disks: `vda` the cached root image (read-only), `vdb` the state disk (ext4, the
  daemon's state directory with the outbox, made fresh per run and kept across the
  cuts), `vdc` the source disk (this checkout's `agent/`, the guest scripts and the
  daemon's config; rebuilt per run, so the image never holds project code);
* the state disk is opened with `cache=none,aio=native`: O_DIRECT on the host, so no
  host page cache holds the guest's writes, and the guest sees a disk with a volatile
  write cache (WCE=1), so SQLite's fsync has to travel the guest's whole flush path
  (ext4 journal commit, then a FLUSH that QEMU turns into fdatasync) as on an eMMC.
  `cache=directsync` would report a write-through disk and the guest would send no
  flushes at all; `writeback`/`unsafe` would leave writes in a cache the guest does not
  control. What a SIGKILL of QEMU loses is exactly what a power cut loses on the
  guest's side: its RAM (page cache, SQLite's and the daemon's memory) and the I/O it
  had not yet handed to the disk. What it cannot show is a disk that loses writes it
  had acknowledged but not yet flushed (the host's file keeps every completed write).
* network: QEMU user-mode networking; the guest reaches the host's loopback as
  10.0.2.2, where this runner starts the two Mosquitto brokers (local and upstream) on
  free loopback ports; the daemon's /metrics is forwarded to a loopback port here.
* the journal: a virtio-serial port written by tests/faults/guest_harness.py after each
  commit returned, into a host file per boot.

Per cut: boot, wait until every event committed before the previous cut is delivered
(by CloudEvent `id`) and the outbox's `quick_check` (run in the guest before the
daemon opens it) is ok, pause the upstream broker (SIGSTOP) in half the cycles so a
backlog builds, wait a random 0.3-6 s, SIGKILL QEMU. Run `python -m tests.faults.powercut
--cuts 50` (`make powercut`), or a few cuts through tests/faults/test_powercut.py.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import random
import shutil
import signal
import subprocess
import sys
import tempfile
import threading
import time
import urllib.request
from collections import Counter, defaultdict
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import yaml

from tests.brokers import Broker, free_port
from tests.faults.image import ROOT, Image, cached_image, sh
from tests.helpers import Collector, publisher

QEMU = "qemu-system-x86_64"
N_ASSETS = 6
CHANNELS = ("flow", "pressure", "temp", "vib")
RATE_HZ = 10.0
# A channel reads out of range for one window in four: sensor.fault on the first bad
# window, sensor.recovered after agent/core/health.py's RECOVER_WINDOWS clean ones.
BAD_EVERY = 4
SITE, GATEWAY = "fernbrook", "powercut-vm"


class Unavailable(RuntimeError):
    """The machine cannot run the VM (no QEMU, not root; or `accel="kvm"` where KVM
    cannot run the guest): skip, or fail in CI."""


def vm_problem() -> str | None:
    """Why the VM cannot run here at all (no QEMU, not root), or None."""
    if shutil.which(QEMU) is None:
        return f"{QEMU} is missing (apt-get install qemu-system-x86)"
    if os.geteuid() != 0:
        return "the VM image is built with debootstrap and chroot, which need root"
    return None


def kvm_refused() -> str | None:
    """Why /dev/kvm cannot be opened here, or None."""
    try:
        fd = os.open("/dev/kvm", os.O_RDWR)
    except OSError as exc:
        return f"KVM is refused (/dev/kvm: {exc.strerror})"
    os.close(fd)
    return None


def kvm_runs_guest(image: Image, timeout_s: float = 20.0) -> str | None:
    """None if a KVM guest boots the image's kernel here, else why not. /dev/kvm can be
    there and still not run an unmodified guest: on a host whose KVM is `kvm_pvm` (a
    paravirtual KVM for nested use) the guest's firmware never gets past its first
    steps; so the kernel's first console line is what decides."""
    with tempfile.TemporaryDirectory() as d:
        log = Path(d) / "console.log"
        proc = subprocess.Popen(
            [QEMU, "-accel", "kvm", "-cpu", "host", "-m", "256", "-nodefaults",
             "-no-user-config", "-display", "none", "-no-reboot", "-kernel", str(image.kernel),
             "-append", "console=ttyS0 panic=-1", "-serial", f"file:{log}"],
            stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
        try:
            deadline = time.monotonic() + timeout_s
            while time.monotonic() < deadline and proc.poll() is None:
                if log.exists() and "Linux version" in log.read_text(errors="replace"):
                    return None
                time.sleep(0.2)
        finally:
            if proc.poll() is None:
                proc.kill()
            proc.wait(10)
            err = proc.stderr.read().decode(errors="replace") if proc.stderr else ""
    mods = {m for m in ("kvm_intel", "kvm_amd", "kvm_pvm") if Path(f"/sys/module/{m}").exists()}
    why = err.strip().splitlines()[-1] if err.strip() else \
        f"no kernel console output in {timeout_s:.0f} s"
    return f"KVM cannot run the guest ({why}; host KVM modules: {', '.join(sorted(mods)) or '?'})"


def asset_names(n: int) -> list[str]:
    return [f"PU-{i + 1:02d}" for i in range(n)]


def window_length(i: int) -> float:
    """Asset i's window length: all different, so the assets' windows close at different
    ticks and commits are spread out instead of one per second."""
    return round(0.5 + 0.07 * i, 2)


def guest_config(n_assets: int, local_port: int, upstream_port: int, sync: str) -> dict[str, Any]:
    assets = []
    for i, name in enumerate(asset_names(n_assets)):
        length = window_length(i)
        assets.append({
            "name": name,
            "window": {"length_s": length, "lateness_s": 1.0, "timeout_s": 3.0,
                       "min_coverage": 0.5},
            "channels": {c: {"topic": f"plant/{name}/{c}", "decoder": "json",
                             "rate_hz": RATE_HZ, "features": ["mean", "max"],
                             "min": 0.0, "max": 100.0} for c in CHANNELS},
        })
    return {"site": SITE, "gateway": GATEWAY, "state_dir": "/var/lib/watchkeep",
            "local_broker": {"host": "10.0.2.2", "port": local_port},
            "upstream_broker": {"host": "10.0.2.2", "port": upstream_port, "keepalive_s": 15},
            "http": {"host": "0.0.0.0", "port": 9310}, "pipeline": {"tick_s": 0.05},
            "outbox": {"synchronous": sync}, "assets": assets}


class Plant(threading.Thread):
    """Publishes every channel's readings in real time to the local broker."""

    def __init__(self, port: int, n_assets: int) -> None:
        super().__init__(daemon=True)
        self.client = publisher(port, "powercut-plant")
        self.n = n_assets
        self.stop_ev = threading.Event()
        self.sent = 0

    def run(self) -> None:
        rng = random.Random(7)
        names = asset_names(self.n)
        t = float(math.ceil(time.time()))
        while not self.stop_ev.is_set():
            for i, name in enumerate(names):
                w = int(t // window_length(i))
                for ci, ch in enumerate(CHANNELS):
                    bad = (w + ci + i) % BAD_EVERY == 0
                    v = 150.0 if bad else 50.0 + rng.uniform(-5, 5)
                    self.client.publish(f"plant/{name}/{ch}",
                                        json.dumps({"ts": round(t, 3), "value": v}), qos=0)
                    self.sent += 1
            t += 1 / RATE_HZ
            delay = t - time.time()
            if delay > 0:
                self.stop_ev.wait(delay)

    def stop(self) -> None:
        self.stop_ev.set()
        self.join(5)
        self.client.loop_stop()
        self.client.disconnect()


@dataclass
class Journal:
    """What the guest reported, all boots."""

    commits: dict[int, list[tuple[str, str, int]]] = field(
        default_factory=lambda: defaultdict(list))
    stored: dict[int, dict[str, int]] = field(default_factory=lambda: defaultdict(dict))
    boot_info: dict[int, dict[str, str]] = field(default_factory=dict)
    exits: dict[int, str] = field(default_factory=dict)

    def read(self, boot: int, path: Path) -> None:
        """(Re)read one boot's journal file; complete lines only."""
        if not path.exists():
            return
        text = path.read_text(errors="replace")
        lines = text.split("\n")[:-1]  # the last piece is a partial line or ""
        commits: list[tuple[str, str, int]] = []
        stored: dict[str, int] = {}
        for ln in lines:
            f = ln.split()
            if not f:
                continue
            if f[0] == "C" and len(f) >= 5:
                commits.append((f[2], f[3], int(f[4])))
            elif f[0] == "S" and len(f) == 4:
                stored[f[2]] = int(f[3])
            elif f[0] == "B":
                self.boot_info[boot] = dict(kv.split("=", 1) for kv in f[2:] if "=" in kv)
            elif f[0] == "X":
                self.exits[boot] = " ".join(f[2:])
        self.commits[boot] = commits
        self.stored[boot] = stored


class VM:
    """One QEMU process booting the image with the run's disks."""

    def __init__(self, image: Image, work: Path, metrics_port: int, accel: str = "kvm") -> None:
        self.image = image
        self.accel = accel
        self.work = work
        self.metrics_port = metrics_port
        self.proc: subprocess.Popen[bytes] | None = None

    def journal_path(self, boot: int) -> Path:
        return self.work / f"journal-{boot:03d}.log"

    def start(self, boot: int) -> None:
        append = ("root=/dev/vda ro rootfstype=ext4 fastboot console=ttyS0 panic=-1 quiet "
                  f"init=/sbin/wk-init wk.boot={boot}")
        cpu = ["-accel", "kvm", "-cpu", "host"] if self.accel == "kvm" else \
            ["-accel", "tcg", "-cpu", "max"]
        cmd = [QEMU, *cpu, "-m", "1024", "-smp", "1",
               "-nodefaults", "-no-user-config", "-display", "none", "-no-reboot",
               "-kernel", str(self.image.kernel), "-initrd", str(self.image.initrd),
               "-append", append,
               "-serial", f"file:{self.work / f'console-{boot:03d}.log'}",
               "-drive", f"file={self.image.rootfs},if=virtio,format=raw,readonly=on",
               "-drive", f"file={self.work / 'state.img'},if=virtio,format=raw,"
                         "cache=none,aio=native",
               "-drive", f"file={self.work / 'src.img'},if=virtio,format=raw,readonly=on",
               "-netdev", f"user,id=n0,hostfwd=tcp:127.0.0.1:{self.metrics_port}-:9310",
               "-device", "virtio-net-pci,netdev=n0",
               "-device", "virtio-serial-pci",
               "-chardev", f"file,id=wkj,path={self.journal_path(boot)}",
               "-device", "virtserialport,chardev=wkj,name=wk.journal"]
        with open(self.work / f"qemu-{boot:03d}.err", "wb") as err:
            self.proc = subprocess.Popen(cmd, stdin=subprocess.DEVNULL,
                                         stdout=subprocess.DEVNULL, stderr=err)

    def cut(self) -> None:
        """The power cut: SIGKILL, no chance to flush anything."""
        if self.proc is not None:
            if self.proc.poll() is None:
                self.proc.send_signal(signal.SIGKILL)
            self.proc.wait(30)
            self.proc = None

    def alive(self) -> bool:
        return self.proc is not None and self.proc.poll() is None


def make_disks(work: Path, cfg: dict[str, Any]) -> None:
    """A fresh, empty state disk and the source disk of this checkout."""
    sh("mkfs.ext4", "-q", "-F", "-L", "wkstate", str(work / "state.img"), "256M")
    src = work / "src"
    shutil.copytree(ROOT / "agent", src / "agent",
                    ignore=shutil.ignore_patterns("__pycache__", "*.pyc"))
    (src / "faults").mkdir()
    for name in ("guest_init.sh", "guest_harness.py"):
        shutil.copy2(Path(__file__).with_name(name), src / "faults" / name)
    (src / "faults" / "guest_init.sh").chmod(0o755)
    (src / "watchkeep.yaml").write_text(yaml.safe_dump(cfg, sort_keys=False))
    sh("mkfs.ext4", "-q", "-F", "-L", "wksrc", "-d", str(src), str(work / "src.img"), "64M")


def wait(pred: Any, timeout_s: float, vm: VM | None = None, what: str = "") -> bool:
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        if pred():
            return True
        if vm is not None and not vm.alive():
            raise RuntimeError(f"the VM stopped while waiting for {what}")
        time.sleep(0.05)
    return bool(pred())


def scrape(port: int) -> dict[str, float]:
    """The daemon's outbox and drop counters from its /metrics (forwarded port)."""
    text = urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=5).read().decode()
    out: dict[str, float] = {}
    for ln in text.splitlines():
        if ln.startswith(("watchkeep_outbox", "watchkeep_events")) and " " in ln:
            k, v = ln.rsplit(" ", 1)
            out[k] = float(v)
    return out


def run(cuts: int, sync: str = "FULL", *, seed: int | None = None, n_assets: int = N_ASSETS,
        work: Path | None = None, log: Any = print, boot_timeout_s: float = 480.0,
        accel: str = "auto", max_minutes: float | None = None,
        drain_timeout_s: float = 120.0) -> dict[str, Any]:
    """`cuts` power cuts; returns the figures (see `summarize`). Raises Unavailable."""
    problem = vm_problem()
    if problem:
        raise Unavailable(problem)
    seed = random.randrange(1 << 30) if seed is None else seed
    rng = random.Random(seed)
    t_build = time.monotonic()
    image = cached_image(log=log)
    build_s = time.monotonic() - t_build
    accel_note = ""
    if accel in ("auto", "kvm"):
        why = kvm_refused() or kvm_runs_guest(image)
        if why is None:
            accel = "kvm"
        elif accel == "kvm":
            raise Unavailable(why)
        else:  # the same cuts under software emulation: slower, the same disk semantics
            accel, accel_note = "tcg", why
            log(f"powercut: {why}: running under QEMU's software emulation (TCG) instead")
    own_work = work is None
    work = Path(tempfile.mkdtemp(prefix="watchkeep-powercut-", dir="/var/tmp")) if work is None \
        else work
    local = Broker(work / "local").start()
    upstream = Broker(work / "upstream").start()
    collector = Collector(upstream.port, "#", "powercut-collector")
    plant = Plant(local.port, n_assets)
    vm = VM(image, work, free_port(), accel)
    journal = Journal()
    cycles: list[dict[str, Any]] = []
    delivered: Counter[str] = Counter()
    seen = 0
    seq_of: dict[tuple[str, int], set[str]] = defaultdict(set)

    def collect() -> None:
        nonlocal seen
        with collector.lock:
            new = collector.messages[seen:]
            seen += len(new)
        for topic, payload, _ in new:
            if not topic.endswith("/events"):
                continue
            ev = json.loads(payload)
            delivered[ev["id"]] += 1
            d = ev.get("data") or {}
            if d.get("sequence") is not None:
                seq_of[(str(d.get("asset")), int(d["sequence"]))].add(ev["id"])

    try:
        make_disks(work, guest_config(n_assets, local.port, upstream.port, sync))
        plant.start()
        how = "cached" if build_s < 5 else f"built in {build_s:.0f} s"
        log(f"powercut: {cuts} cuts, synchronous {sync}, seed {seed}, image "
            f"{image.manifest['kernel']} ({how}), work {work}")
        t_start = time.monotonic()
        for boot in range(cuts + 1):
            t0 = time.monotonic()
            vm.start(boot)
            jp = vm.journal_path(boot)

            def booted(b: int = boot, p: Path = jp) -> bool:
                journal.read(b, p)
                return b in journal.boot_info

            if not wait(booted, boot_timeout_s, vm, "the guest's start line"):
                raise RuntimeError(f"boot {boot}: no start line in {boot_timeout_s:.0f} s; "
                                   f"console: {tail(work / f'console-{boot:03d}.log')}")
            info = journal.boot_info[boot]
            booted_s = time.monotonic() - t0

            def committing(b: int = boot, p: Path = jp) -> bool:
                journal.read(b, p)
                return bool(journal.commits[b])

            if not wait(committing, boot_timeout_s, vm, "the first commit"):
                raise RuntimeError(f"boot {boot}: no commit in {boot_timeout_s:.0f} s")
            started_s = time.monotonic() - t0
            # Everything committed before the earlier cuts must come through now.
            before = {i for b in range(boot) for i, _, _ in journal.commits[b]}

            def drained(before: set[str] = before) -> bool:
                collect()
                return all(delivered[i] for i in before)

            wait(drained, drain_timeout_s, vm, "delivery")
            drain_s = time.monotonic() - t0 - started_s
            cyc: dict[str, Any] = {
                "boot": boot, "fsck_rc": info.get("fsck"), "quick_check": info.get("quick_check"),
                "corrupt_files": [f for f in info.get("files", "").split(",") if "corrupt" in f],
                "boot_s": round(booted_s, 1), "first_commit_s": round(started_s, 1),
                "drain_s": round(drain_s, 1),
                "missing": sorted(i for i in before if not delivered[i]),
                "seq_back": seq_back(journal, boot)}
            if max_minutes is not None and boot < cuts and \
                    time.monotonic() - t_start > 60 * max_minutes:
                log(f"powercut: time budget of {max_minutes:g} min used: {boot} cuts of {cuts}")
                cuts = boot
            if boot == cuts:  # the last boot only checks the last cut
                with_metrics = wait(lambda: _try(scrape, vm.metrics_port), 30, vm, "/metrics")
                cyc["metrics"] = _try(scrape, vm.metrics_port) if with_metrics else {}
                cycles.append(cyc)
                break
            paused = rng.random() < 0.5
            if paused:
                assert upstream.proc is not None
                upstream.proc.send_signal(signal.SIGSTOP)
            delay = rng.uniform(0.3, 6.0)
            time.sleep(max(0.0, delay - 1.0))
            journal.read(boot, jp)
            n_before = len(journal.commits[boot])
            time.sleep(min(1.0, delay))
            vm.cut()
            if paused:
                assert upstream.proc is not None
                upstream.proc.send_signal(signal.SIGCONT)
            journal.read(boot, jp)
            cyc.update({"upstream_paused": paused, "cut_after_s": round(delay, 2),
                        # events committed in the last second before the cut
                        "committed_last_s": len(journal.commits[boot]) - n_before,
                        "committed": len(journal.commits[boot])})
            cycles.append(cyc)
            log(f"cut {boot + 1}/{cuts}: boot {booted_s:.1f} s, commits {cyc['committed']}, "
                f"cut {delay:.1f} s in (upstream {'paused' if paused else 'up'}), "
                f"quick_check {cyc['quick_check']}, missing from before "
                f"{len(cyc['missing'])}, sequences back {len(cyc['seq_back'])}")
        vm.cut()
        collect()
        res = summarize(cuts, sync, seed, journal, delivered, seq_of, cycles, image, build_s)
        res.update(accel=accel, accel_note=accel_note)
        return res
    finally:
        vm.cut()
        plant.stop()
        collector.close()
        upstream.stop()
        local.stop()
        if own_work and os.environ.get("WATCHKEEP_KEEP_POWERCUT") != "1":
            shutil.rmtree(work, ignore_errors=True)


def _try(fn: Any, *a: Any) -> Any:
    try:
        return fn(*a)
    except OSError:
        return None


def tail(p: Path, n: int = 1500) -> str:
    return p.read_text(errors="replace")[-n:] if p.exists() else "(none)"


def seq_back(journal: Journal, boot: int) -> list[str]:
    """Assets whose sequence went back: the stored one below one committed before, or a
    commit of this boot not above every earlier commit of the asset."""
    out = []
    earlier: dict[str, int] = {}
    for b in range(boot):
        for _, asset, seq in journal.commits[b]:
            earlier[asset] = max(earlier.get(asset, 0), seq)
    for asset, top in sorted(earlier.items()):
        stored = journal.stored[boot].get(asset, 0)
        if stored < top:
            out.append(f"{asset}: stored {stored} < committed {top}")
    last: dict[str, int] = dict(earlier)
    for _, asset, seq in journal.commits[boot]:
        if seq <= last.get(asset, 0):
            out.append(f"{asset}: {seq} after {last[asset]}")
        last[asset] = seq
    return out


def summarize(cuts: int, sync: str, seed: int, journal: Journal, delivered: Counter[str],
              seq_of: dict[tuple[str, int], set[str]], cycles: list[dict[str, Any]],
              image: Image, build_s: float) -> dict[str, Any]:
    committed = {i for b in range(cuts) for i, _, _ in journal.commits[b]}
    lost = sorted(i for i in committed if not delivered[i])
    dup_ids = [i for i, n in delivered.items() if n > 1]
    reused = [f"{a}#{s}" for (a, s), ids in seq_of.items() if len(ids) > 1]
    last_s = sorted(c["committed_last_s"] for c in cycles if "committed_last_s" in c)
    return {
        "synchronous": sync, "seed": seed, "cuts": cuts,
        "committed_before_cuts": len(committed),
        "delivered": len(committed) - len(lost), "lost": len(lost), "lost_ids": lost[:20],
        "duplicates": len(dup_ids), "extra_deliveries": sum(delivered[i] - 1 for i in dup_ids),
        "delivered_total_ids": len(delivered),
        "quick_check_failed": sum(1 for c in cycles[1:] if c["quick_check"] != "ok"),
        "corrupt_files": sum(len(c["corrupt_files"]) for c in cycles),
        "fsck_rc": dict(Counter(str(c["fsck_rc"]) for c in cycles[1:])),
        "sequences_back": sum(len(c["seq_back"]) for c in cycles),
        "sequence_numbers_reused": len(reused),
        "upstream_paused_cuts": sum(1 for c in cycles if c.get("upstream_paused")),
        "cuts_within_1s_of_a_commit": sum(1 for n in last_s if n > 0),
        "median_committed_last_s": last_s[len(last_s) // 2] if last_s else None,
        "median_boot_s": sorted(c["boot_s"] for c in cycles)[len(cycles) // 2],
        "image": {k: image.manifest.get(k) for k in ("kernel", "python", "build_s")},
        "image_build_or_lookup_s": round(build_s, 1),
        "final_metrics": cycles[-1].get("metrics") if cycles else None,
        "cycles": cycles,
    }


def _terminate(signum: int, frame: object) -> None:
    raise SystemExit(128 + signum)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="python -m tests.faults.powercut",
                                 description="Power cuts of a KVM guest running the daemon.")
    ap.add_argument("--cuts", type=int, default=50)
    ap.add_argument("--synchronous", choices=("FULL", "NORMAL"), default="FULL")
    ap.add_argument("--seed", type=int)
    ap.add_argument("--max-minutes", type=float,
                    help="stop cutting after this long (the figures say how many were done)")
    ap.add_argument("--accel", choices=("auto", "kvm", "tcg"), default="auto",
                    help="auto: KVM if it can run the guest here, else TCG (software)")
    ap.add_argument("--out", type=Path, default=ROOT / "bench-results")
    args = ap.parse_args(argv)
    t0 = time.monotonic()
    # SIGTERM (a timeout, a CI stop) unwinds like Ctrl-C, so `finally` stops what we started.
    signal.signal(signal.SIGTERM, _terminate)
    try:
        res = run(args.cuts, args.synchronous, seed=args.seed, accel=args.accel,
                  max_minutes=args.max_minutes)
    except Unavailable as exc:
        print(f"powercut: SKIPPED: {exc}", file=sys.stderr)
        return 0 if os.environ.get("WATCHKEEP_CI") != "1" else 1
    res["wall_s"] = round(time.monotonic() - t0, 1)
    args.out.mkdir(parents=True, exist_ok=True)
    out = args.out / f"powercut-{args.synchronous.lower()}.json"
    out.write_text(json.dumps(res, indent=1))
    keys = ("cuts", "committed_before_cuts", "delivered", "lost", "duplicates",
            "extra_deliveries", "quick_check_failed", "corrupt_files", "sequences_back",
            "sequence_numbers_reused", "upstream_paused_cuts", "cuts_within_1s_of_a_commit",
            "median_boot_s", "wall_s", "accel")
    print(f"powercut ({args.synchronous}): " + ", ".join(f"{k} {res[k]}" for k in keys))
    if res["accel"] != "kvm":
        print(f"powercut: KVM NOT USED: {res['accel_note']}; the cuts ran under QEMU's "
              "software emulation (TCG)")
    print(f"powercut: results in {out}")
    bad = res["quick_check_failed"] or res["corrupt_files"] or res["cuts"] < args.cuts
    if args.synchronous == "FULL":
        bad = bad or res["lost"] or res["sequences_back"] or res["sequence_numbers_reused"]
    return 1 if bad else 0


if __name__ == "__main__":
    sys.exit(main())
