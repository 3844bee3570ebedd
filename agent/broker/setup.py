"""Render a Mosquitto broker directory from the templates in ``broker-config/``.

A broker directory holds::

    mosquitto.conf      rendered configuration
    acl                 rendered ACL
    passwd              user:hash lines (mode 0600), Mosquitto 2.0 PBKDF2-SHA512 format
    collector.password  the collector's generated password (mode 0600; the collector reads it)
    devices.csv         the device registry: device, site, added_utc (one row per device)
    data/               persistence
    tls/                test CA, server and client certificates (only with ``tls=True``)

Passwords are generated here (``secrets``), stored only as PBKDF2-SHA512 hashes in ``passwd``
and shown once. They are never logged.
"""

from __future__ import annotations

import base64
import csv
import getpass
import hashlib
import io
import os
import pwd
import secrets
import shutil
import signal
import string
import subprocess
import time
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path

from agent import resources
from agent.publish import topics

COLLECTOR_USER = "collector"
DEFAULT_MAX_PACKET = 256 * 1024
# PBKDF2 iterations. Mosquitto's own default is 101; the passwords here are 144 random bits,
# so an offline guess is hopeless either way and a higher count only costs connect time.
PBKDF2_ITERATIONS = 1000


class BrokerSetupError(RuntimeError):
    """The broker directory cannot be prepared (bad id, missing tool, unreadable file)."""


def generate_password() -> str:
    """A random password (144 bits, URL-safe text)."""
    return secrets.token_urlsafe(18)


def hash_password(password: str, *, salt: bytes | None = None,
                  iterations: int = PBKDF2_ITERATIONS) -> str:
    """Mosquitto 2.0 password-file hash: ``$7$<iterations>$<b64 salt>$<b64 PBKDF2-SHA512>``."""
    salt = salt if salt is not None else secrets.token_bytes(12)
    digest = hashlib.pbkdf2_hmac("sha512", password.encode("utf-8"), salt, iterations)
    return (f"$7${iterations}${base64.b64encode(salt).decode()}$"
            f"{base64.b64encode(digest).decode()}")


def _write_private(path: Path, text: str) -> None:
    """Write ``text`` atomically with mode 0600 (created private, never world-readable)."""
    tmp = path.with_name(path.name + ".tmp")
    fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
    with os.fdopen(fd, "w", encoding="utf-8") as fh:
        fh.write(text)
        fh.flush()
        os.fsync(fh.fileno())
        if path.exists() and os.geteuid() == 0:
            # keep the owner a broker that dropped privileges needs (see _hand_over)
            st = path.stat()
            os.fchown(fh.fileno(), st.st_uid, st.st_gid)
    os.replace(tmp, path)


def read_passwd(path: Path) -> dict[str, str]:
    users: dict[str, str] = {}
    if path.exists():
        for line in path.read_text(encoding="utf-8").splitlines():
            if line.strip() and ":" in line:
                name, _, hashed = line.partition(":")
                users[name] = hashed
    return users


def set_password(passwd: Path, user: str, password: str) -> None:
    """Add or replace ``user`` in a Mosquitto password file."""
    users = read_passwd(passwd)
    users[user] = hash_password(password)
    _write_private(passwd, "".join(f"{u}:{h}\n" for u, h in users.items()))


@dataclass(frozen=True)
class BrokerDir:
    """Paths of a rendered broker directory."""

    root: Path

    @property
    def conf(self) -> Path:
        return self.root / "mosquitto.conf"

    @property
    def passwd(self) -> Path:
        return self.root / "passwd"

    @property
    def acl(self) -> Path:
        return self.root / "acl"

    @property
    def collector_password_file(self) -> Path:
        return self.root / "collector.password"

    @property
    def registry(self) -> Path:
        return self.root / "devices.csv"

    @property
    def pid_file(self) -> Path:
        return self.root / "mosquitto.pid"

    @property
    def tls_dir(self) -> Path:
        return self.root / "tls"

    def collector_password(self) -> str:
        return self.collector_password_file.read_text(encoding="utf-8").strip()


@dataclass(frozen=True)
class Device:
    """One provisioned device: its id (= broker user name) and the site it may publish
    under (``None``: any site, for devices added before sites were bound)."""

    device: str
    site: str | None
    added_utc: str = ""


