"""A Sparkplug B edge node made with pysparkplug (an independent implementation from PyPI,
Apache-2.0), for tests/integration/test_sparkplug_peer.py. Not watchkeep code: it runs
in its own interpreter with pysparkplug and the paho-mqtt 1.x it requires on its path
(`.venv/spb-peer`, installed by `make .venv/.installed`).

    python spb_peer.py PORT USER PASSWORD ALIAS_BASE

connects as edge node `fernbrook-dosing/dosing-gw` with device `C-301` (NBIRTH and
DBIRTH on connect, its NDEATH as the MQTT will), then reads commands on stdin, one a line,
and answers each with a line on stdout:

    data T_MS FLOW PRESSURE RUNNING STROKE   a DDATA, metrics by alias only, stamped T_MS
    skip                                     use up one sequence number (a gap follows)
    garbage                                  bytes that are no protobuf, on the DDATA topic
    ddeath                                   the device's death certificate
An NCMD it receives is printed as `ncmd <metric name> <datatype> <value>`.
"""

from __future__ import annotations

import sys
import time

import pysparkplug as spb
from pysparkplug import DataType, Device, EdgeNode, Message, MessageType, Metric, QoS, Topic

GROUP, NODE, DEVICE = "fernbrook-dosing", "dosing-gw", "C-301"
METRICS = (("Pump/Flow", DataType.DOUBLE), ("Pump/Discharge Pressure", DataType.FLOAT),
           ("Pump/Running", DataType.BOOLEAN), ("Pump/Stroke", DataType.INT16))


def say(line: str) -> None:
    sys.stdout.write(line + "\n")
    sys.stdout.flush()


def on_ncmd(_node: EdgeNode, message: Message) -> None:
    for m in message.payload.metrics:
        say(f"ncmd {m.name} {int(m.datatype)} {m.value}")


def main(argv: list[str]) -> int:
    port, user, password, base = int(argv[1]), argv[2], argv[3], int(argv[4])
    now = spb.get_current_timestamp()
    aliases = {name: base + i for i, (name, _) in enumerate(METRICS)}
    birth_values = {"Pump/Flow": 0.0, "Pump/Discharge Pressure": 0.0, "Pump/Running": False,
                    "Pump/Stroke": 0}
    device = Device(DEVICE, [Metric(timestamp=now, name=name, datatype=dt,
                                    value=birth_values[name], alias=aliases[name])
                             for name, dt in METRICS])
    client = spb.Client(client_id=f"spb-peer-{base}", username=user, password=password)
    node = EdgeNode(GROUP, NODE, [Metric(timestamp=now, name="Properties/Model",
                                         datatype=DataType.STRING, value="FD-2")],
                    client=client, cmd_callback=on_ncmd)
    node.register(device)
    node.connect("127.0.0.1", port=port, blocking=False)
    deadline = time.monotonic() + 10
    while not node._connected:  # pysparkplug sets it after publishing the births
        if time.monotonic() > deadline:
            say("error not connected")
            return 1
        time.sleep(0.01)
    say("ready")
    ddata = Topic(message_type=MessageType.DDATA, group_id=GROUP, edge_node_id=NODE,
                  device_id=DEVICE)
    for line in sys.stdin:
        words = line.split()
        if not words:
            continue
        if words[0] == "data":
            t_ms = int(words[1])
            values = (float(words[2]), float(words[3]), words[4] == "1", int(words[5]))
            # Aliases only, no names: what the spec asks of NDATA/DDATA when aliases
            # are used. EdgeNode.update_device always adds names, so the DDATA is built
            # with pysparkplug's payload classes and the node's own sequence counter.
            metrics = tuple(Metric(timestamp=t_ms, name=None, datatype=dt, value=v,
                                   alias=aliases[name])
                            for (name, dt), v in zip(METRICS, values, strict=True))
            payload = spb.DData(timestamp=t_ms, seq=node._seq, metrics=metrics)
            client.publish(Message(topic=ddata, payload=payload, qos=QoS.AT_MOST_ONCE,
                                   retain=False), include_dtypes=False)
        elif words[0] == "skip":
            _ = node._seq
        elif words[0] == "garbage":
            client._client.publish(str(ddata), b"\x12\xff\xff\xff\xff\x0f", qos=0)
        elif words[0] == "ddeath":
            node.deregister(DEVICE)
        say("ok " + words[0])
    return 0


if __name__ == "__main__":
    raise SystemExit(main(sys.argv))
