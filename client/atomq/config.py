"""Where the client finds its service URL and token.

Order: explicit arguments, then ATOMQ_URL / ATOMQ_TOKEN, then the user config
file (ATOMQ_CONFIG, default ~/.config/atomq/client.json), which `atomq serve`
writes for its local user.
"""

from __future__ import annotations

import json
import os
from pathlib import Path

from atomq.errors import ConfigurationError


def config_path() -> Path:
    if "ATOMQ_CONFIG" in os.environ:
        return Path(os.environ["ATOMQ_CONFIG"])
    base = Path(os.environ.get("XDG_CONFIG_HOME", Path.home() / ".config"))
    return base / "atomq" / "client.json"


def write_client_config(url: str, token: str, path: Path | None = None) -> Path:
    """Store URL and token, readable by the owner only."""
    path = path or config_path()
    path.parent.mkdir(parents=True, exist_ok=True)
    fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
    with os.fdopen(fd, "w") as handle:
        json.dump({"url": url, "token": token}, handle)
    return path


def resolve(url: str | None, token: str | None) -> tuple[str, str]:
    url = url or os.environ.get("ATOMQ_URL")
    token = token or os.environ.get("ATOMQ_TOKEN")
    if url is None or token is None:
        path = config_path()
        if path.exists():
            stored = json.loads(path.read_text())
            url = url or stored.get("url")
            token = token or stored.get("token")
    if not url or not token:
        raise ConfigurationError(
            "no atomq service configured: pass Client(url, token), set ATOMQ_URL and "
            f"ATOMQ_TOKEN, or start `atomq serve`, which writes {config_path()}"
        )
    return url.rstrip("/"), token
