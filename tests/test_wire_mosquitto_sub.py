"""Outside tools on the wire: Mosquitto's own `mosquitto_sub` receives what a real edge agent
publishes; a generic msgpack decoder decodes it and the `jsonschema` package validates every
message against schemas/ (JSON Schema 2020-12)."""

from __future__ import annotations

import json
import subprocess
import time
from pathlib import Path

import jsonschema
import msgpack
from _fleet_helpers import CollectorThread, make_fleet

from agent.publish.edge import run_edge
from agent.resources import schemas_dir
from agent.settings import load_edge_settings


def test_mosquitto_sub_sees_schema_valid_messages(tmp_path: Path) -> None:
    fleet = make_fleet(tmp_path, 1, duration=8.0, summary=2, swell_device=0, dip_at=2.0)
    device = fleet.devices[0]
    # -F "%t %x": topic and payload in hex, one message per line (payloads are binary).
    sub = subprocess.Popen(
        ["mosquitto_sub", "-h", "127.0.0.1", "-p", str(fleet.broker.port), "-u", "collector",
         "-P", fleet.broker.collector_password, "-t", f"hc/v1/+/{device}/#", "-V", "mqttv5",
         "-W", "60", "-F", "%t %x"],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    try:
        time.sleep(0.5)  # let it subscribe (bounded: -W ends it in any case)
        with CollectorThread(fleet.collector_config()):
            result = run_edge(load_edge_settings(fleet.edge_configs[device]), pace=False,
                              drain_timeout_s=30)
        assert result.outbox_pending == 0
        time.sleep(0.5)
    finally:
        sub.terminate()
        out, err = sub.communicate(timeout=10)
        fleet.stop_all()
    schemas = {p.name.split(".")[0]: json.loads(p.read_text())
               for p in schemas_dir().glob("*.schema.json")}
    kinds: dict[str, int] = {}
    for line in out.splitlines():
        topic, hexpayload = line.split(" ", 1)
        msg = msgpack.unpackb(bytes.fromhex(hexpayload), raw=False)
        kind = topic.rsplit("/", 1)[1]
        assert msg["type"] == kind
        jsonschema.validate(msg, schemas[kind], cls=jsonschema.Draft202012Validator)
        kinds[kind] = kinds.get(kind, 0) + 1
    # Everything the agent sends, plus the collector's retained acknowledgement.
    assert {"summary", "event", "capture", "status", "ack"} <= set(kinds), (kinds, err)
    assert kinds["event"] >= 4  # dip and swell, each started and ended