ANY_SITE = "+"


def broker_dir(root: str | Path) -> BrokerDir:
    """A rendered broker directory; BrokerSetupError when ``root`` holds no broker
    configuration (a mistyped ``--dir`` must not start a new password file)."""
    bdir = BrokerDir(Path(root))
    if not bdir.conf.is_file():
        raise BrokerSetupError(f"{bdir.root} holds no broker configuration (no "
                               "mosquitto.conf): check --dir, or render one with "
                               f"`halfcycle broker run --dir {bdir.root} --render-only`")
    return bdir


def _check_device_id(device: str) -> None:
    if not topics.valid_id(device):
        raise BrokerSetupError(f"device id {device!r}: use letters, digits, '_', '.', '-' "
                               "(at most 64, no MQTT wildcards)")
    if device in topics.RESERVED_DEVICE_IDS:
        raise BrokerSetupError(f"device id {device!r} is reserved")


def list_devices(root: str | Path) -> list[Device]:
    """The registry, plus any device in the password file that it does not list (added by
    an older version: bound to no site), sorted by id."""
    bdir = BrokerDir(Path(root))
    found: dict[str, Device] = {}
    if bdir.registry.exists():
        for row in csv.DictReader(io.StringIO(bdir.registry.read_text(encoding="utf-8"))):
            site = (row.get("site") or "").strip()
            found[row["device"]] = Device(row["device"], None if site in ("", ANY_SITE)
                                          else site, row.get("added_utc") or "")
    for user in read_passwd(bdir.passwd):
        if user != COLLECTOR_USER and user not in found:
            found[user] = Device(user, None)
    return [found[k] for k in sorted(found)]


def _write_registry(bdir: BrokerDir, devices: list[Device]) -> None:
    out = io.StringIO()
    w = csv.writer(out, lineterminator="\n")
    w.writerow(["device", "site", "added_utc"])
    for d in sorted(devices, key=lambda d: d.device):
        w.writerow([d.device, d.site or "", d.added_utc])
    _write_private(bdir.registry, out.getvalue())


def add_device(root: str | Path, device: str, site: str | None = None) -> str:
    """Create (or replace) the credentials of ``device``, bound to ``site`` (``None``: any
    site); returns its new password. The ACL is rewritten and a broker running from this
    directory is told to reload (SIGHUP)."""
    return add_devices(root, [(device, site)])[device]


def add_devices(root: str | Path, devices: list[tuple[str, str | None]]) -> dict[str, str]:
    """Add several devices in one pass (one ACL rewrite, one reload); all ids are checked
    before anything is written."""
    for device, site in devices:
        _check_device_id(device)
        if site is not None and not topics.valid_id(site):
            raise BrokerSetupError(f"site id {site!r} (device {device}): use letters, digits, "
                                   "'_', '.', '-' (at most 64, no MQTT wildcards)")
    ids = [d for d, _ in devices]
    if len(set(ids)) != len(ids):
        raise BrokerSetupError("a device id appears twice: " + ", ".join(
            sorted({d for d in ids if ids.count(d) > 1})))
    bdir = broker_dir(root)
    users = read_passwd(bdir.passwd)
    registry = {d.device: d for d in list_devices(bdir.root)}
    stamp = datetime.fromtimestamp(time.time(), UTC).strftime("%Y-%m-%dT%H:%M:%SZ")
    passwords: dict[str, str] = {}
    for device, site in devices:
        passwords[device] = generate_password()
        users[device] = hash_password(passwords[device])
        registry[device] = Device(device, site, stamp)
    _write_private(bdir.passwd, "".join(f"{u}:{h}\n" for u, h in users.items()))
    _write_registry(bdir, list(registry.values()))
    write_acl(bdir)
    _reload(bdir)
    return passwords


def revoke_device(root: str | Path, device: str) -> None:
    """Remove ``device``'s credentials and ACL entries; the broker reloads. BrokerSetupError
    when no such device is provisioned."""
    bdir = broker_dir(root)
    users = read_passwd(bdir.passwd)
    registry = {d.device: d for d in list_devices(bdir.root)}
    if device not in users and device not in registry:
        raise BrokerSetupError(f"no device {device!r} in {bdir.root}")
    users.pop(device, None)
    registry.pop(device, None)
    _write_private(bdir.passwd, "".join(f"{u}:{h}\n" for u, h in users.items()))
    _write_registry(bdir, list(registry.values()))
    write_acl(bdir)
    _reload(bdir)


