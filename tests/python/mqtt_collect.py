"""Subscribes to a broker with paho-mqtt, as a plant's host application
would, and prints every message it receives as one JSON line, Sparkplug B
payloads decoded with the Eclipse Tahu schema (PyPI `tahu`).

Usage: python mqtt_collect.py HOST PORT TOPIC
A persistent session (fixed client id, clean_session false) at QoS 1, so a
broker restart keeps the subscription and the messages queued meanwhile;
paho reconnects by itself. Prints {"event": "subscribed"} once subscribed.
Runs until killed.
"""

import json
import sys

import paho.mqtt.client as mqtt
from tahu import sparkplug_b_pb2

VALUE_FIELDS = ("int_value", "long_value", "float_value", "double_value",
                "boolean_value", "string_value")


def decode(topic, data):
    if not topic.startswith("spBv1.0/"):
        return {"json": json.loads(data.decode("utf-8"))}
    p = sparkplug_b_pb2.Payload()
    p.ParseFromString(data)
    metrics = {}
    for m in p.metrics:
        which = m.WhichOneof("value")
        value = None if m.is_null or which is None else getattr(m, which)
        if isinstance(value, float) and value != value:
            value = None
        metrics[m.name] = {
            "value": value,
            "datatype": m.datatype,
            "historical": m.is_historical,
            "timestamp": m.timestamp if m.HasField("timestamp") else None,
        }
    return {"seq": p.seq if p.HasField("seq") else None, "metrics": metrics}


def emit(obj):
    print(json.dumps(obj, allow_nan=False), flush=True)


def on_connect(client, userdata, flags, reason_code, properties):
    client.subscribe(userdata, qos=1)


def on_subscribe(client, userdata, mid, reason_codes, properties):
    emit({"event": "subscribed"})


def on_message(client, userdata, msg):
    # "dup": the broker sends this message again to this subscriber (its
    # PUBACK was not seen before the broker stopped): MQTT QoS 1 on the
    # broker-to-subscriber leg, not a repeat by the publisher.
    emit({"topic": msg.topic, "dup": bool(msg.dup), **decode(msg.topic, msg.payload)})


def main(host, port, topic):
    client = mqtt.Client(
        mqtt.CallbackAPIVersion.VERSION2,
        client_id="fringe-test-collector",
        clean_session=False,
        userdata=topic,
    )
    client.on_connect = on_connect
    client.on_subscribe = on_subscribe
    client.on_message = on_message
    client.reconnect_delay_set(min_delay=0.1, max_delay=1)
    client.connect(host, port, keepalive=5)
    client.loop_forever(retry_first_connection=True)


if __name__ == "__main__":
    main(sys.argv[1], int(sys.argv[2]), sys.argv[3])
