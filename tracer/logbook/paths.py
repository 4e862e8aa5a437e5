"""Where the logbook lives when nobody says otherwise."""
from __future__ import annotations

import os
from pathlib import Path

LOGBOOK_ENV = "TRACER_LOGBOOK"
LOGBOOK_FILE_NAME = "logbook.sqlite"


def default_logbook_path() -> Path:
    """The default logbook file.

    In order: ``$TRACER_LOGBOOK`` if set; else ``$XDG_DATA_HOME/tracer/logbook.sqlite``
    when ``XDG_DATA_HOME`` is set to an absolute path (XDG Base Directory rules ignore a
    relative one); else ``~/.local/share/tracer/logbook.sqlite``.
    """
    explicit = os.environ.get(LOGBOOK_ENV, "").strip()
    if explicit:
        return Path(explicit).expanduser()
    xdg = os.environ.get("XDG_DATA_HOME", "").strip()
    base = Path(xdg) if xdg and os.path.isabs(xdg) else Path.home() / ".local" / "share"
    return base / "tracer" / LOGBOOK_FILE_NAME
