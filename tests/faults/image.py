"""The power-cut VM's boot files, built from Debian's own packages and cached.

What it makes, under `CACHE/powercut-vm-<key>/`:

* `vmlinuz`, `initrd.img`: Debian's `linux-image-amd64` kernel and the initramfs that
  `initramfs-tools` makes for it (virtio modules listed, so the root disk is found);
* `rootfs.img`: an ext4 image (made with `mkfs.ext4 -d`, no loop mount) of a
  `debootstrap --variant=minbase` root of the host's Debian release, with python3,
  iproute2, kmod, e2fsprogs, a venv `/opt/wk-venv` holding the project's runtime
  dependencies (wheels that the host's pip fetches, through its cache, for the host's
  CPython minor version, which is the root's), and `/sbin/wk-init`, a small PID 1 that
  mounts the kernel file systems and hands over to the test's own guest script on the
  per-run source disk;
* `manifest.json`: the kernel and Python versions, the key's inputs and the build time.

The key hashes the build's inputs (`BUILD_VERSION`, the package and module lists, the
PID 1 script), the project's dependency list and the release: the project's
own code is not in the image (the test puts it on a small disk of its own at each run),
so a code change does not rebuild the image. The debootstrap tarball is the package
test's (tests/debroot.py: `debootstrap-<suite>-<arch>-minbase+systemd.tar.gz`).

Needs root (chroot, mount of /proc), debootstrap and mkfs.ext4. A cold build takes a
few minutes (debootstrap when no tarball is cached, the kernel package and its
initramfs, the wheels); `python -m tests.faults.image` builds it and prints the paths.
"""

from __future__ import annotations

import fcntl
import hashlib
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
import tomllib
from dataclasses import dataclass
from pathlib import Path

from tests.debroot import CACHE, INCLUDE, base_tarball, host_suite, mounts_under

ROOT = Path(__file__).resolve().parents[2]
PACKAGES = ("linux-image-amd64", "python3", "python3-venv", "iproute2", "kmod", "e2fsprogs")
# Modules the initramfs must carry to find a virtio root disk; the rest load from the root.
INITRAMFS_MODULES = ("virtio_pci", "virtio_blk", "virtio_net", "virtio_console", "ext4")
VENV = "/opt/wk-venv"
# Raise when `build` changes what it makes (the key hashes this and the constants above,
# not the file, so a comment or a docstring edit does not cost a rebuild).
BUILD_VERSION = 1

WK_INIT = """#!/bin/sh
# PID 1 of the watchkeep power-cut VM: kernel file systems, virtio modules, then the
# test's own script from the source disk (the third disk, /dev/vdc).
PATH=/usr/sbin:/usr/bin:/sbin:/bin
export PATH
mount -t proc proc /proc
mount -t sysfs sys /sys
mount -t devtmpfs dev /dev 2>/dev/null
mount -t tmpfs -o mode=1777 tmp /tmp
mount -t tmpfs run /run
for m in virtio_blk virtio_net virtio_console ext4; do modprobe -q "$m"; done
mkdir -p /run/wk-src
if mount -t ext4 -o ro /dev/vdc /run/wk-src && [ -x /run/wk-src/faults/guest_init.sh ]; then
  /run/wk-src/faults/guest_init.sh
fi
echo "wk-init: the guest script ended; powering off" > /dev/console
echo o > /proc/sysrq-trigger
sleep 3600
"""


@dataclass(frozen=True)
class Image:
    kernel: Path
    initrd: Path
    rootfs: Path
    manifest: dict[str, object]


def sh(*cmd: str, timeout: float = 1500, **kw: object) -> subprocess.CompletedProcess[str]:
    """Run a host command; on failure the message carries its output."""
    res = subprocess.run(list(cmd), capture_output=True, text=True, timeout=timeout,  # type: ignore[call-overload]
                         **kw)
    if res.returncode != 0:
        raise RuntimeError(f"{' '.join(cmd)} -> {res.returncode}\n{res.stdout[-3000:]}\n"
                           f"{res.stderr[-3000:]}")
    return res


def host_release() -> tuple[str, str]:
    """(suite, arch) of the host's Debian."""
    suite = host_suite()
    if suite is None:
        raise RuntimeError("the VM is built from the host's Debian release; this is not Debian")
    return suite, sh("dpkg", "--print-architecture").stdout.strip()


def dependencies() -> list[str]:
    """The project's runtime requirements, from pyproject.toml."""
    doc = tomllib.loads((ROOT / "pyproject.toml").read_text())
    return list(doc["project"]["dependencies"])


def image_key(suite: str, arch: str) -> str:
    h = hashlib.sha256()
    h.update(json.dumps([BUILD_VERSION, INCLUDE, PACKAGES, INITRAMFS_MODULES, WK_INIT, VENV,
                         suite, arch, dependencies(), sys.version_info[:2]]).encode())
    return h.hexdigest()[:16]


def cached_image(*, log: object = print) -> Image:
    """The image for this checkout's inputs, built (under a lock) if not cached."""
    suite, arch = host_release()
    d = CACHE / f"powercut-vm-{suite}-{arch}-{image_key(suite, arch)}"
    CACHE.mkdir(parents=True, exist_ok=True)
    with open(CACHE / ".powercut-vm.lock", "w") as lock:
        fcntl.flock(lock, fcntl.LOCK_EX)
        if not (d / "manifest.json").exists():
            build(d, suite, arch, log)
            prune(d)
    return Image(d / "vmlinuz", d / "initrd.img", d / "rootfs.img",
                 json.loads((d / "manifest.json").read_text()))


