"""`halfcycle report` / `capture` against stores that cannot be used: one line naming what
failed, exit status 2, no traceback, nothing created (issue 9). Real SQLite files and the
PostgreSQL server of the tests (a missing database, an unknown role, a refused port)."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path
from urllib.parse import urlsplit, urlunsplit

import pytest
from _store_helpers import admin_dsn, event, mixed_stream, pg_database

from agent.store.recorder import RecorderStore

__all__ = ["pg_database"]

ROOT = Path(__file__).resolve().parents[1]


def run_cli(*argv: str, cwd: Path) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "agent.cli.main", *argv], cwd=cwd,
                          capture_output=True, text=True, timeout=60, check=False)


def _one_line_error(done: subprocess.CompletedProcess[str], *needles: str) -> None:
    assert done.returncode == 2, done.stderr
    lines = done.stderr.strip().splitlines()
    assert len(lines) == 1, done.stderr  # one line, no traceback
    assert "Traceback" not in done.stderr
    for needle in needles:
        assert needle in lines[0], lines[0]


def _pg(dbname: str | None = None, user: str | None = None, port: int | None = None) -> str:
    parts = urlsplit(admin_dsn())
    host = parts.hostname or "127.0.0.1"
    netloc = f"{user or parts.username or 'postgres'}@{host}:{port or parts.port or 5432}"
    return urlunsplit((parts.scheme, netloc, "/" + (dbname or "postgres"), "", ""))


def _pg_reachable() -> bool:
    psycopg = pytest.importorskip("psycopg")
    try:
        psycopg.connect(admin_dsn(), connect_timeout=3).close()
    except psycopg.OperationalError:
        return False
    return True


@pytest.mark.parametrize("command", [["report"], ["capture", "list", "--captures", "caps"]])
@pytest.mark.parametrize("case,needle", [
    ("missing_db", 'database "hc_no_such_db_o9" does not exist'),
    ("unknown_role", 'role "hc_no_such_role_o9" does not exist'),
    ("refused_port", "refused"),
])
def test_postgresql_store_errors_are_one_line(tmp_path: Path, command: list[str], case: str,
                                              needle: str) -> None:
    if not _pg_reachable():
        pytest.skip("PostgreSQL not reachable (HALFCYCLE_TEST_PG_DSN)")
    url = {"missing_db": _pg(dbname="hc_no_such_db_o9"),
           "unknown_role": _pg(user="hc_no_such_role_o9"),
           "refused_port": _pg(port=1)}[case]
    done = run_cli(command[0], *command[1:], "--store", url, cwd=tmp_path)
    _one_line_error(done, needle)


@pytest.mark.parametrize("command", [["report"], ["capture", "list", "--captures", "caps"],
                                     ["capture", "export", "--captures", "caps", "--id", "x",
                                      "--out", "out"]])
def test_not_a_sqlite_file_is_one_line(tmp_path: Path, command: list[str]) -> None:
    bad = tmp_path / "notes.db"
    bad.write_text("these are meeting notes, not a database\n" * 20)
    done = run_cli(command[0], *command[1:], "--store", f"sqlite:///{bad}", cwd=tmp_path)
    _one_line_error(done, str(bad))
    assert "not a" in done.stderr


def test_capture_list_on_a_missing_file_creates_nothing(tmp_path: Path) -> None:
    missing = tmp_path / "nowhere" / "recorder.db"
    done = run_cli("capture", "list", "--store", f"sqlite:///{missing}", "--captures", "caps",
                   cwd=tmp_path)
    _one_line_error(done, str(missing))
    assert not missing.exists() and not missing.parent.exists()


def _store_with_one_capture(tmp_path: Path) -> tuple[str, Path]:
    url = f"sqlite:///{tmp_path / 'recorder.db'}"
    caps = tmp_path / "captures"
    with RecorderStore(url, caps) as store:
        store.commit_batch(mixed_stream(n_agg=40))
    return url, caps


def test_unknown_capture_id_and_wrong_captures_folder(tmp_path: Path) -> None:
    url, caps = _store_with_one_capture(tmp_path)
    done = run_cli("capture", "export", "--store", url, "--captures", str(caps),
                   "--id", "no-such-capture", "--out", "out", cwd=tmp_path)
    _one_line_error(done, "no-such-capture")
    wrong = tmp_path / "elsewhere"
    wrong.mkdir()
    done = run_cli("capture", "export", "--store", url, "--captures", str(wrong),
                   "--id", "dev-1-cap", "--out", "out", cwd=tmp_path)
    _one_line_error(done, "dev-1-cap", str(wrong))


def test_capture_list_is_sorted_by_time_with_event_and_type(tmp_path: Path) -> None:
    url = f"sqlite:///{tmp_path / 'recorder.db'}"
    caps = tmp_path / "captures"
    from _store_helpers import capture_chunks

    # Capture ids sort the other way round from their trigger times.
    with RecorderStore(url, caps) as store:
        store.commit_batch([event(1, "ev-late", "open"), event(2, "ev-early", "open")])
        late = capture_chunks(3, "a-late", "ev-late", b"L" * 300, 2,
                              meta={"trigger_utc": 1_700_000_900.0})
        early = capture_chunks(5, "z-early", "ev-early", b"E" * 300, 2,
                               meta={"trigger_utc": 1_700_000_100.0})
        store.commit_batch(late + early)
    done = run_cli("capture", "list", "--store", url, "--captures", str(caps), cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    rows = [line.split() for line in done.stdout.splitlines()[1:]]
    assert [r[1] for r in rows] == ["z-early", "a-late"]  # by time, not by id
    assert rows[0][0].startswith("2023-11-14T22:15:00")  # 1_700_000_100 s UTC
    assert rows[0][2] == "ev-early" and rows[0][3] == "dip"


def test_listing_piped_into_head_prints_no_traceback(tmp_path: Path) -> None:
    from _store_helpers import capture_chunks

    url = f"sqlite:///{tmp_path / 'recorder.db'}"
    caps = tmp_path / "captures"
    with RecorderStore(url, caps) as store:  # ~2500 lines: more than a pipe buffer holds
        store.commit_batch([event(1, "ev-1", "open")]
                           + [c for i in range(2500)
                              for c in capture_chunks(2 + i, f"cap-{i:05d}", "ev-1",
                                                      i.to_bytes(4, "big") * 8, 1)])
    cmd = f"{sys.executable} -m agent.cli.main capture list --store {url} --captures {caps}"
    done = subprocess.run(["bash", "-c", cmd + " | head -n 2"], cwd=tmp_path,
                          capture_output=True, text=True, timeout=60, check=False,
                          env={"PYTHONPATH": str(ROOT), "PATH": "/usr/bin:/bin"})
    assert len(done.stdout.splitlines()) == 2
    assert "Traceback" not in done.stderr and "BrokenPipe" not in done.stderr, done.stderr
