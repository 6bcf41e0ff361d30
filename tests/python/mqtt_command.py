"""Publishes one command with paho-mqtt, as a plant's host application
(a SCADA or the plant's density measurement) would, and exits once the
broker has acknowledged it (QoS 1).

Usage: python mqtt_command.py HOST PORT TOPIC KIND VALUE [retain]
KIND "sparkplug": a Sparkplug B DCMD payload (Eclipse Tahu schema, PyPI
`tahu`) with one Float metric named `bulk_density_kg_m3`;
KIND "json": the JSON text VALUE as it stands;
KIND "rebirth": VALUE Sparkplug B NCMDs `Node Control/Rebirth` = true,
published back to back (as several host applications coming up at once).
"""

import sys
import time

import paho.mqtt.client as mqtt
from tahu import sparkplug_b_pb2

FLOAT = 9  # Tahu DataType Float
BOOLEAN = 11  # Tahu DataType Boolean


def rebirth():
    p = sparkplug_b_pb2.Payload()
    p.timestamp = int(time.time() * 1000)
    m = p.metrics.add()
    m.name = "Node Control/Rebirth"
    m.timestamp = p.timestamp
    m.datatype = BOOLEAN
    m.boolean_value = True
    return p.SerializeToString()


def payload(kind, value):
    if kind == "json":
        return value.encode("utf-8")
    p = sparkplug_b_pb2.Payload()
    p.timestamp = int(time.time() * 1000)
    m = p.metrics.add()
    m.name = "bulk_density_kg_m3"
    m.timestamp = p.timestamp
    m.datatype = FLOAT
    m.float_value = float(value)
    return p.SerializeToString()


def main(host, port, topic, kind, value, retain):
    client = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2)
    client.connect(host, port, keepalive=5)
    client.loop_start()
    if kind == "rebirth":
        infos = [client.publish(topic, rebirth(), qos=1) for _ in range(int(value))]
    else:
        infos = [client.publish(topic, payload(kind, value), qos=1, retain=retain)]
    for info in infos:
        info.wait_for_publish(timeout=10)
        if not info.is_published():
            sys.exit(f"not acknowledged by the broker: {topic}")
    client.loop_stop()
    client.disconnect()


if __name__ == "__main__":
    a = sys.argv
    main(a[1], int(a[2]), a[3], a[4], a[5], len(a) > 6 and a[6] == "retain")
