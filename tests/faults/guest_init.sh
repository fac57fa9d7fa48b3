#!/bin/sh
# Runs inside the power-cut VM, started by the image's /sbin/wk-init from the source
# disk (/dev/vdc, mounted on /run/wk-src). Brings up the network (QEMU user-mode: the
# host's loopback is 10.0.2.2), replays/checks the state disk's file system, mounts it
# on /var/lib/watchkeep and runs the daemon under the journal harness.
set -u
SRC=/run/wk-src
# The one virtio NIC: eth0, or a predictable name if the initramfs's udev renamed it.
nic=
for n in /sys/class/net/*; do [ "${n##*/}" = lo ] || nic=${n##*/}; done
ip link set lo up
ip link set "$nic" up
ip addr add 10.0.2.15/24 dev "$nic"
ip route add default via 10.0.2.2
# The journal port (virtio-serial, named by the host): its /dev node is vportNpM.
port=
for n in /sys/class/virtio-ports/*; do
  [ "$(cat "$n/name" 2>/dev/null)" = wk.journal ] && port=/dev/$(basename "$n")
done
[ -n "$port" ] || { echo "guest: no journal port" > /dev/console; exit 1; }
# A power cut leaves the ext4 journal to replay: e2fsck -p replays it and fixes what
# it can without asking (exit 1 = errors corrected); a harder failure is reported.
e2fsck -p /dev/vdb > /tmp/fsck.log 2>&1
fsck_rc=$?
mount -t ext4 /dev/vdb /var/lib/watchkeep || { echo "X mount_failed" > "$port"; exit 1; }
export HOME=/tmp PYTHONPATH=$SRC PYTHONDONTWRITEBYTECODE=1 PYTHONUNBUFFERED=1
exec /opt/wk-venv/bin/python "$SRC/faults/guest_harness.py" --journal "$port" \
  --config "$SRC/watchkeep.yaml" --fsck-rc "$fsck_rc"
