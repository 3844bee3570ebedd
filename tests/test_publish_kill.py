# ruff: noqa: F811  (pytest fixtures imported from _mqtt_helpers shadow their name)
"""SIGKILL the publishing agent at random points, many times: nothing is lost or reused.

The agent is ``tests/_mqtt_helpers.py agent`` (a real outbox and publisher in a subprocess).
Kill count: ``HC_AGENT_KILLS`` (default 50).
"""

from __future__ import annotations

import os
import random
import signal
import sqlite3
import subprocess
import sys
import time
from pathlib import Path

from _mqtt_helpers import ROOT, SITE, Broker, Committer, broker, wait_for  # noqa: F401

from agent.publish.outbox import Outbox

DEV = "dev-a"
HELPER = str(ROOT / "tests" / "_mqtt_helpers.py")


def _agent(db: Path, port: int, password_file: Path, total: int) -> subprocess.Popen[bytes]:
    return subprocess.Popen(
        [sys.executable, HELPER, "agent", "--db", str(db), "--device", DEV, "--port",
         str(port), "--password-file", str(password_file), "--total", str(total)],
        stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, cwd=ROOT)


def test_agent_sigkill_at_random_points(broker: Broker, tmp_path: Path) -> None:
    kills = int(os.environ.get("HC_AGENT_KILLS", "50"))
    total = 40 * kills + 200
    rng = random.Random(20261201)  # fixed seed: a failure can be replayed
    password_file = tmp_path / "dev.password"
    password_file.write_text(broker.devices[DEV])
    db = tmp_path / "outbox.db"
    committer = Committer(broker.port, broker.collector_password).start()
    started = time.monotonic()
    survived = 0
    try:
        for _ in range(kills):
            proc = _agent(db, broker.port, password_file, total)
            assert proc.stdout is not None
            ready = proc.stdout.readline()  # the outbox is open once "ready" is printed
            time.sleep(rng.uniform(0.0, 0.6))
            proc.send_signal(signal.SIGKILL)
            proc.wait(10)
            if ready.strip() == b"ready":
                survived += 1
        # a last run to completion: produce the rest, publish until drained, exit 0
        proc = _agent(db, broker.port, password_file, total)
        out, _ = proc.communicate(timeout=120)
        assert proc.returncode == 0 and b"drained" in out
        epoch = Outbox(db, DEV, SITE).epoch
        assert wait_for(lambda: committer.ack_of(DEV, epoch) >= total, 30)
    finally:
        committer.stop()
    elapsed = time.monotonic() - started
    seqs = committer.seqs(DEV)
    # one epoch (one outbox file), every seq 1..total committed, nothing missing or extra
    assert list(seqs) == [epoch]
    assert seqs[epoch] == set(range(1, total + 1))
    con = sqlite3.connect(db)
    assert con.execute("PRAGMA integrity_check").fetchone()[0] == "ok"  # SQLite docs
    assert con.execute("SELECT COUNT(*) FROM outbox").fetchone()[0] == 0  # drained
    print(f"{survived} SIGKILLs after start (of {kills}), {total} messages, "
          f"{committer.duplicates} duplicates delivered, {elapsed:.1f} s")
