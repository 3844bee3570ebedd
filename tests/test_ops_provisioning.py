"""Provisioning round trip on a real Mosquitto (issue 9): `halfcycle broker devices add` binds
a device to its site and prints the password alone; the device publishes; it cannot publish
under another site (ACL: PUBACK 0x87, MQTT 5.0 cl. 3.4.2.1) and the collector dead-letters a
device heard under a second site; revoked, it is refused (CONNACK 0x86/0x87, MQTT 5.0
cl. 3.2.2.2); a CSV import adds many; a mistyped --dir creates nothing."""

from __future__ import annotations

import csv
import io
import json
import subprocess
import sys
from pathlib import Path
from typing import Any

import paho.mqtt.client as mqtt
from _fleet_helpers import CollectorThread
from _mqtt_helpers import Broker, client, free_port, wait_for
from test_ops_collector import gap_payload, write_config

from agent.broker import setup
from agent.store.recorder import RecorderStore

ROOT = Path(__file__).resolve().parents[1]


def cli(*argv: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "agent.cli.main", "broker", *argv],
                          capture_output=True, text=True, cwd=ROOT, timeout=60, check=False)


def connect(port: int, user: str, password: str) -> tuple[mqtt.Client, Any]:
    c = client(port, user, password)
    result: list[Any] = []
    c.on_connect = lambda _c, _u, _f, rc, _p: result.append(rc)
    c.connect("127.0.0.1", port)
    c.loop_start()
    wait_for(lambda: bool(result), 5)
    return c, result[0] if result else None


def publish(c: mqtt.Client, topic: str, payload: bytes) -> int:
    acks: list[Any] = []
    c.on_publish = lambda _c, _u, _mid, rc, _p: acks.append(rc)
    c.publish(topic, payload, qos=1)
    assert wait_for(lambda: bool(acks), 5)
    return int(acks[0].value)


def test_provisioning_round_trip(tmp_path: Path) -> None:
    root = tmp_path / "broker"
    port = free_port()
    setup.render(root, port=port)
    done = cli("devices", "add", "unit-7", "--site", "maple-row", "--dir", str(root))
    assert done.returncode == 0, done.stderr
    password = done.stdout.strip()
    assert done.stdout == password + "\n" and len(password) >= 20  # alone on stdout
    legacy = setup.add_device(root, "unit-8")  # older form: bound to no site
    b = Broker(root=root, port=port)
    b.devices = {"unit-7": password, "unit-8": legacy}
    b.start()
    url = f"sqlite:///{tmp_path / 'rec.db'}"
    try:
        with CollectorThread(write_config(tmp_path, port, b.collector_password, url=url)):
            dev, rc = connect(port, "unit-7", password)
            assert rc is not None and not rc.is_failure
            own = publish(dev, "hc/v1/maple-row/unit-7/gap",
                          gap_payload("unit-7", 1, site="maple-row"))
            other_site = publish(dev, "hc/v1/oak-lane/unit-7/gap",
                                 gap_payload("unit-7", 2, site="oak-lane"))
            dev.disconnect()
            dev.loop_stop()
            assert own == 0 and other_site == 0x87  # the ACL binds the device to its site
            # A device bound to no site by the ACL is bound by the collector: first site wins.
            old, _ = connect(port, "unit-8", legacy)
            assert publish(old, "hc/v1/maple-row/unit-8/gap",
                           gap_payload("unit-8", 1, site="maple-row")) == 0
            assert publish(old, "hc/v1/oak-lane/unit-8/gap",
                           gap_payload("unit-8", 2, site="oak-lane")) == 0
            old.disconnect()
            old.loop_stop()
            store = RecorderStore(url, tmp_path / "captures")
            try:
                assert wait_for(lambda: len(store.dead_letters()) == 1, 10)
                assert wait_for(lambda: store.committed_upto("unit-7", "e1") == 1, 10)
                dead = store.dead_letters()[0]
                assert dead["reason"].startswith("wrong_site: device unit-8 belongs to site "
                                                 "maple-row, not oak-lane")
                assert store.device_site("unit-8") == "maple-row"
            finally:
                store.close()
        # Revoked: refused from now on.
        done = cli("devices", "revoke", "unit-7", "--dir", str(root))
        assert done.returncode == 0, done.stderr
        assert wait_for(lambda: (connect(port, "unit-7", password)[1] or rc).is_failure, 10)
        listed = json.loads(cli("devices", "list", "--dir", str(root), "--json").stdout)
        assert [(d["device"], d["site"]) for d in listed] == [("unit-8", None)]
        assert "unit-7" not in (root / "acl").read_text()
    finally:
        b.stop()


