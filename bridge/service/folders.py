"""The folders and files the service needs, checked before it starts (shell).

Owns :func:`check_folders`: what must exist (the inbox, a file destination's folder, the files a
destination authenticates with), and where the service's own folders may not lie. The CLI calls
it before it takes the lock and opens the ledger, so a mistyped path stops ``watch`` at start.
"""

from __future__ import annotations

from bridge.errors import ConfigError
from bridge.service.settings import ServiceSettings


def check_folders(settings: ServiceSettings) -> None:
    """The folders the service needs, checked before it starts (ConfigError naming the key).

    The inbox and each file destination's folder (another system's: it collects from there)
    must exist, and so must the files a destination authenticates with (TLS, SMART): a mistyped
    path or a share that is not mounted must not look like an empty feed, or a delivery nobody
    collects. The service's own folders (archive, quarantine, state) may be created, and the
    log says so; none may lie inside the inbox, which is read to any depth: its own files would
    be taken again.
    """
    inbox = settings.inbox
    theirs = [("inbox", inbox, "the lab's export folder")]
    theirs += [(f"destination.{d.name}.folder", d.folder, "the folder another system collects from")
               for d in settings.destinations if d.folder is not None]  # fmt: skip
    for key, folder, what in theirs:
        if not folder.is_dir():
            got = "not a folder" if folder.exists() else "missing: mistyped, or a share not mounted?"
            raise ConfigError(key, f"an existing folder ({what}), got {folder} ({got})")
    for d in settings.destinations:  # the files a destination authenticates with
        for name in ("ca_file", "cert_file", "key_file", "private_key_file"):
            path = getattr(d, name)
            if path is not None and not path.is_file():
                raise ConfigError(f"destination.{d.name}.{name}", f"an existing file, got {path}")
    own = [("archive", settings.archive), ("quarantine", settings.quarantine), ("state", settings.state)]
    own += [(f"destination.{d.name}.folder", d.folder) for d in settings.destinations if d.folder is not None]
    for key, folder in own:
        if folder.resolve() == inbox.resolve() or folder.resolve().is_relative_to(inbox.resolve()):
            raise ConfigError(key, f"a folder outside the inbox {inbox} (the inbox is read to any depth), got {folder}")