def read_device_csv(path: str | Path) -> list[tuple[str, str | None]]:
    """``device,site`` rows (a header line naming them is required; more columns are
    ignored) for ``devices import``; BrokerSetupError naming the line on a bad row."""
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except OSError as exc:
        raise BrokerSetupError(f"{p}: cannot read: {exc.strerror}") from None
    reader = csv.DictReader(io.StringIO(text))
    if not reader.fieldnames or not {"device", "site"} <= {f.strip() for f in
                                                           reader.fieldnames}:
        raise BrokerSetupError(f"{p}: line 1: need a header with the columns device,site")
    out: list[tuple[str, str | None]] = []
    for row in reader:
        row = {k.strip(): (v or "").strip() for k, v in row.items() if k}
        if not row.get("device"):
            raise BrokerSetupError(f"{p}: line {reader.line_num}: no device id")
        if not row.get("site"):
            raise BrokerSetupError(f"{p}: line {reader.line_num}: device {row['device']} "
                                   "has no site")
        out.append((row["device"], row["site"]))
    if not out:
        raise BrokerSetupError(f"{p}: no devices")
    return out


def device_acl_block(dev: Device) -> str:
    """The ACL lines of one device: it writes only its own message kinds under its own
    site, and reads only its own acknowledgement. Listing the kinds (rather than
    ``.../{device}/#`` with a deny line) is needed because "deny" in Mosquitto removes read
    access too."""
    site = dev.site or ANY_SITE
    lines = [f"user {dev.device}"]
    lines += [f"topic write hc/v1/{site}/{dev.device}/{kind}/#" for kind in topics.DEVICE_KINDS]
    lines.append(f"topic read hc/v1/{site}/{dev.device}/ack")
    return "\n".join(lines)


def write_acl(bdir: BrokerDir) -> None:
    template_dir = resources.broker_config_dir()
    blocks = "\n\n".join(device_acl_block(d) for d in list_devices(bdir.root))
    acl = string.Template((template_dir / "acl.template").read_text()).substitute(
        collector_user=COLLECTOR_USER, device_blocks=blocks)
    _write_private(bdir.acl, acl)


def _reload(bdir: BrokerDir) -> None:
    try:
        pid = int(bdir.pid_file.read_text().strip())
        os.kill(pid, signal.SIGHUP)  # Mosquitto re-reads password file and ACL on SIGHUP
    except (OSError, ValueError):
        pass  # no broker running from this directory


@dataclass(frozen=True)
class OperatorCertificates:
    """The operator's own CA certificate and the broker's certificate and key (PEM)."""

    ca_cert: Path
    cert: Path
    key: Path

    def check(self) -> None:
        for name, path in (("--ca-cert", self.ca_cert), ("--cert", self.cert),
                           ("--key", self.key)):
            if not path.is_file():
                raise BrokerSetupError(f"{name} {path}: file not found")


def render(root: str | Path, *, port: int = 8883, bind_address: str = "127.0.0.1",
           tls: bool = False, user: str | None = None,
           max_packet_size: int = DEFAULT_MAX_PACKET, log_dest: str = "stderr",
           certificates: OperatorCertificates | None = None) -> BrokerDir:
    """Render configuration, ACL and collector credentials into ``root``.

    Existing passwords, devices and certificates are kept, so rendering again is safe.
    ``certificates``: the operator's own CA and broker certificate (TLS on); without them
    ``tls=True`` generates a throw-away test CA.
    """
    bdir = BrokerDir(Path(root).resolve())
    bdir.root.mkdir(parents=True, exist_ok=True)
    (bdir.root / "data").mkdir(exist_ok=True)
    if user is None:
        user = getpass.getuser()  # run as the user that owns the rendered files
    if COLLECTOR_USER not in read_passwd(bdir.passwd) or \
            not bdir.collector_password_file.exists():
        password = generate_password()
        set_password(bdir.passwd, COLLECTOR_USER, password)
        _write_private(bdir.collector_password_file, password + "\n")
    tls_block = ""
    if certificates is not None:
        certificates.check()
        ca, cert, key = (certificates.ca_cert.resolve(), certificates.cert.resolve(),
                         certificates.key.resolve())
    elif tls:
        make_test_certificates(bdir.tls_dir)
        ca, cert, key = (bdir.tls_dir / "ca.crt", bdir.tls_dir / "server.crt",
                         bdir.tls_dir / "server.key")
    if tls or certificates is not None:
        tls_block = "\n".join([f"cafile {ca}", f"certfile {cert}", f"keyfile {key}",
                               "tls_version tlsv1.2", "require_certificate false"])
    template_dir = resources.broker_config_dir()
    conf = string.Template((template_dir / "mosquitto.conf.template").read_text()).substitute(
        password_file=bdir.passwd, acl_file=bdir.acl, user=user, pid_file=bdir.pid_file,
        persistence_location=str(bdir.root / "data") + "/",
        max_packet_size=max_packet_size, log_dest=log_dest, port=port,
        bind_address=bind_address, tls_block=tls_block,
    )
    bdir.conf.write_text(conf, encoding="utf-8")
    write_acl(bdir)
    _hand_over(bdir, user)
    return bdir