def test_import_csv_writes_private_password_files(tmp_path: Path) -> None:
    root = tmp_path / "broker"
    setup.render(root, port=free_port())
    sheet = tmp_path / "units.csv"
    sheet.write_text("device,site,note\nunit-1,elm-court,invented\nunit-2,elm-court,\n"
                     "unit-3,birch-way,\n")
    out = tmp_path / "pw"
    out.mkdir()
    done = cli("devices", "import", str(sheet), "--dir", str(root), "--out", str(out))
    assert done.returncode == 0, done.stderr
    assert done.stdout == ""
    for d in ("unit-1", "unit-2", "unit-3"):
        f = out / f"{d}.password"
        assert f.stat().st_mode & 0o077 == 0 and len(f.read_text().strip()) >= 20
    acl = (root / "acl").read_text()
    assert "topic write hc/v1/birch-way/unit-3/summary/#" in acl
    assert "topic read hc/v1/elm-court/unit-1/ack" in acl
    # Without --out: CSV on stdout, for a script.
    done = cli("devices", "import", str(sheet), "--dir", str(root))
    rows = list(csv.DictReader(io.StringIO(done.stdout)))
    assert [r["device"] for r in rows] == ["unit-1", "unit-2", "unit-3"]
    assert all(len(r["password"]) >= 20 for r in rows)
    # A bad row is named by its line; nothing is added.
    sheet.write_text("device,site\nunit-9,elm-court\nunit/10,elm-court\n")
    done = cli("devices", "import", str(sheet), "--dir", str(root))
    assert done.returncode == 2 and "unit/10" in done.stderr
    assert "unit-9" not in (root / "passwd").read_text()


def test_a_folder_without_broker_configuration_is_refused(tmp_path: Path) -> None:
    typo = tmp_path / "brokr"
    for argv in (["add-device", "unit-1", "--dir", str(typo)],
                 ["devices", "add", "unit-1", "--site", "s", "--dir", str(typo)],
                 ["devices", "list", "--dir", str(typo)]):
        done = cli(*argv)
        assert done.returncode == 2
        assert "holds no broker configuration" in done.stderr
        assert len(done.stderr.strip().splitlines()) == 1
    assert not typo.exists()


def test_broker_runs_with_the_operators_own_ca(tmp_path: Path) -> None:
    import ssl

    pki = tmp_path / "pki"  # stands in for the operator's CA: a CA, a server cert and key
    setup.make_test_certificates(pki)
    root = tmp_path / "broker"
    port = free_port()
    setup.render(root, port=port)
    password = setup.add_device(root, "unit-1", "elm-court")
    log = open(tmp_path / "broker.log", "wb")  # noqa: SIM115 - handed to the child
    proc = subprocess.Popen([sys.executable, "-m", "agent.cli.main", "broker", "run", "--dir",
                             str(root), "--port", str(port), "--ca-cert", str(pki / "ca.crt"),
                             "--cert", str(pki / "server.crt"), "--key", str(pki / "server.key")],
                            stdout=log, stderr=log, cwd=ROOT)
    log.close()
    try:
        from _mqtt_helpers import port_open

        assert wait_for(lambda: port_open(port), 15), (tmp_path / "broker.log").read_text()
        conf = (root / "mosquitto.conf").read_text()
        assert f"cafile {pki / 'ca.crt'}" in conf and not (root / "tls").exists()
        c = client(port, "unit-1", password)
        c.tls_set(ca_certs=str(pki / "ca.crt"), cert_reqs=ssl.CERT_REQUIRED)
        result: list[Any] = []
        c.on_connect = lambda _c, _u, _f, rc, _p: result.append(rc)
        c.connect("localhost", port)
        c.loop_start()
        try:
            assert wait_for(lambda: bool(result), 10) and not result[0].is_failure
        finally:
            c.disconnect()
            c.loop_stop()
    finally:
        proc.terminate()
        proc.wait(10)
    # Only some of the three: refused before anything is rendered or started.
    done = cli("run", "--dir", str(tmp_path / "b2"), "--ca-cert", str(pki / "ca.crt"))
    assert done.returncode == 2 and "go together" in done.stderr
