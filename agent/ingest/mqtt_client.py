"""paho's client, reading the socket in large chunks.

paho-mqtt 2.x reads an incoming packet with at least three `recv` calls (the command
byte, each byte of the remaining length, then the rest) and handles one packet per
`select`: four system calls and their Python wrappers for every message, most of a
small message's cost. `ReadAheadClient` serves those reads from one large `recv`
and, once a read is done, handles every whole packet already buffered before paho
goes back to `select` (which cannot see bytes held here).

Measured 2026-12-02, a subscriber that only `json.loads` each message, three
publisher processes on a local Mosquitto 2.0.11: 16.4 CPU us per message and 47k
messages/s with paho 2.2's own reads, 12.6 us and 57k/s with these
(`python -m tests.bench ingest` shows what it does for watchkeep).

It overrides two of paho's private methods (`_sock_recv`, `_sock_close`), which
paho 2.0 to 2.2 have; `tests/unit/ingest/test_mqtt_client.py` fails if a paho release
drops them, rather than the read-ahead silently stopping. If `_sock_recv` went away,
nothing would be buffered and paho's own reads would do the job as before.
"""

from __future__ import annotations

from typing import Any

import paho.mqtt.client as mqtt
from paho.mqtt.enums import MQTTErrorCode

READ_AHEAD = 65536  # bytes asked of the socket when nothing is buffered


class ReadAheadClient(mqtt.Client):
    """A `paho.mqtt.client.Client` whose socket reads go through a read-ahead buffer."""

    def __init__(self, *args: Any, **kwargs: Any) -> None:
        self._ra_buf = b""
        self._ra_pos = 0
        self._ra_refill = True
        super().__init__(*args, **kwargs)

    def buffered(self) -> int:
        """Bytes read from the socket and not yet handed to paho."""
        return len(self._ra_buf) - self._ra_pos

    def _sock_recv(self, bufsize: int) -> bytes:
        buf, pos = self._ra_buf, self._ra_pos
        avail = len(buf) - pos
        if not avail:
            if not self._ra_refill:
                # Draining what is buffered (`loop_read`): the rest of a packet waits
                # in the socket, where paho's select sees it.
                raise BlockingIOError
            # paho's own read (TLS and error handling included); b"" means the peer
            # closed, and goes to paho as it is.
            data: bytes = super()._sock_recv(max(bufsize, READ_AHEAD))
            if len(data) <= bufsize:
                return data
            self._ra_buf, self._ra_pos = data, bufsize
            return data[:bufsize]
        if avail <= bufsize:  # fewer than asked is what recv may return, too
            self._ra_buf, self._ra_pos = b"", 0
            return buf[pos:] if pos else buf
        self._ra_pos = pos + bufsize
        return buf[pos:pos + bufsize]

    def loop_read(self, max_packets: int = 1) -> MQTTErrorCode:
        rc = super().loop_read(max_packets)
        # Every byte read must reach paho before its loop waits in select again, which
        # cannot see them. Only what is buffered: each pass takes at least one byte of
        # it, so this ends (a 64 KiB read of small messages is some hundreds), and a
        # flood cannot keep paho's loop from its writes (PUBACKs, PINGREQs).
        self._ra_refill = False
        try:
            while (rc == MQTTErrorCode.MQTT_ERR_SUCCESS and self.buffered()
                   and self._sock is not None):
                rc = super().loop_read(max_packets)
        finally:
            self._ra_refill = True
        return rc

    def _sock_close(self) -> None:
        self._ra_buf, self._ra_pos = b"", 0  # never carried into the next connection
        super()._sock_close()

    def reconnect(self) -> MQTTErrorCode:
        self._ra_buf, self._ra_pos = b"", 0
        return super().reconnect()