def prune(keep: Path, min_age_s: float = 86400.0) -> None:
    """Remove images of other keys unused for a day (a run may still be using a newer one)."""
    for old in CACHE.glob("powercut-vm-*"):
        if old == keep or not old.is_dir():
            continue
        used = old / "rootfs.img" if (old / "rootfs.img").exists() else old
        if time.time() - max(used.stat().st_atime, used.stat().st_mtime) > min_age_s:
            shutil.rmtree(old, ignore_errors=True)


def build(dest: Path, suite: str, arch: str, log: object) -> None:
    """Build the kernel, initrd and root image into `dest` (replaced whole)."""
    for tool in ("debootstrap", "chroot", "mount", "mkfs.ext4"):
        if shutil.which(tool) is None:
            raise RuntimeError(f"{tool} is missing (apt-get install debootstrap e2fsprogs)")
    if os.geteuid() != 0:
        raise RuntimeError("building the VM image needs root (chroot, mount)")
    t0 = time.monotonic()
    tarball = base_tarball(suite, arch, lambda m: log(f"image: {m}"))  # type: ignore[operator]
    work = Path(tempfile.mkdtemp(prefix="watchkeep-vm-", dir="/var/tmp"))
    root = work / "root"
    root.mkdir()
    mounted: list[Path] = []
    env = {"PATH": "/usr/sbin:/usr/bin:/sbin:/bin", "DEBIAN_FRONTEND": "noninteractive",
           "LC_ALL": "C.UTF-8", "HOME": "/root"}

    def chroot(cmd: str) -> None:
        sh("chroot", str(root), "/bin/sh", "-c", cmd, env=env)

    try:
        sh("tar", "--numeric-owner", "-C", str(root), "-xzf", str(tarball))
        for target, args in (("proc", ["-t", "proc", "proc"]), ("dev", ["--bind", "/dev"])):
            sh("mount", *args, str(root / target))
            mounted.append(root / target)
        sh("mount", "-o", "remount,bind,ro", str(root / "dev"))
        shutil.copyfile("/etc/resolv.conf", root / "etc/resolv.conf")
        (root / "etc/initramfs-tools/modules").parent.mkdir(parents=True, exist_ok=True)
        with open(root / "etc/initramfs-tools/modules", "a") as f:
            f.write("\n".join(INITRAMFS_MODULES) + "\n")
        log(f"image: apt-get install {' '.join(PACKAGES)}")  # type: ignore[operator]
        chroot("apt-get update -qq")
        chroot(f"apt-get install -y -q --no-install-recommends {' '.join(PACKAGES)}")
        # The wheels come from the host's pip (and its cache), for the same CPython minor.
        wheels = root / "tmp/wheels"
        log("image: pip download of the runtime dependencies")  # type: ignore[operator]
        sh(sys.executable, "-m", "pip", "download", "--quiet", "--only-binary=:all:",
           "-d", str(wheels), *dependencies())
        chroot(f"python3 -m venv {VENV} && {VENV}/bin/pip install --quiet --no-index "
               f"--find-links /tmp/wheels {' '.join(repr(d) for d in dependencies())}")
        shutil.rmtree(wheels)
        (root / "sbin/wk-init").write_text(WK_INIT)
        (root / "sbin/wk-init").chmod(0o755)
        for p in ("var/lib/watchkeep", "run/wk-src"):
            (root / p).mkdir(parents=True, exist_ok=True)
        chroot("apt-get clean")
        kernel = sorted((root / "boot").glob("vmlinuz-*"))[-1]
        initrd = sorted((root / "boot").glob("initrd.img-*"))[-1]
        py = sh("chroot", str(root), "python3", "--version", env=env).stdout.strip()
        versions = sh("chroot", str(root), f"{VENV}/bin/pip", "freeze", env=env).stdout.split()
    finally:
        for m in reversed(mounted):
            subprocess.run(["umount", str(m)], check=False)
    left = mounts_under(work)
    if left:
        raise RuntimeError(f"still mounted, {work} kept: {left}")
    try:
        for junk in ("usr/share/doc", "usr/share/man", "usr/share/locale", "var/lib/apt/lists",
                     "var/cache/apt"):
            shutil.rmtree(root / junk, ignore_errors=True)
        part = Path(tempfile.mkdtemp(prefix=dest.name + ".", dir=dest.parent))
        shutil.copyfile(kernel, part / "vmlinuz")
        shutil.copyfile(initrd, part / "initrd.img")
        used = int(sh("du", "-sxm", str(root)).stdout.split()[0])
        size_mb = int(used * 1.3) + 256
        sh("mkfs.ext4", "-q", "-F", "-L", "wkroot", "-d", str(root), str(part / "rootfs.img"),
           f"{size_mb}M")
        manifest = {"suite": suite, "arch": arch, "kernel": kernel.name, "python": py,
                    "packages": list(PACKAGES), "venv": versions, "rootfs_mb": size_mb,
                    "build_s": round(time.monotonic() - t0, 1),
                    "built": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())}
        (part / "manifest.json").write_text(json.dumps(manifest, indent=1))
        if dest.exists():
            shutil.rmtree(dest)
        part.rename(dest)
        log(f"image: built {dest} in {manifest['build_s']} s")  # type: ignore[operator]
    finally:
        shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    img = cached_image()
    print(json.dumps({"kernel": str(img.kernel), "initrd": str(img.initrd),
                      "rootfs": str(img.rootfs), **img.manifest}, indent=1))
