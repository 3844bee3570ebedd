"""Secrets kept out of configuration files: read from a file, or from systemd credentials.

A ``*_file`` key (``password_file``, ``token_file``) names a file holding the secret alone
(trailing newline ignored). The path may start with ``$CREDENTIALS_DIRECTORY`` (or
``${CREDENTIALS_DIRECTORY}``): systemd's ``LoadCredential=NAME:/etc/halfcycle/NAME`` places
a copy there, readable by the service only, and sets the variable (systemd.exec(5),
"Credentials"). A configuration that holds a secret inline is refused nothing, but when
other users may read it the loader warns.
"""

from __future__ import annotations

import os
import stat
from pathlib import Path

import structlog

from agent.config import Section

log = structlog.get_logger("halfcycle.ops.secrets")
CREDENTIALS_VAR = "CREDENTIALS_DIRECTORY"


def resolve_secret_path(sec: Section, name: str, value: str) -> str:
    """Expand ``$CREDENTIALS_DIRECTORY``; a relative path is taken from the configuration
    file's folder. ConfigError when the variable is used but not set."""
    if CREDENTIALS_VAR in value:
        if not os.environ.get(CREDENTIALS_VAR):
            raise sec.error(name, f"{value} uses ${CREDENTIALS_VAR}, which is not set (run "
                            "under systemd with LoadCredential=, or give a plain path)")
        value = value.replace("${" + CREDENTIALS_VAR + "}", os.environ[CREDENTIALS_VAR])
        value = value.replace("$" + CREDENTIALS_VAR, os.environ[CREDENTIALS_VAR])
    path = Path(value)
    if not path.is_absolute() and sec.path not in (None, "<defaults>"):
        path = Path(str(sec.path)).parent / path
    return str(path)


def read_secret_file(sec: Section, name: str) -> str:
    """The secret in the file named by key ``name`` of ``sec`` (ConfigError naming the key
    when it cannot be read or is empty)."""
    path = resolve_secret_path(sec, name, sec.get(name, str, required=True))
    try:
        with open(path, encoding="utf-8") as fh:
            secret = fh.read().strip()
    except OSError as exc:
        raise sec.error(name, f"cannot read {path}: {exc.strerror}") from None
    if not secret:
        raise sec.error(name, f"{path} is empty")
    return secret


def warn_if_exposed(path: str | Path | None, secret_keys: list[str]) -> bool:
    """Warn (once per call) when a configuration that holds a secret inline can be read by
    every user of the machine; returns True when it warned."""
    if path is None or not secret_keys:
        return False
    try:
        mode = os.stat(path).st_mode
    except OSError:
        return False
    if not mode & stat.S_IROTH:
        return False
    log.warning("config_secret_world_readable", path=str(path), keys=sorted(secret_keys),
                mode=oct(stat.S_IMODE(mode)),
                fix="chmod 640 the file (group of the service user), or move the secret to "
                    "a *_file or a systemd credential")
    return True
