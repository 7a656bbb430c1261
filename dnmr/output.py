"""Writing results safely: atomically, and never over an existing file unless asked."""
from __future__ import annotations

import os
import tempfile
from pathlib import Path

from .errors import InputError


def _refuse_existing(path: Path, overwrite: bool) -> None:
    if path.exists() and not overwrite:
        raise InputError(f"{path} already exists; choose another name or pass --overwrite", where="output")


def atomic_write_bytes(path: str | Path, data: bytes, overwrite: bool = False) -> Path:
    """Write `data` to `path` through a temporary file in the same folder and an atomic rename."""
    path = Path(path)
    _refuse_existing(path, overwrite)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".part")
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise
    return path


def atomic_write_text(path: str | Path, text: str, overwrite: bool = False) -> Path:
    """Write `text` (UTF-8) atomically; see :func:`atomic_write_bytes`."""
    return atomic_write_bytes(path, text.encode("utf-8"), overwrite=overwrite)


def save_figure(fig, path: str | Path, overwrite: bool = False, dpi: int = 150) -> Path:
    """Save a matplotlib figure atomically (format from the file suffix)."""
    import io

    path = Path(path)
    buf = io.BytesIO()
    fig.savefig(buf, format=path.suffix.lstrip(".") or "png", dpi=dpi, bbox_inches="tight")
    return atomic_write_bytes(path, buf.getvalue(), overwrite=overwrite)
