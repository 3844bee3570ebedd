"""systemd service notification (``Type=notify``) and watchdog pings, without a dependency.

The protocol is one datagram of newline-separated ``KEY=VALUE`` assignments sent to the
``AF_UNIX`` socket named by ``$NOTIFY_SOCKET`` (a leading ``@`` names an abstract-namespace
socket): ``READY=1`` once the service does its job, ``WATCHDOG=1`` at least once per
``$WATCHDOG_USEC`` (systemd restarts the service when the pings stop), ``STATUS=...`` free
text for ``systemctl status``, ``STOPPING=1`` on the way out.

References
----------
sd_notify(3) and systemd.service(5) (``Type=notify``, ``WatchdogSec=``, ``NotifyAccess=``),
systemd manual pages, version 252.
"""

from __future__ import annotations

import os
import socket
import time
from collections.abc import Callable, Mapping


class Notifier:
    """Sends service notifications when started by systemd with ``Type=notify``; every
    method is a cheap no-op otherwise (no ``$NOTIFY_SOCKET``).

    ``watchdog()`` may be called as often as the caller likes (each loop pass): it sends at
    most one ping per half watchdog interval, as sd_watchdog_enabled(3) recommends.
    """

    def __init__(self, env: Mapping[str, str] | None = None, *,
                 monotonic: Callable[[], float] = time.monotonic) -> None:
        env = os.environ if env is None else env
        address = env.get("NOTIFY_SOCKET", "")
        if address.startswith("@"):
            address = "\0" + address[1:]  # abstract namespace
        self.address = address or None
        self.watchdog_s = watchdog_interval(env)
        self._now = monotonic
        self._last_ping = -float("inf")
        self.sent: int = 0

    @property
    def enabled(self) -> bool:
        return self.address is not None

    def notify(self, **fields: str | int) -> bool:
        """Send ``KEY=VALUE`` lines (``notify(READY=1, STATUS="...")``); False when there is
        no socket to send to or the send failed (never raises: a lost notification must not
        take the service down)."""
        if self.address is None or not fields:
            return False
        text = "\n".join(f"{k}={v}" for k, v in fields.items())
        try:
            with socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM) as sock:
                sock.sendto(text.encode("utf-8"), self.address)
        except OSError:
            return False
        self.sent += 1
        return True

    def ready(self, status: str) -> bool:
        return self.notify(READY=1, STATUS=status)

    def status(self, status: str) -> bool:
        return self.notify(STATUS=status)

    def stopping(self) -> bool:
        return self.notify(STOPPING=1)

    def watchdog(self) -> bool:
        """A watchdog ping if one is due (at most one per half interval)."""
        if self.address is None or self.watchdog_s is None:
            return False
        now = self._now()
        if now - self._last_ping < self.watchdog_s / 2:
            return False
        self._last_ping = now
        return self.notify(WATCHDOG=1)


def watchdog_interval(env: Mapping[str, str]) -> float | None:
    """``$WATCHDOG_USEC`` in seconds, when it is meant for this process (``$WATCHDOG_PID``
    unset or equal to our pid); None when the watchdog is off."""
    usec = env.get("WATCHDOG_USEC")
    pid = env.get("WATCHDOG_PID")
    if not usec or (pid and pid.isdigit() and int(pid) != os.getpid()):
        return None
    try:
        value = int(usec)
    except ValueError:
        return None
    return value / 1e6 if value > 0 else None
