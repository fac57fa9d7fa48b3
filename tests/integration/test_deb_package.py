"""The Debian package in a fresh Debian root: installs with apt, runs, its unit verifies
clean, an upgrade keeps the configuration, and a purge leaves nothing behind.

One root for the whole module, made with debootstrap (cached as a tarball under
/var/cache/watchkeep-tests/, keyed by suite and architecture, by tests/debroot.py, which
the power-cut VM's image shares) and used through chroot
with /proc and a read-only bind of /dev mounted; the tests run in file order on it.
Needs root, debootstrap and dpkg-dev (.ci/test-deps); skipped otherwise, and failed
instead when WATCHKEEP_CI=1 (set by .ci/run; tests/conftest.py fails any skip then too).
"""

from __future__ import annotations

import os
import re
import shutil
import subprocess
import sys
import tempfile
import time
from collections.abc import Iterator
from pathlib import Path

import pytest

from tests.debroot import CACHE, apt_mirror, base_tarball, host_suite, mounts_under

pytestmark = [pytest.mark.slow, pytest.mark.timeout(1800)]

ROOT = Path(__file__).resolve().parents[2]
BUILD = ROOT / "packaging" / "debian" / "build-deb"
CONF = "etc/watchkeep/watchkeep.yaml"
UNIT = "lib/systemd/system/watchkeep.service"


def unavailable(reason: str) -> None:
    """Skip, or fail under CI (WATCHKEEP_CI=1), where nothing may be skipped."""
    if os.environ.get("WATCHKEEP_CI") == "1":
        pytest.fail(f"{reason} (WATCHKEEP_CI=1: the package test must run in CI)")
    pytest.skip(reason)


def host_release() -> tuple[str, str]:
    """(suite, mirror): the host's Debian release, as the package is built for it."""
    suite = host_suite()
    if suite is None:
        unavailable("the package is built for the host's Debian release; this is not Debian")
    assert suite is not None
    return suite, apt_mirror(suite)


def sh(*cmd: str, timeout: float = 900, **kw: object) -> subprocess.CompletedProcess[str]:
    """Run a host command; on failure the message carries its output."""
    res = subprocess.run(list(cmd), capture_output=True, text=True, timeout=timeout, **kw)  # type: ignore[call-overload]
    assert res.returncode == 0, f"{' '.join(cmd)} -> {res.returncode}\n{res.stdout}\n{res.stderr}"
    return res


class Root:
    """A Debian root used through chroot."""

    def __init__(self, path: Path) -> None:
        self.path = path
        self.before: set[str] = set()  # its files before the package was installed

    def run(self, cmd: str, check: bool = True, timeout: float = 900
            ) -> subprocess.CompletedProcess[str]:
        env = {"PATH": "/usr/sbin:/usr/bin:/sbin:/bin", "DEBIAN_FRONTEND": "noninteractive",
               "LC_ALL": "C.UTF-8", "HOME": "/root"}
        res = subprocess.run(["chroot", str(self.path), "/bin/sh", "-c", cmd], env=env,
                             capture_output=True, text=True, timeout=timeout)
        if check:
            assert res.returncode == 0, f"{cmd} -> {res.returncode}\n{res.stdout}\n{res.stderr}"
        return res

    def files(self) -> set[str]:
        """Every path in the root, apart from the mount points' contents and /tmp."""
        out = set()
        for dirpath, dirnames, filenames in os.walk(self.path):
            rel = os.path.relpath(dirpath, self.path)
            if rel in ("proc", "dev", "tmp", "sys", "run"):
                dirnames.clear()
                continue
            for name in dirnames + filenames:
                out.add("/" + os.path.normpath(os.path.join(rel, name)))
        return out

    def owned(self) -> set[str]:
        """Paths that some installed package lists (dpkg's *.list files)."""
        out: set[str] = set()
        for lst in (self.path / "var/lib/dpkg/info").glob("*.list"):
            out.update(lst.read_text().split("\n"))
        return out


