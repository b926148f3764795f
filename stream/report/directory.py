"""Where a report goes: the directory checks that keep user files safe, and the report's error."""

from __future__ import annotations

from pathlib import Path

MARKER = '<meta name="generator" content="shiftsieve report">'   # how a previous report is recognised


class ReportError(Exception):
    """The report cannot be written; the message is one line."""


def prepare_directory(directory: str | Path) -> Path:
    """Create ``directory`` or check it may be overwritten (empty, or a previous report: its
    ``index.html`` carries :data:`MARKER` and every other entry is a PNG); check it is writable.
    Raises :class:`ReportError` with a one-line message otherwise; user files are never deleted."""
    path = Path(directory)
    if path.exists() and not path.is_dir():
        raise ReportError(f"--report {path}: exists and is not a directory")
    if path.is_dir():
        entries = list(path.iterdir())
        index = path / "index.html"
        ours = index.is_file() and MARKER in index.read_text(encoding="utf-8", errors="replace")[:2000]
        if entries and not (ours and all(e == index or (e.suffix == ".png" and e.is_file()) for e in entries)):
            raise ReportError(f"--report {path}: directory is not empty and not a previous report; "
                              f"choose another or empty it")
    try:
        path.mkdir(parents=True, exist_ok=True)
        probe = path / ".write-test"
        probe.write_bytes(b"")
        probe.unlink()
    except OSError as exc:
        raise ReportError(f"--report {path}: cannot write there ({exc.strerror or exc})") from None
    return path
