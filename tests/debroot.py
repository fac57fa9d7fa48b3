"""The Debian root the slow tests build on, made once per machine by `debootstrap`.

The package test (tests/integration/test_deb_package.py) unpacks it to install the
package into; the power-cut VM (tests/faults/image.py) adds a kernel and Python to it.
Both use one tarball, `CACHE/debootstrap-<suite>-<arch>-minbase+systemd.tar.gz`
(`$WATCHKEEP_TEST_CACHE`, default /var/cache/watchkeep-tests; delete it to start cold),
made under a lock so two runs at once build it once. Needs root and debootstrap.
"""

from __future__ import annotations

import fcntl
import os
import re
import shutil
import subprocess
import tempfile
from collections.abc import Callable
from pathlib import Path

CACHE = Path(os.environ.get("WATCHKEEP_TEST_CACHE", "/var/cache/watchkeep-tests"))
# The root is a gateway: systemd is there (the package test runs systemd-analyze inside
# the root, on the installed unit).
INCLUDE = "systemd"


def os_release() -> dict[str, str]:
    return {k: v.strip('"') for k, v in (
        ln.split("=", 1) for ln in Path("/etc/os-release").read_text().splitlines() if "=" in ln)}


def host_suite() -> str | None:
    """The host's Debian release (`bookworm`), or None when the host is not Debian."""
    info = os_release()
    return info.get("VERSION_CODENAME") if info.get("ID") == "debian" else None


def apt_mirror(suite: str) -> str:
    """$WATCHKEEP_DEBIAN_MIRROR, or the mirror the host's apt uses for `suite` (deb822
    or one-line sources)."""
    if os.environ.get("WATCHKEEP_DEBIAN_MIRROR"):
        return os.environ["WATCHKEEP_DEBIAN_MIRROR"]
    for p in sorted(Path("/etc/apt/sources.list.d").glob("*.sources")):
        for stanza in p.read_text().split("\n\n"):
            f = dict(re.findall(r"^(\w[\w-]*):\s*(.*)$", stanza, re.M))
            if "deb" in f.get("Types", "").split() and suite in f.get("Suites", "").split():
                return f["URIs"].split()[0]
    for p in [Path("/etc/apt/sources.list"), *Path("/etc/apt/sources.list.d").glob("*.list")]:
        for ln in p.read_text().splitlines() if p.exists() else []:
            m = re.match(r"deb\s+(?:\[[^]]*\]\s+)?(\S+)\s+(\S+)", ln)
            if m and m.group(2) == suite:
                return m.group(1)
    return "http://deb.debian.org/debian"


def _run(*cmd: str) -> None:
    res = subprocess.run(list(cmd), capture_output=True, text=True, timeout=1500)
    if res.returncode != 0:
        raise RuntimeError(f"{' '.join(cmd)} -> {res.returncode}\n{res.stdout[-3000:]}\n"
                           f"{res.stderr[-3000:]}")


def mounts_under(path: Path) -> list[str]:
    prefix = str(path) + "/"
    return [ln.split()[1] for ln in Path("/proc/self/mounts").read_text().splitlines()
            if ln.split()[1].startswith(prefix)]


def base_tarball(suite: str, arch: str, log: Callable[[str], object] = print) -> Path:
    """debootstrap's minbase root of `suite` (+systemd) as a tarball, made on first use."""
    tarball = CACHE / f"debootstrap-{suite}-{arch}-minbase+{INCLUDE}.tar.gz"
    if tarball.exists():
        return tarball
    CACHE.mkdir(parents=True, exist_ok=True)
    with open(CACHE / ".debootstrap.lock", "w") as lock:
        fcntl.flock(lock, fcntl.LOCK_EX)
        if tarball.exists():  # made by another run while this one waited
            return tarball
        work = Path(tempfile.mkdtemp(prefix="watchkeep-debootstrap-", dir="/var/tmp"))
        try:
            log(f"debootstrap {suite} ({arch}) into {tarball.name}")
            _run("debootstrap", "--variant=minbase", f"--include={INCLUDE}", f"--arch={arch}",
                 suite, str(work / "root"), apt_mirror(suite))
            _run("chroot", str(work / "root"), "apt-get", "clean")
            part = work / "root.tar.gz"
            _run("tar", "--numeric-owner", "-C", str(work / "root"), "-czf", str(part), ".")
            shutil.move(part, tarball.with_suffix(".part"))
            tarball.with_suffix(".part").rename(tarball)
        finally:
            left = mounts_under(work)
            if left:
                raise RuntimeError(f"still mounted, {work} kept: {left}")
            shutil.rmtree(work, ignore_errors=True)
    return tarball