@pytest.fixture(scope="module")
def built(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """The package, built from this checkout by packaging/debian/build-deb."""
    if os.geteuid() != 0:
        unavailable("the package test needs root (debootstrap, chroot, mount)")
    for tool in ("debootstrap", "dpkg-deb", "dpkg-shlibdeps", "chroot", "mount"):
        if shutil.which(tool) is None:
            unavailable(f"{tool} is missing: apt-get install debootstrap dpkg-dev")
    out = tmp_path_factory.mktemp("deb")
    t0 = time.monotonic()
    sh("/usr/bin/python3", str(BUILD), "--out", str(out), timeout=1200)
    (deb,) = out.glob("watchkeep_*.deb")
    print(f"\npackage: {deb.name} {deb.stat().st_size / 1e6:.1f} MB, "
          f"built in {time.monotonic() - t0:.0f} s")
    return deb


@pytest.fixture(scope="module")
def root(built: Path) -> Iterator[Root]:
    """A fresh Debian root with the package installed by `apt-get install ./<deb>`."""
    suite, mirror = host_release()
    arch = sh("dpkg", "--print-architecture").stdout.strip()
    t0 = time.monotonic()
    try:
        tarball = base_tarball(suite, arch)
    except RuntimeError as e:
        unavailable(f"debootstrap of {suite} from {mirror} failed: {e}")
    work = Path(tempfile.mkdtemp(prefix="watchkeep-deb-root-", dir="/var/tmp"))
    r = Root(work / "root")
    r.path.mkdir()
    archives = CACHE / f"apt-archives-{suite}-{arch}"
    mounted: list[Path] = []
    try:
        sh("tar", "--numeric-owner", "-C", str(r.path), "-xzf", str(tarball))
        print(f"root: {suite}/{arch} from {tarball.name} in {time.monotonic() - t0:.0f} s")
        for target, args in (("proc", ["-t", "proc", "proc"]), ("dev", ["--bind", "/dev"])):
            sh("mount", *args, str(r.path / target))
            mounted.append(r.path / target)
        # Read-only: nothing in the root can create or delete the host's device nodes.
        sh("mount", "-o", "remount,bind,ro", str(r.path / "dev"))
        shutil.copyfile("/etc/resolv.conf", r.path / "etc/resolv.conf")
        if archives.is_dir():  # downloaded dependencies of earlier runs
            for d in archives.glob("*.deb"):
                shutil.copy2(d, r.path / "var/cache/apt/archives" / d.name)
        r.run("apt-get update -qq")
        r.before = r.files()
        shutil.copyfile(built, r.path / "tmp" / built.name)
        t1 = time.monotonic()
        r.run(f"apt-get install -y -q --no-install-recommends /tmp/{built.name}")
        print(f"apt-get install ./{built.name}: {time.monotonic() - t1:.0f} s")
        archives.mkdir(parents=True, exist_ok=True)
        for d in (r.path / "var/cache/apt/archives").glob("*.deb"):
            if not (archives / d.name).exists():
                shutil.copy2(d, archives / d.name)
        yield r
    finally:
        for m in reversed(mounted):
            subprocess.run(["umount", str(m)], check=False)
        left = mounts_under(work)
        assert not left, f"still mounted, {work} kept: {left}"
        shutil.rmtree(work)


def test_the_installed_commands_run(root: Root) -> None:
    """`watchkeep --version`, `watchkeep-sim --help` and `check-config` on the shipped config."""
    version = re.search(r'^version = "(.+)"', (ROOT / "pyproject.toml").read_text(), re.M)
    assert version
    assert root.run("watchkeep --version").stdout.strip() == f"watchkeep {version.group(1)}"
    assert "usage" in root.run("watchkeep-sim --help").stdout
    res = root.run(f"watchkeep check-config /{CONF}")
    assert f"config /{CONF}: OK" in res.stdout
    # The venv's interpreter is Debian's, and the daemon's imports work with it.
    link = os.readlink(root.path / "opt/watchkeep/venv/bin/python3.11")
    assert link == "/usr/bin/python3.11"
    # HOME=/tmp: onnxruntime writes a device id under ~/.cache at import, which would
    # otherwise be left in /root (the user's, not the package's, to remove).
    root.run("HOME=/tmp /opt/watchkeep/venv/bin/python -c "
             "'import onnxruntime, onnx, numpy, agent.daemon'")


def test_dpkg_verifies_every_file_and_the_conffile(root: Root) -> None:
    """`dpkg --verify` finds every shipped file as built; the config is a conffile."""
    root.run("dpkg --verify watchkeep")
    status = root.run("dpkg-query -W -f='${Conffiles}' watchkeep").stdout
    assert f"/{CONF} " in status


def test_the_installed_unit_verifies_clean(root: Root) -> None:
    """`systemd-analyze verify` of the installed unit writes nothing on stderr.

    It exits 0 even on unknown keys, so stderr is the verdict; it also checks that
    ExecStart's and ExecReload's binaries exist in the root.
    """
    res = root.run("systemd-analyze verify watchkeep.service")
    assert res.stderr == "", res.stderr
    unit = (root.path / UNIT).read_text()
    assert "ExecStart=/opt/watchkeep/venv/bin/watchkeep run" in unit


def test_nothing_is_enabled_or_started(root: Root) -> None:
    """The unit is installed but not enabled, and no maintainer script starts or enables it."""
    wants = list((root.path / "etc/systemd/system").rglob("watchkeep*"))
    assert wants == []
    state = root.run("systemctl is-enabled watchkeep.service", check=False).stdout.strip()
    assert state == "disabled"
    for script in ("postinst", "prerm", "postrm"):
        text = (root.path / f"var/lib/dpkg/info/watchkeep.{script}").read_text()
        code = "\n".join(ln for ln in text.splitlines() if not ln.lstrip().startswith("#"))
        assert not re.search(r"\b(enable|start|deb-systemd-helper)\b", code), script


def test_an_upgrade_keeps_the_config_credentials_and_state(root: Root, built: Path) -> None:
    """Installing a version-bumped build over it keeps a locally edited conffile, the
    broker passwords and the daemon's state."""
    conf = root.path / CONF
    conf.write_text(conf.read_text().replace("gateway: gw-raw-water", "gateway: gw-07"))
    cred = root.path / "etc/watchkeep/credentials/upstream-password"
    assert cred.exists() and cred.stat().st_mode & 0o077 == 0
    cred.write_text("s3cret")
    # What systemd makes for a DynamicUser= service's StateDirectory=.
    state = root.path / "var/lib/private/watchkeep"
    state.mkdir(parents=True, mode=0o700)
    (state / "outbox.sqlite").write_bytes(b"not empty")
    (root.path / "var/lib/watchkeep").symlink_to("private/watchkeep")

    old = root.run("dpkg-query -W -f='${Version}' watchkeep").stdout
    new = re.sub(r"-(\d+)$", lambda m: f"-{int(m.group(1)) + 1}", old)
    tree = root.path / "tmp/bump"
    sh("dpkg-deb", "-R", str(built), str(tree))
    control = tree / "DEBIAN/control"
    control.write_text(control.read_text().replace(f"Version: {old}\n", f"Version: {new}\n"))
    bumped = f"watchkeep_{new}.deb"
    sh("dpkg-deb", "--root-owner-group", "-Zgzip", "-z1", "-b", str(tree),
       str(root.path / "tmp" / bumped))
    shutil.rmtree(tree)

    root.run(f"apt-get install -y -q /tmp/{bumped}")
    assert root.run("dpkg-query -W -f='${Version}' watchkeep").stdout == new
    assert "gateway: gw-07" in conf.read_text()
    assert not list((root.path / "etc/watchkeep").glob("*.dpkg-*"))
    assert cred.read_text() == "s3cret"
    assert (root.path / "var/lib/watchkeep/outbox.sqlite").read_bytes() == b"not empty"
    assert "gateway gw-07" in root.run(f"watchkeep check-config /{CONF}").stdout


def test_a_purge_leaves_nothing_behind(root: Root) -> None:
    """`apt-get purge` removes the venv, links, unit, config, credentials and state; once
    the dependencies it pulled in are purged too, the root is as before the install but
    for apt's and dpkg's own records and logs."""
    root.run("apt-get purge -y -q watchkeep")
    assert root.run("dpkg -s watchkeep", check=False).returncode != 0
    ours = sorted(p for p in root.files() - root.before if "watchkeep" in p)
    assert ours == []
    for gone in ("opt/watchkeep", "etc/watchkeep", "var/lib/private", "var/lib/watchkeep"):
        assert not os.path.lexists(root.path / gone), gone
    root.run("apt-get autoremove --purge -y -q")
    new = sorted(root.files() - root.before)
    print("\nleft after purge and autoremove --purge:",
          sorted({p if allowed(p) is False else allowed(p) for p in new}))
    assert [p for p in new if not allowed(p)] == []


# What may stay after the purge (Debian policy leaves these to dpkg and apt): dpkg's
# database and apt's state and caches, the logs of both, and debconf's cache.
ALLOWED = ("/var/lib/dpkg", "/var/lib/apt", "/var/cache/apt", "/var/cache/debconf",
           "/var/cache/ldconfig", "/var/log")


def allowed(p: str) -> str | bool:
    """The allowed prefix p falls under, or False."""
    return next((a for a in ALLOWED if p == a or p.startswith(a + "/")), False)


if __name__ == "__main__":
    sys.exit(pytest.main([__file__, "-v", "-s"]))