def _hand_over(bdir: BrokerDir, user: str) -> None:
    """Started as root, Mosquitto drops to ``user`` before it opens the password file, the
    ACL, the TLS key, the pid file and the persistence directory: give them to that user
    (a root-owned 0600 password file is otherwise unreadable and the broker exits)."""
    if os.geteuid() != 0 or user == "root":
        return
    try:
        entry = pwd.getpwnam(user)
    except KeyError:
        raise BrokerSetupError(f"user {user!r} does not exist on this system") from None
    paths = [bdir.root, bdir.root / "data", bdir.passwd, bdir.acl]
    if bdir.tls_dir.exists():
        paths += [bdir.tls_dir, *bdir.tls_dir.glob("server.*")]
    for path in paths:
        os.chown(path, entry.pw_uid, entry.pw_gid)


def make_test_certificates(tls_dir: Path, *, days: int = 30) -> None:
    """A throw-away CA, a server certificate for localhost/127.0.0.1 and a client certificate.

    For tests and trials only; production certificates come from the operator's own CA.
    """
    if (tls_dir / "server.crt").exists():
        return
    openssl = shutil.which("openssl")
    if openssl is None:
        raise BrokerSetupError("--tls needs the openssl command-line tool, not found on PATH")
    tls_dir.mkdir(parents=True, exist_ok=True)
    os.chmod(tls_dir, 0o700)

    def run(*args: str) -> None:
        done = subprocess.run([openssl, *args], cwd=tls_dir, capture_output=True, text=True,
                              check=False)
        if done.returncode != 0:
            raise BrokerSetupError(f"openssl {args[0]} failed: {done.stderr.strip()}")

    run("req", "-x509", "-newkey", "rsa:2048", "-nodes", "-keyout", "ca.key", "-out",
        "ca.crt", "-days", str(days), "-subj", "/CN=halfcycle test CA")
    (tls_dir / "server.ext").write_text(
        "subjectAltName=DNS:localhost,IP:127.0.0.1\nextendedKeyUsage=serverAuth\n")
    (tls_dir / "client.ext").write_text("extendedKeyUsage=clientAuth\n")
    for name, ext in (("server", "server.ext"), ("client", "client.ext")):
        run("req", "-newkey", "rsa:2048", "-nodes", "-keyout", f"{name}.key", "-out",
            f"{name}.csr", "-subj", f"/CN={'localhost' if name == 'server' else 'collector'}")
        run("x509", "-req", "-in", f"{name}.csr", "-CA", "ca.crt", "-CAkey", "ca.key",
            "-CAcreateserial", "-out", f"{name}.crt", "-days", str(days), "-extfile", ext)
    for key in tls_dir.glob("*.key"):
        os.chmod(key, 0o600)


def mosquitto_command(bdir: BrokerDir) -> list[str]:
    exe = shutil.which("mosquitto") or ("/usr/sbin/mosquitto"
                                        if Path("/usr/sbin/mosquitto").exists() else None)
    if exe is None:
        raise BrokerSetupError("mosquitto not found (install the mosquitto package)")
    return [exe, "-c", str(bdir.conf)]
